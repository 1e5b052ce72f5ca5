/*
 * Row-tiled log-joint kernels, included by _kernels.c once per instruction set.
 *
 * The includer defines TILE_NAME (a prefix), TILE_TARGET (a function attribute),
 * TILE_VL (doubles per vector), TILE_NV (vectors of rows per tile), and the vector
 * type and operations TV, TV_LOADU, TV_STOREU, TV_SET1, TV_FMA (a*b+c), TV_SUB, TV_ZERO;
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
#undef TV_ZERO
