/*
 * The segment watch's compiled passes (included by _kernels.c): a learned piece's
 * tallies (see shoal.core.piece_tallies), one pass over its scores for what the drift
 * watch and the lifecycle keep of it, and the drift windows' shapes (see
 * shoal.core.window_statistics): each window's means, covariances, mean shifts and
 * log-determinants in one loop, a Cholesky factor per full covariance, in place of a
 * few batched numpy and LAPACK calls with their (windows x segments, D, D) temporaries.
 */

/* piece_tallies(ld, component, X, center, unusual_below, near_below, first, stride,
 *               unusual_sum, unusual_by, sampled, near[, sample_rows, sample_ld])
 *   -> (ld_sum, ld2_sum, unusual, near):
 * the sums of the log-densities and of their squares, in row order; the rows under
 * unusual_below counted, per component into unusual_by (+=) and their rows centred on
 * center summed into unusual_sum (+=, in row order); the positions of the rows under
 * near_below written to near; the components of rows first, first + stride, ... counted
 * into sampled (+=), and with sample_rows and sample_ld those rows (as float32) and their
 * log-densities copied out. A NaN bound takes no row. */
static PyObject *piece_tallies(PyObject *self, PyObject *args) {
    PyObject *old, *oc, *oX, *oce, *ous, *oub, *osa, *one, *osr = Py_None, *osl = Py_None;
    double ubelow, nbelow;
    Py_ssize_t first, stride, dl[1], dc[1], dX[2], dce[1], dus[1], dub[1], dsa[1], dne[1],
        dsr[2], dsl[1];
    float *srows = NULL;
    double *sld = NULL;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOOOddnnOOOO|OO", &old, &oc, &oX, &oce, &ubelow, &nbelow,
                          &first, &stride, &ous, &oub, &osa, &one, &osr, &osl))
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
    NEED((osr == Py_None) == (osl == Py_None), "piece_tallies: give sample_rows and sample_ld together");
    if (osr != Py_None) {
        Py_ssize_t picked = first < n ? (n - first + stride - 1) / stride : 0;
        if (!(srows = take(&s, osr, "sample_rows", F32, 2, 1, dsr)) ||
            !(sld = take(&s, osl, "sample_ld", F64, 1, 1, dsl)))
            goto fail;
        NEED(dsr[0] == picked && dsr[1] == D && dsl[0] == picked,
             "piece_tallies: sample_rows and sample_ld need one row per sampled row");
    }
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
        for (Py_ssize_t i = first, j = 0; i < n; i += stride, j++) {
            int64_t c = comp[i];
            if (c < 0 || c >= K) {
                bad = 1;
                break;
            }
            sampled[c]++;
            if (srows) {
                const double *x = X + i * D;
                float *r = srows + j * D;
                for (Py_ssize_t d = 0; d < D; d++) r[d] = (float)x[d];
                sld[j] = ld[i];
            }
        }
    Py_END_ALLOW_THREADS
    NEED(!bad, "piece_tallies: a component out of range");
    release(&s);
    return Py_BuildValue("ddnn", sum, sum2, n_unusual, n_near);
fail:
    release(&s);
    return NULL;
}

/* The lower Cholesky factor of the lower triangle of A (D x D) into L; 0 when A is not
 * positive definite (a pivot at or under zero, or NaN). */
static int chol_lower(const double *A, Py_ssize_t D, double *L) {
    for (Py_ssize_t j = 0; j < D; j++) {
        double s = A[j * D + j];
        for (Py_ssize_t k = 0; k < j; k++) s -= L[j * D + k] * L[j * D + k];
        if (!(s > 0.0)) return 0;
        double pivot = sqrt(s);
        L[j * D + j] = pivot;
        for (Py_ssize_t i = j + 1; i < D; i++) {
            double t = A[i * D + j];
            for (Py_ssize_t k = 0; k < j; k++) t -= L[i * D + k] * L[j * D + k];
            L[i * D + j] = t / pivot;
        }
    }
    return 1;
}

