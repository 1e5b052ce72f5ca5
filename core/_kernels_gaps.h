/*
 * Rows with missing features on the compiled path (included once by _kernels.c).
 *
 * The maths is core/missing.py's: a row with missing features `m` is designed with
 * those features at zero (the warm-up mean); its log-joint from the ordinary kernels is
 * corrected to the marginal over the observed features with the precision block
 * H = Lam_mm and g = (Lam (z - mu))_m (full), or by dropping the missing terms (diag,
 * spherical). For learning, step e = E[z_m | z_o, k] - z_m and the conditional
 * covariance H^-1 are kept, and the M-step adds (a + e)(a + e)^T - a a^T + H^-1 to the
 * design products the ordinary kernels summed for the filled row.
 *
 * Gappy rows are listed by `rows` (increasing, absolute columns of L), with their
 * missing features at cols[off[g]] .. cols[off[g+1]-1]; `ga`..`gb` select the ones of
 * the current block, whose design rows start at absolute row `lo`. step holds
 * K * r values per row at K * off[g]; hinv K * r * r (full) or K * r (diag, spherical)
 * at K * hoff[g].
 */

#define GAP_LOG_2PI 1.8378770664093453 /* log(2 pi), numpy's float64 value */

/* In-place lower Cholesky of the r x r row-major H; 0 if H is not positive definite. */
static int gap_cholesky(double *H, Py_ssize_t r) {
    for (Py_ssize_t j = 0; j < r; j++) {
        double s = H[j * r + j];
        for (Py_ssize_t l = 0; l < j; l++) s -= H[j * r + l] * H[j * r + l];
        if (!(s > 0.0)) return 0;
        double d = sqrt(s);
        H[j * r + j] = d;
        for (Py_ssize_t i = j + 1; i < r; i++) {
            double t = H[i * r + j];
            for (Py_ssize_t l = 0; l < j; l++) t -= H[i * r + l] * H[j * r + l];
            H[i * r + j] = t / d;
        }
    }
    return 1;
}

/* x = (C C^T)^-1 b for the lower factor C (r x r); x may be b. */
static void gap_solve(const double *C, Py_ssize_t r, const double *b, double *x) {
    for (Py_ssize_t i = 0; i < r; i++) {
        double t = b[i];
        for (Py_ssize_t l = 0; l < i; l++) t -= C[i * r + l] * x[l];
        x[i] = t / C[i * r + i];
    }
    for (Py_ssize_t i = r - 1; i >= 0; i--) {
        double t = x[i];
        for (Py_ssize_t l = i + 1; l < r; l++) t -= C[l * r + i] * x[l];
        x[i] = t / C[i * r + i];
    }
}

