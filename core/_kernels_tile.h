/*
 * Row-tiled log-joint kernels, included by _kernels.c once per instruction set.
 *
 * The includer defines TILE_NAME (a prefix), TILE_TARGET (a function attribute),
 * TILE_VL (doubles per vector), TILE_NV (vectors of rows per tile), and the vector
 * type and operations TV, TV_LOADU, TV_STOREU, TV_SET1, TV_FMA (a*b+c), TV_ADD, TV_SUB,
 * TV_MUL, TV_DIV, TV_MAX, TV_ZERO, TV_PICK_GT(a, b, x, y) (x where a > b, else y) and
 * TV_POW2(t) (2^n from the low bits of t = n + 1.5 * 2^52), TV_EXPONENT(x) and
 * TV_MANTISSA(x) (x = m 2^e, m in [1, 2), for positive normal x), TV_HSUM(v) (the sum of
 * the lanes, pairwise);
 * all of them are undefined again at the end.
 *
 * A tile is T = TILE_VL * TILE_NV rows, copied transposed into `zb` (feature-major) so
 * that one vector holds one feature of TILE_VL rows; results land in the (K, N) layout
 * of the log-joint directly, with no horizontal sums. The last, partial tile is padded
 * with zero rows whose results are not written.
 */

#define TILE_T (TILE_VL * TILE_NV)
#define TILE_CAT2(a, b) a##b
#define TILE_CAT(a, b) TILE_CAT2(a, b)

/* Rows t..t+n-1 of A (row stride W), columns 0..C-1, into zb[c * TILE_T + r]. */
TILE_TARGET static inline void TILE_CAT(TILE_NAME, _transpose)(
    const double *restrict A, Py_ssize_t W, Py_ssize_t C, Py_ssize_t n, double *restrict zb) {
    for (Py_ssize_t r = 0; r < n; r++) {
        const double *a = A + r * W;
        for (Py_ssize_t c = 0; c < C; c++) zb[c * TILE_T + r] = a[c];
    }
    for (Py_ssize_t r = n; r < TILE_T; r++)
        for (Py_ssize_t c = 0; c < C; c++) zb[c * TILE_T + r] = 0.0;
}

/* Full type. P is the packed operator (see pack_full): per component, per block of
 * WJB whitened coordinates j0..j0+WJB-1, first their WJB offsets, then for each
 * feature i < min(j0 + WJB, D) the WJB weights U[i, j] * sqrt(1/2) (zero where j < i
 * or j >= D). out[k * N + r] = cst[k] - sum_j y_j^2 for the tile's rows. */
TILE_TARGET static inline void TILE_CAT(TILE_NAME, _full_tile)(
    const double *restrict zb, const double *restrict P, const double *restrict cst,
    Py_ssize_t K, Py_ssize_t D, double *restrict out, Py_ssize_t N) {
    const double *p = P;
    for (Py_ssize_t k = 0; k < K; k++) {
        TV s[TILE_NV];
        for (int v = 0; v < TILE_NV; v++) s[v] = TV_ZERO();
        for (Py_ssize_t j0 = 0; j0 < D; j0 += WJB) {
            Py_ssize_t imax = j0 + WJB < D ? j0 + WJB : D;
            TV y[TILE_NV][WJB];
#pragma GCC unroll 8
            for (int jj = 0; jj < WJB; jj++) {
                TV b = TV_SET1(p[jj]);
#pragma GCC unroll 8
                for (int v = 0; v < TILE_NV; v++) y[v][jj] = b;
            }
            p += WJB;
            for (Py_ssize_t i = 0; i < imax; i++) {
                TV z[TILE_NV];
#pragma GCC unroll 8
                for (int v = 0; v < TILE_NV; v++) z[v] = TV_LOADU(zb + i * TILE_T + v * TILE_VL);
#pragma GCC unroll 8
                for (int jj = 0; jj < WJB; jj++) {
                    TV w = TV_SET1(p[jj]);
#pragma GCC unroll 8
                    for (int v = 0; v < TILE_NV; v++) y[v][jj] = TV_FMA(w, z[v], y[v][jj]);
                }
                p += WJB;
            }
#pragma GCC unroll 8
            for (int jj = 0; jj < WJB; jj++)
#pragma GCC unroll 8
                for (int v = 0; v < TILE_NV; v++) s[v] = TV_FMA(y[v][jj], y[v][jj], s[v]);
        }
        TV c = TV_SET1(cst[k]);
#pragma GCC unroll 8
        for (int v = 0; v < TILE_NV; v++) TV_STOREU(out + k * N + v * TILE_VL, TV_SUB(c, s[v]));
    }
}