/* window_shapes(S, M, B, centers, seen, kind, ref_means, ref_inv_chol, means, covs,
 *               shift, log_det, ok): for every row i (a window's segment; its baseline
 * segment k = i % K, its window i / K) that is seen: the weighted mean
 * means[i] = centers[i / K] + M[i] / B[i], the covariance covs[i] = S[i] / B[i] - dev dev^T,
 * the Mahalanobis distance shift[i] of the mean from ref_means[k] under ref_inv_chol[k]
 * (L^-1 of the baseline covariance), and the log-determinant of the covariance as the
 * model's type sees it (kind 0 full, 1 diag: its diagonal, 2 spherical: its mean
 * variance), with ok[i] when every variance is positive and that covariance positive
 * definite (log_det NaN where not). Rows not seen: NaN, ok false. */
static PyObject *window_shapes(PyObject *self, PyObject *args) {
    PyObject *oS, *oM, *oB, *oc, *oseen, *orm, *oric, *omeans, *ocovs, *oshift, *old, *ook;
    int kind;
    Py_ssize_t dS[3], dM[2], dB[1], dc[2], dseen[1], drm[2], dric[3], dmeans[2], dcovs[3],
        dshift[1], dld[1], dok[1];
    double *L = NULL;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOOOOiOOOOOOO", &oS, &oM, &oB, &oc, &oseen, &kind, &orm, &oric,
                          &omeans, &ocovs, &oshift, &old, &ook))
        return NULL;
    TAKE(const double *, S, oS, "S", F64, 3, 0, dS);
    TAKE(const double *, M, oM, "M", F64, 2, 0, dM);
    TAKE(const double *, B, oB, "B", F64, 1, 0, dB);
    TAKE(const double *, centers, oc, "centers", F64, 2, 0, dc);
    TAKE(const char *, seen, oseen, "seen", BOOL, 1, 0, dseen);
    TAKE(const double *, ref_means, orm, "ref_means", F64, 2, 0, drm);
    TAKE(const double *, ref_ic, oric, "ref_inv_chol", F64, 3, 0, dric);
    TAKE(double *, means, omeans, "means", F64, 2, 1, dmeans);
    TAKE(double *, covs, ocovs, "covs", F64, 3, 1, dcovs);
    TAKE(double *, shift, oshift, "shift", F64, 1, 1, dshift);
    TAKE(double *, log_det, old, "log_det", F64, 1, 1, dld);
    TAKE(char *, ok, ook, "ok", BOOL, 1, 1, dok);
    Py_ssize_t n = dS[0], D = dS[1], K = drm[0];
    NEED(dS[2] == D && dM[0] == n && dM[1] == D && dB[0] == n && dc[1] == D && dseen[0] == n &&
             K > 0 && drm[1] == D && dric[0] == K && dric[1] == D && dric[2] == D &&
             dc[0] * K == n && dmeans[0] == n && dmeans[1] == D && dcovs[0] == n &&
             dcovs[1] == D && dcovs[2] == D && dshift[0] == n && dld[0] == n && dok[0] == n &&
             kind >= 0 && kind <= 2,
         "window_shapes: shapes do not agree");
    L = PyMem_Malloc(sizeof(double) * (size_t)(D * D + 2 * D));
    if (!L) {
        PyErr_NoMemory();
        goto fail;
    }
    Py_BEGIN_ALLOW_THREADS
    double *dev = L + D * D, *diff = dev + D;
    for (Py_ssize_t i = 0; i < n; i++) {
        double *mean = means + i * D, *cov = covs + i * D * D;
        if (!seen[i]) {
            for (Py_ssize_t a = 0; a < D; a++) mean[a] = NAN;
            for (Py_ssize_t a = 0; a < D * D; a++) cov[a] = NAN;
            shift[i] = log_det[i] = NAN;
            ok[i] = 0;
            continue;
        }
        const double *Si = S + i * D * D, *c = centers + (i / K) * D;
        Py_ssize_t k = i % K;
        double b = B[i];
        for (Py_ssize_t a = 0; a < D; a++) {
            dev[a] = M[i * D + a] / b;
            mean[a] = c[a] + dev[a];
            diff[a] = mean[a] - ref_means[k * D + a];
        }
        for (Py_ssize_t a = 0; a < D; a++)
            for (Py_ssize_t e = 0; e < D; e++) cov[a * D + e] = Si[a * D + e] / b - dev[a] * dev[e];
        const double *ic = ref_ic + k * D * D;
        double d2 = 0.0;
        for (Py_ssize_t a = 0; a < D; a++) {
            double w = 0.0;
            for (Py_ssize_t e = 0; e <= a; e++) w += ic[a * D + e] * diff[e];
            d2 += w * w;
        }
        shift[i] = sqrt(d2);
        int variances = 1;
        double sum_var = 0.0, sum_log = 0.0;
        for (Py_ssize_t a = 0; a < D; a++) {
            double v = cov[a * D + a];
            variances &= v > 0.0;
            sum_var += v;
            sum_log += log(v);
        }
        double ld = NAN;
        int positive = 0;
        if (kind == 0) {
            if (chol_lower(cov, D, L)) {
                positive = 1;
                ld = 0.0;
                for (Py_ssize_t a = 0; a < D; a++) ld += log(L[a * D + a]);
                ld *= 2.0;
            }
        } else if (kind == 1) {
            positive = variances;
            ld = variances ? sum_log : NAN;
        } else {
            double mv = sum_var / (double)D;
            positive = mv > 0.0;
            ld = positive ? (double)D * log(mv) : NAN;
        }
        log_det[i] = ld;
        ok[i] = (char)(positive && variances);
    }
    Py_END_ALLOW_THREADS
    RETURN_NONE_OR_FAIL_FREEING(L);
}