/* Returns 0 if some H is not positive definite. scratch: 3 D + D * D doubles. */
HOT static int c_gap_log_joint(const double *A, Py_ssize_t W, Py_ssize_t D, Py_ssize_t lo,
                           double *L, Py_ssize_t K, Py_ssize_t N, const int64_t *rows,
                           const int64_t *off, const int64_t *cols, const int64_t *hoff,
                           Py_ssize_t ga, Py_ssize_t gb, const double *lam,
                           const double *lam_mu, const double *half_const,
                           const double *log_scale, int kind, double *step, double *hinv,
                           double *scratch) {
    double *g = scratch, *x = g + D, *u = x + D, *H = u + D;
    for (Py_ssize_t gi = ga; gi < gb; gi++) {
        Py_ssize_t row = rows[gi], r = off[gi + 1] - off[gi];
        const int64_t *m = cols + off[gi];
        const double *a = A + (row - lo) * W;
        double lscale = 0.0;
        for (Py_ssize_t p = 0; p < r; p++) lscale += log_scale[m[p]];
        double *st = step + K * off[gi], *hv = hinv + K * hoff[gi];
        for (Py_ssize_t k = 0; k < K; k++) {
            double corr;
            if (kind == 0) {
                const double *lk = lam + k * D * D;
                for (Py_ssize_t p = 0; p < r; p++) {
                    const double *lj = lk + m[p] * D;
                    double t = 0.0;
                    for (Py_ssize_t l = 0; l < D; l++) t += lj[l] * a[l];
                    g[p] = t - lam_mu[k * D + m[p]];
                    for (Py_ssize_t q = 0; q < r; q++) H[p * r + q] = lj[m[q]];
                }
                double *hk = hv + k * r * r;
                if (r == 1) { /* the common case: no factorisation, the log precomputed */
                    if (!(H[0] > 0.0)) return 0;
                    double x0 = g[0] / H[0];
                    st[k] = -x0;
                    hk[0] = 1.0 / H[0];
                    L[k * N + row] += half_const[k * D + m[0]] + 0.5 * g[0] * x0 + lscale;
                    continue;
                }
                if (r == 2) { /* closed form, as core/missing.py's _solve_small */
                    double h00 = H[0], h01 = H[1], h11 = H[3], det = h00 * h11 - h01 * h01;
                    if (!(h00 > 0.0 && det > 0.0)) return 0;
                    double i00 = h11 / det, i11 = h00 / det, i01 = -h01 / det;
                    double x0 = i00 * g[0] + i01 * g[1], x1 = i01 * g[0] + i11 * g[1];
                    st[k * 2] = -x0;
                    st[k * 2 + 1] = -x1;
                    hk[0] = i00, hk[1] = i01, hk[2] = i01, hk[3] = i11;
                    L[k * N + row] += 0.5 * (2.0 * GAP_LOG_2PI - log(det) + g[0] * x0 +
                                             g[1] * x1) + lscale;
                    continue;
                }
                if (!gap_cholesky(H, r)) return 0;
                double logdet = 0.0, quad = 0.0;
                for (Py_ssize_t p = 0; p < r; p++) logdet += 2.0 * log(H[p * r + p]);
                gap_solve(H, r, g, x);
                for (Py_ssize_t p = 0; p < r; p++) {
                    quad += g[p] * x[p];
                    st[k * r + p] = -x[p];
                }
                corr = 0.5 * ((double)r * GAP_LOG_2PI - logdet + quad);
                for (Py_ssize_t q = 0; q < r; q++) { /* column q of H^-1 */
                    for (Py_ssize_t p = 0; p < r; p++) u[p] = p == q ? 1.0 : 0.0;
                    gap_solve(H, r, u, u);
                    for (Py_ssize_t p = 0; p < r; p++) hk[p * r + q] = u[p];
                }
            } else {
                const double *z = a + (kind == 1 ? D : 1);
                corr = 0.0;
                for (Py_ssize_t p = 0; p < r; p++) {
                    Py_ssize_t j = k * D + m[p];
                    double pr = lam[j], d = z[m[p]] - lam_mu[j];
                    corr += half_const[j] + 0.5 * pr * d * d;
                    st[k * r + p] = -d;
                    hv[k * r + p] = 1.0 / pr;
                }
            }
            L[k * N + row] += corr + lscale;
        }
    }
    return 1;
}

HOT static void c_gap_moments(const double *A, Py_ssize_t W, Py_ssize_t D, Py_ssize_t lo,
                          const double *R, Py_ssize_t K, Py_ssize_t N, const double *row_w,
                          double floor, const int64_t *rows, const int64_t *off,
                          const int64_t *cols, const int64_t *hoff, Py_ssize_t ga,
                          Py_ssize_t gb, const double *step, const double *hinv, int kind,
                          double *P) {
    for (Py_ssize_t gi = ga; gi < gb; gi++) {
        Py_ssize_t row = rows[gi], r = off[gi + 1] - off[gi];
        const int64_t *m = cols + off[gi];
        const double *a = A + (row - lo) * W;
        const double *st = step + K * off[gi], *hv = hinv + K * hoff[gi];
        for (Py_ssize_t k = 0; k < K; k++) {
            double v = R[k * N + row];
            if (!(v > 0.0 && v >= floor)) continue;
            double w = v * row_w[row - lo];
            const double *e = st + k * r;
            if (kind == 0) {
                double *Pk = P + k * W * W;
                const double *hk = hv + k * r * r;
                for (Py_ssize_t p = 0; p < r; p++) {
                    Py_ssize_t j = m[p];
                    double we = w * e[p];
                    for (Py_ssize_t l = 0; l < W; l++) {
                        Pk[j * W + l] += we * a[l];
                        Pk[l * W + j] += we * a[l];
                    }
                }
                for (Py_ssize_t p = 0; p < r; p++)
                    for (Py_ssize_t q = 0; q < r; q++)
                        Pk[m[p] * W + m[q]] += w * (e[p] * e[q] + hk[p * r + q]);
            } else {
                double *Pk = P + k * W;
                const double *z = a + (kind == 1 ? D : 1);
                const double *hk = hv + k * r;
                for (Py_ssize_t p = 0; p < r; p++) {
                    Py_ssize_t j = m[p];
                    double zj = z[j], zh = zj + e[p];
                    double sq = w * (zh * zh - zj * zj + hk[p]);
                    if (kind == 1)
                        Pk[j] += sq;
                    else
                        Pk[0] += sq;
                    Pk[(kind == 1 ? D : 1) + j] += w * e[p];
                }
            }
        }
    }
}

