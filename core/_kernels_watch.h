/*
 * The segment watch's tallies of a learned piece (included by _kernels.c; see
 * shoal.core.piece_tallies): one pass over the piece's scores for what the drift watch
 * and the lifecycle keep of it, in place of a dozen numpy calls per piece.
 */

/* piece_tallies(ld, component, X, center, unusual_below, near_below, first, stride,
 *               unusual_sum, unusual_by, sampled, near) -> (ld_sum, ld2_sum, unusual, near):
 * the sums of the log-densities and of their squares, in row order; the rows under
 * unusual_below counted, per component into unusual_by (+=) and their rows centred on
 * center summed into unusual_sum (+=, in row order); the positions of the rows under
 * near_below written to near; the components of rows first, first + stride, ... counted
 * into sampled (+=). A NaN bound takes no row. */
static PyObject *piece_tallies(PyObject *self, PyObject *args) {
    PyObject *old, *oc, *oX, *oce, *ous, *oub, *osa, *one;
    double ubelow, nbelow;
    Py_ssize_t first, stride, dl[1], dc[1], dX[2], dce[1], dus[1], dub[1], dsa[1], dne[1];
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOOOddnnOOOO", &old, &oc, &oX, &oce, &ubelow, &nbelow,
                          &first, &stride, &ous, &oub, &osa, &one))
        return NULL;
    TAKE(const double *, ld, old, "log_density", F64, 1, 0, dl);
    TAKE(const int64_t *, comp, oc, "component", I64, 1, 0, dc);
    TAKE(const double *, X, oX, "X", F64, 2, 0, dX);
    TAKE(const double *, center, oce, "center", F64, 1, 0, dce);
    TAKE(double *, usum, ous, "unusual_sum", F64, 1, 1, dus);
    TAKE(int64_t *, uby, oub, "unusual_by", I64, 1, 1, dub);
    TAKE(int64_t *, sampled, osa, "sampled", I64, 1, 1, dsa);
    TAKE(int64_t *, near, one, "near", I64, 1, 1, dne);
    Py_ssize_t n = dl[0], D = dX[1], K = dub[0];
    NEED(dc[0] == n && dX[0] == n && dce[0] == D && dus[0] == D && dsa[0] == K &&
             dne[0] >= n && first >= 0 && stride >= 1,
         "piece_tallies: shapes do not agree");
    double sum = 0.0, sum2 = 0.0;
    Py_ssize_t n_unusual = 0, n_near = 0;
    int bad = 0;
    Py_BEGIN_ALLOW_THREADS
    for (Py_ssize_t i = 0; i < n; i++) {
        double v = ld[i];
        sum += v;
        sum2 += v * v;
        if (v < ubelow) {
            int64_t c = comp[i];
            if (c < 0 || c >= K) {
                bad = 1;
                break;
            }
            uby[c]++;
            const double *x = X + i * D;
            for (Py_ssize_t d = 0; d < D; d++) {
                double v = x[d] - center[d];
                if (v == v) usum[d] += v; /* a missing value (NaN) counts at the centre */
            }
            n_unusual++;
        }
        if (v < nbelow) near[n_near++] = i;
    }
    if (!bad)
        for (Py_ssize_t i = first; i < n; i += stride) {
            int64_t c = comp[i];
            if (c < 0 || c >= K) {
                bad = 1;
                break;
            }
            sampled[c]++;
        }
    Py_END_ALLOW_THREADS
    NEED(!bad, "piece_tallies: a component out of range");
    release(&s);
    return Py_BuildValue("ddnn", sum, sum2, n_unusual, n_near);
fail:
    release(&s);
    return NULL;
}