/* pairs_apart(means, cov, kind, reach) -> bool: whether every pair of components i < j
 * has |mu_i - mu_j|^2 >= reach * (tr S_i + tr S_j), the means-and-traces bound of the
 * lifecycle's merge look (cov: kind 0 full (K, D, D), 1 diag (K, D), 2 spherical (K,)). */
static PyObject *pairs_apart(PyObject *self, PyObject *args) {
    PyObject *om, *oc;
    int kind;
    double reach;
    Py_ssize_t dm[2], dc[3];
    double *tr = NULL;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOid", &om, &oc, &kind, &reach)) return NULL;
    TAKE(const double *, mu, om, "means", F64, 2, 0, dm);
    NEED(kind >= 0 && kind <= 2, "pairs_apart: kind is 0, 1 or 2");
    TAKE(const double *, cov, oc, "cov", F64, 3 - kind, 0, dc);
    Py_ssize_t K = dm[0], D = dm[1];
    NEED(dc[0] == K && (kind == 2 || dc[1] == D) && (kind != 0 || dc[2] == D),
         "pairs_apart: shapes do not agree");
    tr = PyMem_Malloc(sizeof(double) * (size_t)(K > 0 ? K : 1));
    if (!tr) {
        PyErr_NoMemory();
        goto fail;
    }
    int apart = 1;
    for (Py_ssize_t k = 0; k < K; k++) {
        double t = 0.0;
        if (kind == 0)
            for (Py_ssize_t a = 0; a < D; a++) t += cov[(k * D + a) * D + a];
        else if (kind == 1)
            for (Py_ssize_t a = 0; a < D; a++) t += cov[k * D + a];
        else
            t = cov[k] * (double)D;
        tr[k] = t;
    }
    for (Py_ssize_t i = 0; i < K && apart; i++)
        for (Py_ssize_t j = i + 1; j < K; j++) {
            double gap = 0.0;
            for (Py_ssize_t a = 0; a < D; a++) {
                double d = mu[i * D + a] - mu[j * D + a];
                gap += d * d;
            }
            if (!(gap >= reach * (tr[i] + tr[j]))) {
                apart = 0;
                break;
            }
        }
    PyMem_Free(tr);
    release(&s);
    return PyBool_FromLong(apart);
fail:
    PyMem_Free(tr);
    release(&s);
    return NULL;
}