/* Linear types (diag, spherical). out[k * N + r] = sum_c B[k, c] * A[r, c]. */
TILE_TARGET static inline void TILE_CAT(TILE_NAME, _linear_tile)(
    const double *restrict zb, const double *restrict B, Py_ssize_t K, Py_ssize_t C,
    double *restrict out, Py_ssize_t N) {
    Py_ssize_t k = 0;
    for (; k + WKB <= K; k += WKB) {
        TV y[TILE_NV][WKB];
#pragma GCC unroll 8
        for (int kk = 0; kk < WKB; kk++)
#pragma GCC unroll 8
            for (int v = 0; v < TILE_NV; v++) y[v][kk] = TV_ZERO();
        for (Py_ssize_t c = 0; c < C; c++) {
            TV z[TILE_NV];
#pragma GCC unroll 8
            for (int v = 0; v < TILE_NV; v++) z[v] = TV_LOADU(zb + c * TILE_T + v * TILE_VL);
#pragma GCC unroll 8
            for (int kk = 0; kk < WKB; kk++) {
                TV w = TV_SET1(B[(k + kk) * C + c]);
#pragma GCC unroll 8
                for (int v = 0; v < TILE_NV; v++) y[v][kk] = TV_FMA(w, z[v], y[v][kk]);
            }
        }
#pragma GCC unroll 8
        for (int kk = 0; kk < WKB; kk++)
#pragma GCC unroll 8
            for (int v = 0; v < TILE_NV; v++) TV_STOREU(out + (k + kk) * N + v * TILE_VL, y[v][kk]);
    }
    for (; k < K; k++) {
        TV y[TILE_NV];
        for (int v = 0; v < TILE_NV; v++) y[v] = TV_ZERO();
        for (Py_ssize_t c = 0; c < C; c++) {
            TV w = TV_SET1(B[k * C + c]);
            for (int v = 0; v < TILE_NV; v++)
                y[v] = TV_FMA(w, TV_LOADU(zb + c * TILE_T + v * TILE_VL), y[v]);
        }
        for (int v = 0; v < TILE_NV; v++) TV_STOREU(out + k * N + v * TILE_VL, y[v]);
    }
}

/* c[0] x^(n-1) + ... + c[n-1], by Horner's rule. */
TILE_TARGET static inline TV TILE_CAT(TILE_NAME, _horner)(const double *c, int n, TV x) {
    TV p = TV_SET1(c[0]);
#pragma GCC unroll 16
    for (int i = 1; i < n; i++) p = TV_FMA(p, x, TV_SET1(c[i]));
    return p;
}

/* exp(x) for x in [CLAMP, 0] (all the softmax needs): x = n ln2 + r with |r| <= ln2/2,
 * exp(r) by its Taylor series to r^13 (truncation below 2e-16 relative), 2^n built in
 * the exponent bits (n >= -332: a normal number). About 1 ulp. */
TILE_TARGET static inline TV TILE_CAT(TILE_NAME, _exp)(TV x) {
    const TV magic = TV_SET1(6755399441055744.0); /* 1.5 * 2^52: rounds to an integer */
    TV t = TV_FMA(x, TV_SET1(1.4426950408889634), magic);
    TV n = TV_SUB(t, magic);
    TV r = TV_FMA(n, TV_SET1(-6.93147180369123816490e-01), x); /* ln2, high part */
    r = TV_FMA(n, TV_SET1(-1.90821492927058770002e-10), r);    /* ln2, low part */
    TV p = TILE_CAT(TILE_NAME, _horner)(EXP_SERIES, 14, r);
    return TV_MUL(p, TV_POW2(t)); /* TV_POW2: 2^n from the low bits of t */
}