/* gap_log_joint(A, lo, L, rows, off, cols, hoff, ga, gb, lam, lam_mu, log_scale, kind,
 * step, hinv) -> bool (False if a precision block is not positive definite). */
static PyObject *gap_log_joint(PyObject *self, PyObject *args) {
    PyObject *oA, *oL, *orow, *ooff, *ocol, *ohoff, *olam, *omu, *ohc, *ols, *ost, *ohv;
    Py_ssize_t lo, ga, gb, dA[2], dL[2], dr[1], dof[1], dc[1], dh[1], dlam[3], dmu[2], dhc[2],
        dls[1], dst[1], dhv[1];
    int kind, ok = 1;
    double *scratch = NULL;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OnOOOOOnnOOOOiOO", &oA, &lo, &oL, &orow, &ooff, &ocol,
                          &ohoff, &ga, &gb, &olam, &omu, &ohc, &ols, &kind, &ost, &ohv))
        return NULL;
    NEED(kind >= 0 && kind <= 2, "gap_log_joint: kind is 0, 1 or 2");
    TAKE(const double *, A, oA, "A", F64, 2, 0, dA);
    TAKE(double *, L, oL, "L", F64, 2, 1, dL);
    TAKE(const int64_t *, rows, orow, "rows", I64, 1, 0, dr);
    TAKE(const int64_t *, off, ooff, "off", I64, 1, 0, dof);
    TAKE(const int64_t *, cols, ocol, "cols", I64, 1, 0, dc);
    TAKE(const int64_t *, hoff, ohoff, "hoff", I64, 1, 0, dh);
    TAKE(const double *, lam, olam, "lam", F64, kind == 0 ? 3 : 2, 0, dlam);
    TAKE(const double *, mu, omu, "lam_mu", F64, 2, 0, dmu);
    TAKE(const double *, hc, ohc, "half_const", F64, 2, 0, dhc);
    TAKE(const double *, ls, ols, "log_scale", F64, 1, 0, dls);
    TAKE(double *, st, ost, "step", F64, 1, 1, dst);
    TAKE(double *, hv, ohv, "hinv", F64, 1, 1, dhv);
    Py_ssize_t K = dL[0], D = dls[0], n_g = dr[0];
    NEED(dA[1] == (kind == 0 ? D + 1 : kind == 1 ? 2 * D + 1 : D + 2) && dlam[0] == K &&
             dlam[1] == D && (kind != 0 || dlam[2] == D) && dmu[0] == K && dmu[1] == D &&
             dhc[0] == K && dhc[1] == D &&
             dof[0] == n_g + 1 && dh[0] == n_g + 1 && 0 <= ga && ga <= gb && gb <= n_g,
         "gap_log_joint: shapes disagree");
    NEED(off[n_g] <= dc[0] && K * off[n_g] <= dst[0] && K * hoff[n_g] <= dhv[0],
         "gap_log_joint: step, hinv or cols too short");
    for (Py_ssize_t gi = ga; gi < gb; gi++) {
        NEED(rows[gi] >= lo && rows[gi] < lo + dA[0] && rows[gi] < dL[1] &&
                 off[gi] <= off[gi + 1] && off[gi + 1] - off[gi] <= D,
             "gap_log_joint: a row outside the block");
        for (Py_ssize_t p = off[gi]; p < off[gi + 1]; p++)
            NEED(cols[p] >= 0 && cols[p] < D, "gap_log_joint: a column out of range");
    }
    scratch = PyMem_Malloc(sizeof(double) * (size_t)(3 * D + D * D + 1));
    if (!scratch) {
        PyErr_NoMemory();
        goto fail;
    }
    Py_BEGIN_ALLOW_THREADS
    ok = c_gap_log_joint(A, dA[1], D, lo, L, K, dL[1], rows, off, cols, hoff, ga, gb, lam, mu,
                         hc, ls, kind, st, hv, scratch);
    Py_END_ALLOW_THREADS
    PyMem_Free(scratch);
    release(&s);
    return PyBool_FromLong(ok);