/* log(x) for x >= 1 (totals of the softmax, in [1, K]): x = m 2^e with m in
 * [sqrt(1/2), sqrt(2)), log m = 2 atanh(s), s = (m - 1) / (m + 1), |s| < 0.172, by its
 * series to s^21 (truncation below 1e-18). About 1 ulp. */
TILE_TARGET static inline TV TILE_CAT(TILE_NAME, _log)(TV x) {
    TV e = TV_EXPONENT(x), m = TV_MANTISSA(x);           /* m in [1, 2) */
    TV big = TV_PICK_GT(m, TV_SET1(1.4142135623730951), TV_SET1(1.0), TV_ZERO());
    m = TV_DIV(m, TV_ADD(TV_SET1(1.0), big));              /* halved where above sqrt 2 */
    e = TV_ADD(e, big);
    TV s = TV_DIV(TV_SUB(m, TV_SET1(1.0)), TV_ADD(m, TV_SET1(1.0)));
    TV z = TV_MUL(s, s);
    TV p = TILE_CAT(TILE_NAME, _horner)(ATANH_SERIES, 10, z);
    TV half = TV_MUL(TV_MUL(s, z), p);                     /* atanh(s) - s */
    TV lo = TV_FMA(e, TV_SET1(1.90821492927058770002e-10), TV_ADD(half, half));
    return TV_ADD(TV_FMA(e, TV_SET1(6.93147180369123816490e-01), TV_ADD(s, s)), lo);
}

/* The softmax of rows lo..lo+n-1 of L (K x N) in place, in vectors of rows: the row
 * maximum and its component (first on ties), L <- exp(max(L - top, CLAMP)) / total
 * (as a product with 1 / total: one division a row), total = the sum of those
 * exponentials, confidence = 1 / total, and log_density = log(total) + top - lss. The
 * exponentials wait in `ev` (K vectors of scratch): stored into L and read back they
 * would hit L's rows 32 KiB apart, whose stores and loads alias in the L1. With `T`
 * (then `Q` too, and 2K more vectors of `ev`), each component's responsibilities and
 * their squares are summed into T[k] and Q[k] as they are made. */
TILE_TARGET static void TILE_CAT(TILE_NAME, _softmax)(
    double *restrict L, Py_ssize_t K, Py_ssize_t N, Py_ssize_t lo, Py_ssize_t n, double lss,
    int64_t *restrict best, double *restrict ld, double *restrict conf, TV *restrict ev,
    double *restrict T, double *restrict Q) {
    Py_ssize_t nv = n - n % TILE_VL;
    double lanes[TILE_VL];
    TV *restrict sum = ev + K, *restrict sq = ev + 2 * K;
    if (T)
        for (Py_ssize_t k = 0; k < K; k++) sum[k] = sq[k] = TV_ZERO();
    for (Py_ssize_t r = 0; r < nv; r += TILE_VL) {
        double *L0 = L + lo + r;
        TV top = TV_LOADU(L0), arg = TV_ZERO();
        ev[0] = top;
        for (Py_ssize_t k = 1; k < K; k++) {
            TV v = TV_LOADU(L0 + k * N);
            ev[k] = v;
            arg = TV_PICK_GT(v, top, TV_SET1((double)k), arg);
            top = TV_MAX(v, top);
        }
        TV total = TV_ZERO();
        for (Py_ssize_t k = 0; k < K; k++) {
            TV e = TILE_CAT(TILE_NAME, _exp)(TV_MAX(TV_SUB(ev[k], top), TV_SET1(CLAMP)));
            ev[k] = e;
            total = TV_ADD(total, e);
        }
        TV inv = TV_DIV(TV_SET1(1.0), total);   /* one division per row, not K */
        if (T)
            for (Py_ssize_t k = 0; k < K; k++) {
                TV p = TV_MUL(ev[k], inv);
                TV_STOREU(L0 + k * N, p);
                sum[k] = TV_ADD(sum[k], p);
                sq[k] = TV_FMA(p, p, sq[k]);
            }
        else
            for (Py_ssize_t k = 0; k < K; k++) TV_STOREU(L0 + k * N, TV_MUL(ev[k], inv));
        TV_STOREU(conf + lo + r, inv);
        TV_STOREU(ld + lo + r,
                  TV_SUB(TV_ADD(TILE_CAT(TILE_NAME, _log)(total), top), TV_SET1(lss)));
        TV_STOREU(lanes, arg);
        for (int l = 0; l < TILE_VL; l++) best[lo + r + l] = (int64_t)lanes[l];
    }
    for (Py_ssize_t r = nv; r < n; r++) {   /* the last rows one by one */
        double *L0 = L + lo + r, top = L0[0], total = 0.0;
        int64_t arg = 0;
        for (Py_ssize_t k = 1; k < K; k++)
            if (L0[k * N] > top) {
                top = L0[k * N];
                arg = k;
            }
        for (Py_ssize_t k = 0; k < K; k++) {
            double v = L0[k * N] - top;
            v = v > CLAMP ? v : CLAMP;
            double e = exp(v);
            L0[k * N] = e;
            total += e;
        }
        double inv = 1.0 / total;
        for (Py_ssize_t k = 0; k < K; k++) L0[k * N] *= inv;
        if (T)
            for (Py_ssize_t k = 0; k < K; k++) {
                T[k] += L0[k * N];
                Q[k] += L0[k * N] * L0[k * N];
            }
        conf[lo + r] = inv;
        ld[lo + r] = log(total) + top - lss;
        best[lo + r] = arg;
    }
    if (T)
        for (Py_ssize_t k = 0; k < K; k++) {
            T[k] += TV_HSUM(sum[k]);
            Q[k] += TV_HSUM(sq[k]);
        }
}

/* The full type's M-step: P[k] += sum over the rows with responsibility > 0 and >= floor
 * of resp * row_w * a a^T, a = A[row] (W = D + 1 values, the last a 1). Per component:
 * its rows are listed without branches, copied scaled by sqrt(resp * row_w) into GT
 * transposed (Wp = W rounded up to 4 rows of `cap` values; the rows past the count and
 * past W are zeros), and GT GT^T is summed in blocks of 4 x TILE_NV entries held in
 * vectors of rows (blocks on or above the diagonal only), then across the vector into
 * P's upper triangle; P is made symmetric at the end. Scratch: idx (m), sw (m), GT (Wp x cap). */