fail:
    PyMem_Free(scratch);
    release(&s);
    return NULL;
}

/* gap_moments(A, lo, R, row_w, floor, rows, off, cols, hoff, ga, gb, step, hinv, kind, P):
 * the gappy rows' corrections to the design products P (K x W x W full, K x W else). */
static PyObject *gap_moments(PyObject *self, PyObject *args) {
    PyObject *oA, *oR, *ow, *orow, *ooff, *ocol, *ohoff, *ost, *ohv, *oP;
    Py_ssize_t lo, ga, gb, dA[2], dR[2], dw[1], dr[1], dof[1], dc[1], dh[1], dst[1], dhv[1],
        dP[3];
    int kind;
    double floor;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OnOOdOOOOnnOOiO", &oA, &lo, &oR, &ow, &floor, &orow, &ooff,
                          &ocol, &ohoff, &ga, &gb, &ost, &ohv, &kind, &oP))
        return NULL;
    NEED(kind >= 0 && kind <= 2, "gap_moments: kind is 0, 1 or 2");
    TAKE(const double *, A, oA, "A", F64, 2, 0, dA);
    TAKE(const double *, R, oR, "resp", F64, 2, 0, dR);
    TAKE(const double *, w, ow, "row_w", F64, 1, 0, dw);
    TAKE(const int64_t *, rows, orow, "rows", I64, 1, 0, dr);
    TAKE(const int64_t *, off, ooff, "off", I64, 1, 0, dof);
    TAKE(const int64_t *, cols, ocol, "cols", I64, 1, 0, dc);
    TAKE(const int64_t *, hoff, ohoff, "hoff", I64, 1, 0, dh);
    TAKE(const double *, st, ost, "step", F64, 1, 0, dst);
    TAKE(const double *, hv, ohv, "hinv", F64, 1, 0, dhv);
    TAKE(double *, P, oP, "P", F64, kind == 0 ? 3 : 2, 1, dP);
    Py_ssize_t K = dR[0], W = dA[1], n_g = dr[0];
    Py_ssize_t D = kind == 0 ? W - 1 : kind == 1 ? (W - 1) / 2 : W - 2;
    NEED(dP[0] == K && dP[1] == W && (kind != 0 || dP[2] == W) && dof[0] == n_g + 1 &&
             dh[0] == n_g + 1 && 0 <= ga && ga <= gb && gb <= n_g && dw[0] >= dA[0],
         "gap_moments: shapes disagree");
    NEED(off[n_g] <= dc[0] && K * off[n_g] <= dst[0] && K * hoff[n_g] <= dhv[0],
         "gap_moments: step, hinv or cols too short");
    for (Py_ssize_t gi = ga; gi < gb; gi++) {
        NEED(rows[gi] >= lo && rows[gi] < lo + dA[0] && rows[gi] < dR[1] &&
                 off[gi] <= off[gi + 1] && off[gi + 1] - off[gi] <= D,
             "gap_moments: a row outside the block");
        for (Py_ssize_t p = off[gi]; p < off[gi + 1]; p++)
            NEED(cols[p] >= 0 && cols[p] < D, "gap_moments: a column out of range");
    }
    Py_BEGIN_ALLOW_THREADS
    c_gap_moments(A, W, D, lo, R, K, dR[1], w, floor, rows, off, cols, hoff, ga, gb, st, hv,
                  kind, P);
    Py_END_ALLOW_THREADS
    RETURN_NONE_OR_FAIL;
}

/* gap_fix(A, lo, rows, off, cols, ga, gb, kind): the design rows of the block's gappy
 * rows as if their missing values were at the centre (z = 0; the spherical |z|^2 summed
 * again over the features in order, as the design kernel does). */