TILE_TARGET static void TILE_CAT(TILE_NAME, _gather_syrk)(
    const double *restrict A, Py_ssize_t m, Py_ssize_t W, const double *restrict R,
    Py_ssize_t N, Py_ssize_t lo, const double *restrict w, double floor, Py_ssize_t K,
    double *restrict P, int32_t *restrict idx, double *restrict sw, double *restrict GT,
    Py_ssize_t cap) {
    Py_ssize_t Wp = (W + 3) / 4 * 4;
    for (Py_ssize_t k = 0; k < K; k++) {
        const double *rk = R + k * N + lo;
        Py_ssize_t cnt = 0;
        for (Py_ssize_t r = 0; r < m; r++) {
            double v = rk[r];
            idx[cnt] = (int32_t)r;
            sw[cnt] = v * w[r];
            cnt += (v > 0.0) & (v >= floor);
        }
        if (cnt == 0) continue;
        Py_ssize_t cv = (cnt + TILE_VL - 1) / TILE_VL * TILE_VL;
        for (Py_ssize_t j = 0; j < cnt; j++) {
            double s = sqrt(sw[j]);
            const double *a = A + (Py_ssize_t)idx[j] * W;
            for (Py_ssize_t c = 0; c < W; c++) GT[c * cap + j] = s * a[c];
        }
        for (Py_ssize_t c = 0; c < Wp; c++)
            for (Py_ssize_t j = c < W ? cnt : 0; j < cv; j++) GT[c * cap + j] = 0.0;
        double *Pk = P + k * W * W;
        /* blocks of 4 x TILE_NV entries (TILE_NV divides 4: Wp covers both) */
        for (Py_ssize_t i0 = 0; i0 < Wp; i0 += 4)
            for (Py_ssize_t j0 = i0; j0 < Wp; j0 += TILE_NV) {
                TV acc[4][TILE_NV];
#pragma GCC unroll 4
                for (int ii = 0; ii < 4; ii++)
#pragma GCC unroll 4
                    for (int jj = 0; jj < TILE_NV; jj++) acc[ii][jj] = TV_ZERO();
                for (Py_ssize_t r = 0; r < cv; r += TILE_VL) {
                    TV y[TILE_NV];
#pragma GCC unroll 4
                    for (int q = 0; q < TILE_NV; q++) y[q] = TV_LOADU(GT + (j0 + q) * cap + r);
#pragma GCC unroll 4
                    for (int ii = 0; ii < 4; ii++) {
                        TV x = TV_LOADU(GT + (i0 + ii) * cap + r);
#pragma GCC unroll 4
                        for (int jj = 0; jj < TILE_NV; jj++) acc[ii][jj] = TV_FMA(x, y[jj], acc[ii][jj]);
                    }
                }
                for (int ii = 0; ii < 4 && i0 + ii < W; ii++)
                    for (int jj = 0; jj < TILE_NV && j0 + jj < W; jj++) {
                        if (j0 + jj < i0 + ii) continue;   /* the upper triangle */
                        Pk[(i0 + ii) * W + j0 + jj] += TV_HSUM(acc[ii][jj]);
                    }
            }
        for (Py_ssize_t i = 0; i < W; i++)
            for (Py_ssize_t j = 0; j < i; j++) Pk[i * W + j] = Pk[j * W + i];
    }
}

/* Rows 0..m-1 of A (m x W): L[k, lo + r] for every component, by whole tiles; the last
 * partial tile goes through `tail` (K x T). `zb` holds C x T doubles. full: C = D and
 * the operator is packed; linear: C = W and the operator is B (K x W). */
TILE_TARGET static void TILE_CAT(TILE_NAME, _log_joint)(
    int full, const double *restrict A, Py_ssize_t m, Py_ssize_t W, const double *restrict op,
    const double *restrict cst, Py_ssize_t K, Py_ssize_t D, double *restrict L, Py_ssize_t N,
    Py_ssize_t lo, double *restrict zb, double *restrict tail) {
    Py_ssize_t C = full ? D : W;
    for (Py_ssize_t t = 0; t < m; t += TILE_T) {
        Py_ssize_t n = m - t < TILE_T ? m - t : TILE_T;
        TILE_CAT(TILE_NAME, _transpose)(A + t * W, W, C, n, zb);
        double *out = n == TILE_T ? L + lo + t : tail;
        Py_ssize_t stride = n == TILE_T ? N : TILE_T;
        if (full)
            TILE_CAT(TILE_NAME, _full_tile)(zb, op, cst, K, D, out, stride);
        else
            TILE_CAT(TILE_NAME, _linear_tile)(zb, op, K, C, out, stride);
        if (n < TILE_T)
            for (Py_ssize_t k = 0; k < K; k++)
                memcpy(L + k * N + lo + t, tail + k * TILE_T, sizeof(double) * (size_t)n);
    }
}

#undef TILE_T
#undef TILE_CAT2
#undef TILE_CAT
#undef TILE_NAME
#undef TILE_TARGET
#undef TILE_VL
#undef TILE_NV
#undef TV
#undef TV_LOADU
#undef TV_STOREU
#undef TV_SET1
#undef TV_FMA
#undef TV_SUB
#undef TV_ADD
#undef TV_MUL
#undef TV_DIV
#undef TV_MAX
#undef TV_PICK_GT
#undef TV_POW2
#undef TV_HSUM
#undef TV_EXPONENT
#undef TV_MANTISSA
#undef TV_ZERO