static PyObject *gap_fix(PyObject *self, PyObject *args) {
    PyObject *oA, *orow, *ooff, *ocol;
    Py_ssize_t lo, ga, gb, dA[2], dr[1], dof[1], dc[1];
    int kind;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OnOOOnni", &oA, &lo, &orow, &ooff, &ocol, &ga, &gb, &kind))
        return NULL;
    NEED(kind >= 0 && kind <= 2, "gap_fix: kind is 0, 1 or 2");
    TAKE(double *, A, oA, "A", F64, 2, 1, dA);
    TAKE(const int64_t *, rows, orow, "rows", I64, 1, 0, dr);
    TAKE(const int64_t *, off, ooff, "off", I64, 1, 0, dof);
    TAKE(const int64_t *, cols, ocol, "cols", I64, 1, 0, dc);
    Py_ssize_t W = dA[1], n_g = dr[0];
    Py_ssize_t D = kind == 0 ? W - 1 : kind == 1 ? (W - 1) / 2 : W - 2;
    NEED(dof[0] == n_g + 1 && 0 <= ga && ga <= gb && gb <= n_g && off[n_g] <= dc[0],
         "gap_fix: shapes disagree");
    for (Py_ssize_t gi = ga; gi < gb; gi++) {
        NEED(rows[gi] >= lo && rows[gi] < lo + dA[0] && off[gi] <= off[gi + 1],
             "gap_fix: a row outside the block");
        for (Py_ssize_t p = off[gi]; p < off[gi + 1]; p++)
            NEED(cols[p] >= 0 && cols[p] < D, "gap_fix: a column out of range");
    }
    for (Py_ssize_t gi = ga; gi < gb; gi++) {
        double *a = A + (rows[gi] - lo) * W;
        for (Py_ssize_t p = off[gi]; p < off[gi + 1]; p++) {
            Py_ssize_t j = cols[p];
            if (kind == 0) {
                a[j] = 0.0;
            } else if (kind == 1) {
                a[j] = 0.0;
                a[D + j] = 0.0;
            } else {
                a[1 + j] = 0.0;
            }
        }
        if (kind == 2) {
            double sq = 0.0;
            for (Py_ssize_t d = 0; d < D; d++) sq += a[1 + d] * a[1 + d];
            a[0] = sq;
        }
    }
    RETURN_NONE_OR_FAIL;
}

/* gap_index(X, rows, off, cols) -> count: the rows of X (n x D) with a NaN into rows (n
 * values), the NaN's features of row g into cols[off[g]:off[g+1]] (off: n + 1 values,
 * cols: n * D), all int64; -1 if a value is infinite (then the outputs mean nothing). */
HOT static Py_ssize_t c_gap_index(const double *restrict X, Py_ssize_t n, Py_ssize_t D,
                                  int64_t *restrict rows, int64_t *restrict off,
                                  int64_t *restrict cols) {
    Py_ssize_t count = 0, nc = 0;
    off[0] = 0;
    for (Py_ssize_t i = 0; i < n; i++) {
        const double *x = X + i * D;
        double chk = 0.0;
        for (Py_ssize_t d = 0; d < D; d++) chk += x[d] * 0.0;
        if (chk == 0.0) continue;
        for (Py_ssize_t d = 0; d < D; d++) {
            if (isinf(x[d])) return -1;
            if (x[d] != x[d]) cols[nc++] = d;
        }
        rows[count++] = i;
        off[count] = nc;
    }
    return count;
}

static PyObject *gap_index(PyObject *self, PyObject *args) {
    PyObject *oX, *or, *oo, *oc;
    Py_ssize_t dX[2], dr[1], doff[1], dc[1], count = 0;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOOO", &oX, &or, &oo, &oc)) return NULL;
    TAKE(const double *, X, oX, "X", F64, 2, 0, dX);
    TAKE(int64_t *, rows, or, "rows", I64, 1, 1, dr);
    TAKE(int64_t *, off, oo, "off", I64, 1, 1, doff);
    TAKE(int64_t *, cols, oc, "cols", I64, 1, 1, dc);
    NEED(dr[0] >= dX[0] && doff[0] >= dX[0] + 1 && dc[0] >= dX[0] * dX[1],
         "gap_index: outputs shorter than X needs");
    Py_BEGIN_ALLOW_THREADS
    count = c_gap_index(X, dX[0], dX[1], rows, off, cols);
    Py_END_ALLOW_THREADS
    release(&s);
    return PyLong_FromSsize_t(count);
fail:
    release(&s);
    return NULL;
}
