/*
 * shoal.core._kernels: the compiled passes of scoring and learning (see core/fused.py).
 *
 * Each function takes numpy arrays through the buffer protocol (C-contiguous, float64
 * unless said otherwise), checks shapes, and runs with the GIL released. The loops are
 * plain C in the order written: no fast-math, so results do not depend on how the
 * compiler vectorises. On x86-64 with GCC the hot loops are also built for AVX2 and
 * picked at load time (target_clones); elsewhere they are built for the baseline.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

#if defined(__GNUC__) && !defined(__clang__) && defined(__x86_64__) && defined(__linux__)
#define HOT __attribute__((target_clones("avx2", "default")))
#else
#define HOT
#endif

#define CLAMP (-230.0) /* responsibilities below e^-230 are taken as e^-230 */

/* ------------------------------------------------------------------ buffers */
enum { F64 = 'd', F32 = 'f', I64 = 'q', BOOL = '?' };
#define MAXBUF 16

typedef struct {
    Py_buffer b[MAXBUF];
    int n;
} Bufs;

static void release(Bufs *s) {
    for (int i = 0; i < s->n; i++) PyBuffer_Release(&s->b[i]);
    s->n = 0;
}

static int kind_of(const Py_buffer *v) {
    const char *f = v->format ? v->format : "B";
    char c = f[strlen(f) - 1];
    if (v->itemsize == 8 && c == 'd') return F64;
    if (v->itemsize == 4 && c == 'f') return F32;
    if (v->itemsize == 8 && (c == 'q' || c == 'l' || c == 'n')) return I64;
    if (v->itemsize == 1 && c == '?') return BOOL;
    return 0;
}

/* Take a C-contiguous buffer of `kind` with `ndim` dimensions; shape into dims. */
static void *take(Bufs *s, PyObject *o, const char *name, int kind, int ndim, int writable,
                  Py_ssize_t *dims) {
    Py_buffer *v = &s->b[s->n];
    int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0);
    if (PyObject_GetBuffer(o, v, flags) < 0) {
        PyErr_Format(PyExc_ValueError, "%s: a C-contiguous%s array is needed", name,
                     writable ? " writable" : "");
        return NULL;
    }
    s->n++;
    if (v->ndim != ndim || kind_of(v) != kind) {
        PyErr_Format(PyExc_ValueError, "%s: expected %d dimension(s) of %s", name, ndim,
                     kind == F64   ? "float64"
                     : kind == F32 ? "float32"
                     : kind == I64 ? "int64"
                                   : "bool");
        return NULL;
    }
    for (int i = 0; i < ndim; i++) dims[i] = v->shape[i];
    return v->buf;
}

/* Take buffer `var` (C type T) from object `obj`, or jump to `fail`. */
#define TAKE(T, var, obj, name, kind, ndim, writable, dims) \
    T var = take(&s, obj, name, kind, ndim, writable, dims); \
    if (!var) goto fail

/* The end of a wrapper that returns None: buffers released on both exits. */
#define RETURN_NONE_OR_FAIL  \
    release(&s);             \
    Py_RETURN_NONE;          \
    fail:                    \
    release(&s);             \
    return NULL

/* The same, freeing the scratch memory `p` (PyMem_Malloc) on both exits. */
#define RETURN_NONE_OR_FAIL_FREEING(p) \
    PyMem_Free(p);                     \
    release(&s);                       \
    Py_RETURN_NONE;                    \
    fail:                              \
    PyMem_Free(p);                     \
    release(&s);                       \
    return NULL

#define NEED(cond, msg)                                        \
    do {                                                       \
        if (!(cond)) {                                         \
            PyErr_SetString(PyExc_ValueError, msg);            \
            goto fail;                                         \
        }                                                      \
    } while (0)

/* ------------------------------------------------------------------ scoring */
HOT static void c_full_log_joint(const double *restrict Y, const double *restrict cst, Py_ssize_t K,
                                 Py_ssize_t D, Py_ssize_t n, double *restrict L, Py_ssize_t N,
                                 Py_ssize_t lo) {
    for (Py_ssize_t k = 0; k < K; k++) {
        double *Lk = L + k * N + lo;
        double c = cst[k];
        for (Py_ssize_t i = 0; i < n; i++) Lk[i] = c;
        for (Py_ssize_t d = 0; d < D; d++) {
            const double *y = Y + (k * D + d) * n;
            for (Py_ssize_t i = 0; i < n; i++) Lk[i] -= y[i] * y[i];
        }
    }
}

static PyObject *full_log_joint(PyObject *self, PyObject *args) {
    PyObject *oY, *oc, *oL;
    Py_ssize_t D, lo, dY[2], dc[1], dL[2];
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOnOn", &oY, &oc, &D, &oL, &lo)) return NULL;
    TAKE(const double *, Y, oY, "Y", F64, 2, 0, dY);
    TAKE(const double *, c, oc, "const", F64, 1, 0, dc);
    TAKE(double *, L, oL, "L", F64, 2, 1, dL);
    NEED(dY[0] == dc[0] * D && dL[0] == dc[0], "full_log_joint: shapes disagree");
    NEED(lo >= 0 && lo + dY[1] <= dL[1], "full_log_joint: rows out of range");
    Py_BEGIN_ALLOW_THREADS
    c_full_log_joint(Y, c, dc[0], D, dY[1], L, dL[1], lo);
    Py_END_ALLOW_THREADS
    RETURN_NONE_OR_FAIL;
}

HOT static void c_shift(double *restrict L, Py_ssize_t K, Py_ssize_t N, Py_ssize_t lo, Py_ssize_t n,
                        double *restrict top, int64_t *restrict best) {
    double *L0 = L + lo;
    int64_t *b = best + lo;
    for (Py_ssize_t i = 0; i < n; i++) {
        top[i] = L0[i];
        b[i] = 0;
    }
    for (Py_ssize_t k = 1; k < K; k++) {
        const double *Lk = L + k * N + lo;
        for (Py_ssize_t i = 0; i < n; i++) {
            double v = Lk[i];
            if (v > top[i]) {
                top[i] = v;
                b[i] = k;
            }
        }
    }
    for (Py_ssize_t k = 0; k < K; k++) {
        double *Lk = L + k * N + lo;
        for (Py_ssize_t i = 0; i < n; i++) {
            double v = Lk[i] - top[i];
            Lk[i] = v > CLAMP ? v : CLAMP;
        }
    }
}

static PyObject *shift(PyObject *self, PyObject *args) {
    PyObject *oL, *ot, *ob;
    Py_ssize_t lo, n, dL[2], dt[1], db[1];
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OnnOO", &oL, &lo, &n, &ot, &ob)) return NULL;
    TAKE(double *, L, oL, "L", F64, 2, 1, dL);
    TAKE(double *, top, ot, "top", F64, 1, 1, dt);
    TAKE(int64_t *, best, ob, "best", I64, 1, 1, db);
    NEED(lo >= 0 && n >= 0 && lo + n <= dL[1] && n <= dt[0] && db[0] == dL[1],
         "shift: rows out of range");
    Py_BEGIN_ALLOW_THREADS
    c_shift(L, dL[0], dL[1], lo, n, top, best);
    Py_END_ALLOW_THREADS
    RETURN_NONE_OR_FAIL;
}

HOT static void c_normalise(double *restrict E, Py_ssize_t K, Py_ssize_t N, Py_ssize_t lo,
                            Py_ssize_t n, double *restrict total) {
    const double *E0 = E + lo;
    for (Py_ssize_t i = 0; i < n; i++) total[i] = E0[i];
    for (Py_ssize_t k = 1; k < K; k++) {
        const double *Ek = E + k * N + lo;
        for (Py_ssize_t i = 0; i < n; i++) total[i] += Ek[i];
    }
    for (Py_ssize_t k = 0; k < K; k++) {
        double *Ek = E + k * N + lo;
        for (Py_ssize_t i = 0; i < n; i++) Ek[i] /= total[i];
    }
}

static PyObject *normalise(PyObject *self, PyObject *args) {
    PyObject *oE, *ot;
    Py_ssize_t lo, n, dE[2], dt[1];
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OnnO", &oE, &lo, &n, &ot)) return NULL;
    TAKE(double *, E, oE, "E", F64, 2, 1, dE);
    TAKE(double *, total, ot, "total", F64, 1, 1, dt);
    NEED(lo >= 0 && n >= 0 && lo + n <= dE[1] && n <= dt[0], "normalise: rows out of range");
    Py_BEGIN_ALLOW_THREADS
    c_normalise(E, dE[0], dE[1], lo, n, total);
    Py_END_ALLOW_THREADS
    RETURN_NONE_OR_FAIL;
}

/* ---------------------------------------------------------------- learning */
HOT static void c_gather_rows(const double *restrict A, Py_ssize_t n, Py_ssize_t W, const double *restrict R,
                              Py_ssize_t K, Py_ssize_t N, Py_ssize_t lo, const double *restrict row_w,
                              double floor, double *restrict G, Py_ssize_t nb, int64_t *restrict counts) {
    for (Py_ssize_t k = 0; k < K; k++) {
        const double *rk = R + k * N + lo;
        double *Gk = G + k * nb * W;
        Py_ssize_t m = 0;
        for (Py_ssize_t i = 0; i < n; i++) {
            double r = rk[i];
            if (r > 0.0 && r >= floor) {
                double sw = sqrt(r * row_w[i]);
                const double *a = A + i * W;
                double *g = Gk + m * W;
                for (Py_ssize_t j = 0; j < W; j++) g[j] = sw * a[j];
                m++;
            }
        }
        counts[k] = m;
    }
}

static PyObject *gather_rows(PyObject *self, PyObject *args) {
    PyObject *oA, *oR, *ow, *oG, *oc;
    Py_ssize_t lo, dA[2], dR[2], dw[1], dG[3], dc[1];
    double floor;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOnOdOO", &oA, &oR, &lo, &ow, &floor, &oG, &oc)) return NULL;
    TAKE(const double *, A, oA, "A", F64, 2, 0, dA);
    TAKE(const double *, R, oR, "resp", F64, 2, 0, dR);
    TAKE(const double *, w, ow, "row_w", F64, 1, 0, dw);
    TAKE(double *, G, oG, "G", F64, 3, 1, dG);
    TAKE(int64_t *, counts, oc, "counts", I64, 1, 1, dc);
    NEED(lo >= 0 && lo + dA[0] <= dR[1] && dw[0] >= dA[0] && dG[0] == dR[0] &&
             dG[1] >= dA[0] && dG[2] == dA[1] && dc[0] == dR[0],
         "gather_rows: shapes disagree");
    Py_BEGIN_ALLOW_THREADS
    c_gather_rows(A, dA[0], dA[1], R, dR[0], dR[1], lo, w, floor, G, dG[1], counts);
    Py_END_ALLOW_THREADS
    RETURN_NONE_OR_FAIL;
}

HOT static void c_accumulate_rows(const double *restrict A, Py_ssize_t n, Py_ssize_t W,
                                  const double *restrict R, Py_ssize_t K, Py_ssize_t N, Py_ssize_t lo,
                                  const double *restrict row_w, double floor, double *restrict P) {
    for (Py_ssize_t k = 0; k < K; k++) {
        const double *rk = R + k * N + lo;
        double *p = P + k * W;
        for (Py_ssize_t i = 0; i < n; i++) {
            double r = rk[i];
            if (r > 0.0 && r >= floor) {
                double w = r * row_w[i];
                const double *a = A + i * W;
                for (Py_ssize_t j = 0; j < W; j++) p[j] += w * a[j];
            }
        }
    }
}

static PyObject *accumulate_rows(PyObject *self, PyObject *args) {
    PyObject *oA, *oR, *ow, *oP;
    Py_ssize_t lo, dA[2], dR[2], dw[1], dP[2];
    double floor;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOnOdO", &oA, &oR, &lo, &ow, &floor, &oP)) return NULL;
    TAKE(const double *, A, oA, "A", F64, 2, 0, dA);
    TAKE(const double *, R, oR, "resp", F64, 2, 0, dR);
    TAKE(const double *, w, ow, "row_w", F64, 1, 0, dw);
    TAKE(double *, P, oP, "P", F64, 2, 1, dP);
    NEED(lo >= 0 && lo + dA[0] <= dR[1] && dw[0] >= dA[0] && dP[0] == dR[0] && dP[1] == dA[1],
         "accumulate_rows: shapes disagree");
    Py_BEGIN_ALLOW_THREADS
    c_accumulate_rows(A, dA[0], dA[1], R, dR[0], dR[1], lo, w, floor, P);
    Py_END_ALLOW_THREADS
    RETURN_NONE_OR_FAIL;
}

/* Design rows (see design()). Standardises by multiplying with 1/scale (a division per
 * value cost ~15 ns a row at D=16). Returns whether every value of X it read was finite:
 * x * 0 is NaN exactly when x is infinite or NaN, and NaN survives the sum. */
HOT static int c_design(const double *restrict X, Py_ssize_t D, Py_ssize_t lo, Py_ssize_t n,
                        const double *restrict center, const double *restrict inv, int kind,
                        double *restrict A, Py_ssize_t W) {
    double chk = 0.0;
    for (Py_ssize_t i = 0; i < n; i++) {
        const double *x = X + (lo + i) * D;
        double *a = A + i * W;
        if (kind == 0) {
            for (Py_ssize_t d = 0; d < D; d++) {
                a[d] = (x[d] - center[d]) * inv[d];
                chk += x[d] * 0.0;
            }
            a[D] = 1.0;
        } else if (kind == 1) {
            for (Py_ssize_t d = 0; d < D; d++) {
                double z = (x[d] - center[d]) * inv[d];
                a[d] = z * z;
                a[D + d] = z;
                chk += x[d] * 0.0;
            }
            a[2 * D] = 1.0;
        } else {
            double sq = 0.0;
            for (Py_ssize_t d = 0; d < D; d++) {
                double z = (x[d] - center[d]) * inv[d];
                sq += z * z;
                a[1 + d] = z;
                chk += x[d] * 0.0;
            }
            a[0] = sq;
            a[D + 1] = 1.0;
        }
    }
    return chk == 0.0;
}

static PyObject *design(PyObject *self, PyObject *args) {
    PyObject *oX, *oc, *os, *oA;
    Py_ssize_t lo, n, dX[2], dc[1], ds[1], dA[2];
    int kind, finite = 1;
    double *inv = NULL;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OnnOOiO", &oX, &lo, &n, &oc, &os, &kind, &oA)) return NULL;
    TAKE(const double *, X, oX, "X", F64, 2, 0, dX);
    TAKE(const double *, c, oc, "center", F64, 1, 0, dc);
    TAKE(const double *, sc, os, "scale", F64, 1, 0, ds);
    TAKE(double *, A, oA, "A", F64, 2, 1, dA);
    Py_ssize_t D = dX[1];
    Py_ssize_t W = kind == 0 ? D + 1 : kind == 1 ? 2 * D + 1 : D + 2;
    NEED(kind >= 0 && kind <= 2 && dc[0] == D && ds[0] == D && dA[1] == W && n >= 0 &&
             dA[0] >= n && lo >= 0 && lo + n <= dX[0],
         "design: shapes disagree");
    inv = PyMem_Malloc(sizeof(double) * (size_t)(D > 0 ? D : 1));
    if (!inv) {
        PyErr_NoMemory();
        goto fail;
    }
    for (Py_ssize_t d = 0; d < D; d++) inv[d] = 1.0 / sc[d];
    Py_BEGIN_ALLOW_THREADS
    finite = c_design(X, D, lo, n, c, inv, kind, A, W);
    Py_END_ALLOW_THREADS
    PyMem_Free(inv);
    release(&s);
    return PyBool_FromLong(finite);
fail:
    PyMem_Free(inv);
    release(&s);
    return NULL;
}

/* ------------------------------------------------------------ rows from columns */
/* rows_from_columns(columns, out, bound, center, limit, valid): out[i, j] = columns[j][i]
 * (a sequence of D float64 arrays of n values) and valid[i] = every |x| <= bound and, with
 * center and limit (arrays of D, or None), every |x - center| <= limit; NaN fails both.
 * The rows are filled in blocks that stay in cache. */
HOT static void c_rows_from_columns(const double *const *cols, Py_ssize_t D, Py_ssize_t n,
                                    double *restrict out, double bound,
                                    const double *restrict center,
                                    const double *restrict limit, char *restrict valid) {
    const Py_ssize_t B = 512;
    for (Py_ssize_t lo = 0; lo < n; lo += B) {
        Py_ssize_t hi = lo + B < n ? lo + B : n;
        /* the checks column by column (contiguous: vectorised), then the copy row by row */
        for (Py_ssize_t i = lo; i < hi; i++) valid[i] = 1;
        for (Py_ssize_t j = 0; j < D; j++) {
            const double *restrict c = cols[j];
            double mid = center ? center[j] : 0.0, lim = center ? limit[j] : INFINITY;
            for (Py_ssize_t i = lo; i < hi; i++) {
                double v = c[i];
                valid[i] &= (char)((fabs(v) <= bound) & (fabs(v - mid) <= lim));
            }
        }
        for (Py_ssize_t i = lo; i < hi; i++) {
            double *o = out + i * D;
            for (Py_ssize_t j = 0; j < D; j++) o[j] = cols[j][i];
        }
    }
}

static PyObject *rows_from_columns(PyObject *self, PyObject *args) {
    PyObject *ocols, *oout, *ocenter, *olimit, *ovalid, *seq = NULL;
    double bound;
    Py_ssize_t dout[2], dc[1], dl[1], dv[1], D = 0;
    Py_buffer *views = NULL;
    const double **ptrs = NULL;
    Py_ssize_t taken = 0;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOdOOO", &ocols, &oout, &bound, &ocenter, &olimit, &ovalid))
        return NULL;
    TAKE(double *, out, oout, "out", F64, 2, 1, dout);
    TAKE(char *, valid, ovalid, "valid", BOOL, 1, 1, dv);
    const double *center = NULL, *limit = NULL;
    D = dout[1];
    if (ocenter != Py_None) {
        TAKE(const double *, c, ocenter, "center", F64, 1, 0, dc);
        TAKE(const double *, l, olimit, "limit", F64, 1, 0, dl);
        NEED(dc[0] == D && dl[0] == D, "rows_from_columns: center and limit need one value per column");
        center = c;
        limit = l;
    }
    NEED(dv[0] == dout[0], "rows_from_columns: valid needs one value per row");
    seq = PySequence_Fast(ocols, "rows_from_columns: columns must be a sequence");
    if (!seq) goto fail;
    NEED(PySequence_Fast_GET_SIZE(seq) == D, "rows_from_columns: one column per output column");
    views = PyMem_Calloc((size_t)(D > 0 ? D : 1), sizeof(Py_buffer));
    ptrs = PyMem_Calloc((size_t)(D > 0 ? D : 1), sizeof(double *));
    if (!views || !ptrs) {
        PyErr_NoMemory();
        goto fail;
    }
    for (; taken < D; taken++) {
        Py_buffer *v = &views[taken];
        if (PyObject_GetBuffer(PySequence_Fast_GET_ITEM(seq, taken), v,
                               PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0)
            goto fail;
        if (v->ndim != 1 || kind_of(v) != F64 || v->shape[0] != dout[0]) {
            PyBuffer_Release(v);
            PyErr_SetString(PyExc_ValueError,
                            "rows_from_columns: each column must be float64 of one value per row");
            goto fail;
        }
        ptrs[taken] = v->buf;
    }
    Py_BEGIN_ALLOW_THREADS
    c_rows_from_columns(ptrs, D, dout[0], out, bound, center, limit, valid);
    Py_END_ALLOW_THREADS
    for (Py_ssize_t j = 0; j < taken; j++) PyBuffer_Release(&views[j]);
    PyMem_Free(views);
    PyMem_Free(ptrs);
    Py_DECREF(seq);
    release(&s);
    Py_RETURN_NONE;
fail:
    for (Py_ssize_t j = 0; j < taken; j++) PyBuffer_Release(&views[j]);
    PyMem_Free(views);
    PyMem_Free(ptrs);
    Py_XDECREF(seq);
    release(&s);
    return NULL;
}

/* ------------------------------------------------------------ tiled log-joint */
/* The log-joint of a block of rows without BLAS: the GEMM it replaces has an inner
 * dimension of only D + 1 (full) or 2D + 1 (diag) and K*D or K outputs per row, shapes
 * where OpenBLAS reaches a fraction of the machine's rate, and the full type's
 * whitened block (K*D per row) then has to be read again for its sums of squares.
 * Here a tile of rows sits transposed in L1, one vector per feature, and each
 * component's whitened coordinates are formed WJB at a time in registers, squared and
 * summed there, skipping the zero half of the triangular factor. Built for AVX-512 and
 * AVX2 with FMA on x86-64 GCC or Clang and picked by the CPU at import; elsewhere (or
 * with tile_isa("none")) the caller keeps the BLAS path. The vectors hold rows, so
 * every row's result is the same sequence of operations whatever the tile width. */
#define WJB 4 /* whitened coordinates per block (the packed operator's layout) */
#define WKB 4 /* components per block of the linear kernel */

static Py_ssize_t packed_full_len(Py_ssize_t D) {
    Py_ssize_t n = 0;
    for (Py_ssize_t j0 = 0; j0 < D; j0 += WJB) n += WJB * (1 + (j0 + WJB < D ? j0 + WJB : D));
    return n;
}

/* Series of the tiled softmax's exp and log (highest power first; see _kernels_tile.h):
 * 1/k! for k = 13..0, and 1/(2k+1) for k = 10..1 (atanh(s) = s + s z/3 + s z^2/5 + ...). */
static const double EXP_SERIES[14] = {
    1.0 / 6227020800.0, 1.0 / 479001600.0, 1.0 / 39916800.0, 1.0 / 3628800.0, 1.0 / 362880.0,
    1.0 / 40320.0, 1.0 / 5040.0, 1.0 / 720.0, 1.0 / 120.0, 1.0 / 24.0, 1.0 / 6.0, 0.5, 1.0, 1.0};
static const double ATANH_SERIES[10] = {1.0 / 21.0, 1.0 / 19.0, 1.0 / 17.0, 1.0 / 15.0,
                                        1.0 / 13.0, 1.0 / 11.0, 1.0 / 9.0,  1.0 / 7.0,
                                        1.0 / 5.0,  1.0 / 3.0};

#if (defined(__GNUC__) || defined(__clang__)) && defined(__x86_64__)
#include <immintrin.h>
#define TILED 1

#define TILE_NAME t512
#define TILE_TARGET __attribute__((target("avx512f,fma")))
#define TILE_VL 8
#define TILE_NV 4
#define TV __m512d
#define TV_LOADU _mm512_loadu_pd
#define TV_STOREU _mm512_storeu_pd
#define TV_SET1 _mm512_set1_pd
#define TV_FMA _mm512_fmadd_pd
#define TV_SUB _mm512_sub_pd
#define TV_ADD _mm512_add_pd
#define TV_MUL _mm512_mul_pd
#define TV_DIV _mm512_div_pd
#define TV_MAX _mm512_max_pd
#define TV_PICK_GT(a, b, x, y) _mm512_mask_blend_pd(_mm512_cmp_pd_mask(a, b, _CMP_GT_OQ), y, x)
#define TV_EXPONENT(x) _mm512_getexp_pd(x)
#define TV_HSUM(v) _mm512_reduce_add_pd(v)
#define TV_MANTISSA(x) _mm512_getmant_pd(x, _MM_MANT_NORM_1_2, _MM_MANT_SIGN_src)
#define TV_POW2(t) \
    _mm512_castsi512_pd(_mm512_slli_epi64(_mm512_add_epi64(_mm512_castpd_si512(t), _mm512_set1_epi64(1023)), 52))
#define TV_ZERO _mm512_setzero_pd
#include "_kernels_tile.h" /* undefines the parameters above */

#define TILE_NAME t256
#define TILE_TARGET __attribute__((target("avx2,fma")))
#define TILE_VL 4
#define TILE_NV 2
#define TV __m256d
#define TV_LOADU _mm256_loadu_pd
#define TV_STOREU _mm256_storeu_pd
#define TV_SET1 _mm256_set1_pd
#define TV_FMA _mm256_fmadd_pd
#define TV_SUB _mm256_sub_pd
#define TV_ADD _mm256_add_pd
#define TV_MUL _mm256_mul_pd
#define TV_DIV _mm256_div_pd
#define TV_MAX _mm256_max_pd
#define TV_PICK_GT(a, b, x, y) _mm256_blendv_pd(y, x, _mm256_cmp_pd(a, b, _CMP_GT_OQ))
static inline __attribute__((target("avx2,fma"))) double hsum256(__m256d v) {
    __m128d s = _mm_add_pd(_mm256_castpd256_pd128(v), _mm256_extractf128_pd(v, 1));
    return _mm_cvtsd_f64(_mm_add_sd(s, _mm_unpackhi_pd(s, s)));
}
#define TV_HSUM(v) hsum256(v)
#define TV_EXPONENT(x)                                                                      \
    _mm256_sub_pd(_mm256_castsi256_pd(_mm256_or_si256(_mm256_srli_epi64(_mm256_castpd_si256(x), 52), \
                                                      _mm256_set1_epi64x(0x4330000000000000LL))), \
                  _mm256_set1_pd(4503599627371519.0)) /* 2^52 + 1023 */
#define TV_MANTISSA(x)                                                                      \
    _mm256_castsi256_pd(_mm256_or_si256(                                                    \
        _mm256_and_si256(_mm256_castpd_si256(x), _mm256_set1_epi64x(0x000FFFFFFFFFFFFFLL)), \
        _mm256_set1_epi64x(0x3FF0000000000000LL)))
#define TV_POW2(t) \
    _mm256_castsi256_pd(_mm256_slli_epi64(_mm256_add_epi64(_mm256_castpd_si256(t), _mm256_set1_epi64x(1023)), 52))
#define TV_ZERO _mm256_setzero_pd
#include "_kernels_tile.h" /* undefines the parameters above */
#endif

enum { ISA_NONE = 0, ISA_AVX2 = 1, ISA_AVX512 = 2 };
static const char *isa_names[] = {"none", "avx2", "avx512"};
static int isa_best = ISA_NONE, isa_used = ISA_NONE;

static void detect_isa(void) {
#ifdef TILED
    __builtin_cpu_init();
    if (__builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma")) isa_best = ISA_AVX2;
    if (__builtin_cpu_supports("avx512f") && __builtin_cpu_supports("fma")) isa_best = ISA_AVX512;
#endif
    isa_used = isa_best;
}

static PyObject *tile_isa(PyObject *self, PyObject *args) {
    const char *name = NULL;
    if (!PyArg_ParseTuple(args, "|s", &name)) return NULL;
    if (name) {
        int want = -1;
        for (int i = 0; i < 3; i++)
            if (strcmp(name, isa_names[i]) == 0) want = i;
        if (want < 0 || want > isa_best) {
            PyErr_Format(PyExc_ValueError, "tile_isa: %s is not available here (best: %s)", name,
                         isa_names[isa_best]);
            return NULL;
        }
        isa_used = want;
    }
    return PyUnicode_FromString(isa_names[isa_used]);
}

static PyObject *packed_len(PyObject *self, PyObject *args) {
    Py_ssize_t D;
    if (!PyArg_ParseTuple(args, "n", &D)) return NULL;
    if (D < 1) {
        PyErr_SetString(PyExc_ValueError, "packed_len: n_features must be at least 1");
        return NULL;
    }
    return PyLong_FromSsize_t(packed_full_len(D));
}

/* The full type's packed operator from its whitening operator WT (K*D x D+1). */
static PyObject *pack_full(PyObject *self, PyObject *args) {
    PyObject *ow, *op;
    Py_ssize_t dw[2], dp[1];
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OO", &ow, &op)) return NULL;
    TAKE(const double *, WT, ow, "WT", F64, 2, 0, dw);
    TAKE(double *, P, op, "P", F64, 1, 1, dp);
    Py_ssize_t D = dw[1] - 1;
    NEED(D >= 1 && dw[0] % D == 0, "pack_full: WT must be (K*D, D+1)");
    Py_ssize_t K = dw[0] / D, per = packed_full_len(D);
    NEED(dp[0] == K * per, "pack_full: P has the wrong length");
    double *p = P;
    for (Py_ssize_t k = 0; k < K; k++)
        for (Py_ssize_t j0 = 0; j0 < D; j0 += WJB) {
            Py_ssize_t imax = j0 + WJB < D ? j0 + WJB : D;
            for (Py_ssize_t i = -1; i < imax; i++)   /* i = -1: the offsets (column D) */
                for (Py_ssize_t jj = 0; jj < WJB; jj++) {
                    Py_ssize_t j = j0 + jj;
                    *p++ = j < D && i <= j ? WT[(k * D + j) * (D + 1) + (i < 0 ? D : i)] : 0.0;
                }
        }
    RETURN_NONE_OR_FAIL;
}

/* log_joint(A, op, const, n_features, L, lo): the tiled log-joint of rows A (m x W) into
 * L[:, lo:lo+m]. With const (K,) the full type (op packed by pack_full, W = D + 1); with
 * const None a linear type (op is B, K x W). */
static PyObject *log_joint(PyObject *self, PyObject *args) {
    PyObject *oA, *oop, *oc, *oL;
    Py_ssize_t D, lo, dA[2], dop[2], dc[1], dL[2];
    double *scratch = NULL;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOOnOn", &oA, &oop, &oc, &D, &oL, &lo)) return NULL;
    int full = oc != Py_None;
    TAKE(const double *, A, oA, "A", F64, 2, 0, dA);
    TAKE(double *, L, oL, "L", F64, 2, 1, dL);
    Py_ssize_t K = dL[0], m = dA[0], W = dA[1];
    const double *op, *cst = NULL;
    if (full) {
        TAKE(const double *, P, oop, "P", F64, 1, 0, dop);
        TAKE(const double *, c, oc, "const", F64, 1, 0, dc);
        NEED(W == D + 1 && dc[0] == K && dop[0] == K * packed_full_len(D),
             "log_joint: shapes disagree (full)");
        op = P;
        cst = c;
    } else {
        TAKE(const double *, B, oop, "B", F64, 2, 0, dop);
        NEED(dop[0] == K && dop[1] == W, "log_joint: shapes disagree (linear)");
        op = B;
    }
    NEED(lo >= 0 && lo + m <= dL[1], "log_joint: rows out of range");
    NEED(isa_used != ISA_NONE, "log_joint: no tiled kernel on this CPU (tile_isa is none)");
#ifdef TILED
    Py_ssize_t C = full ? D : W, T = 32; /* the widest tile */
    scratch = PyMem_Malloc(sizeof(double) * (size_t)((C + K) * T));
    if (!scratch) {
        PyErr_NoMemory();
        goto fail;
    }
    int isa = isa_used;
    Py_BEGIN_ALLOW_THREADS
    if (isa == ISA_AVX512)
        t512_log_joint(full, A, m, W, op, cst, K, D, L, dL[1], lo, scratch, scratch + C * T);
    else
        t256_log_joint(full, A, m, W, op, cst, K, D, L, dL[1], lo, scratch, scratch + C * T);
    Py_END_ALLOW_THREADS
#endif
    RETURN_NONE_OR_FAIL_FREEING(scratch);
}

/* softmax(L, lo, n, lss, best, log_density, confidence[, T, Q]): the tiled softmax of
 * rows lo..lo+n-1 (shift, normalise and the log-density in one pass; see
 * _kernels_tile.h); with T and Q (one value per component) each component's
 * responsibilities and their squares are added to them. */
static PyObject *softmax(PyObject *self, PyObject *args) {
    PyObject *oL, *ob, *old, *oc, *oT = Py_None, *oQ = Py_None;
    Py_ssize_t lo, n, dL[2], db[1], dl[1], dc[1], dT[1], dQ[1];
    double lss, *tmp = NULL, *T = NULL, *Q = NULL;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OnndOOO|OO", &oL, &lo, &n, &lss, &ob, &old, &oc, &oT, &oQ))
        return NULL;
    TAKE(double *, L, oL, "L", F64, 2, 1, dL);
    TAKE(int64_t *, best, ob, "best", I64, 1, 1, db);
    TAKE(double *, ld, old, "log_density", F64, 1, 1, dl);
    TAKE(double *, conf, oc, "confidence", F64, 1, 1, dc);
    NEED(lo >= 0 && n >= 0 && lo + n <= dL[1] && db[0] == dL[1] && dl[0] == dL[1] &&
             dc[0] == dL[1] && dL[0] >= 1,
         "softmax: rows out of range");
    NEED((oT == Py_None) == (oQ == Py_None), "softmax: give T and Q together");
    if (oT != Py_None) {
        if (!(T = take(&s, oT, "T", F64, 1, 1, dT)) || !(Q = take(&s, oQ, "Q", F64, 1, 1, dQ)))
            goto fail;
        NEED(dT[0] == dL[0] && dQ[0] == dL[0], "softmax: T and Q need one value per component");
    }
    NEED(isa_used != ISA_NONE, "softmax: no tiled kernel on this CPU (tile_isa is none)");
#ifdef TILED
    /* K vectors for the exponentials and 2K for the sums, aligned */
    tmp = PyMem_Malloc(sizeof(double) * (size_t)(24 * dL[0] + 8));
    if (!tmp) {
        PyErr_NoMemory();
        goto fail;
    }
    double *ev = tmp + (8 - ((uintptr_t)tmp / sizeof(double)) % 8) % 8;
    int isa = isa_used;
    Py_BEGIN_ALLOW_THREADS
    if (isa == ISA_AVX512)
        t512_softmax(L, dL[0], dL[1], lo, n, lss, best, ld, conf, (__m512d *)ev, T, Q);
    else
        t256_softmax(L, dL[0], dL[1], lo, n, lss, best, ld, conf, (__m256d *)ev, T, Q);
    Py_END_ALLOW_THREADS
#endif
    RETURN_NONE_OR_FAIL_FREEING(tmp);
}

/* gather_syrk(A, resp, lo, row_w, floor, P): the full type's M-step of rows A (m x W)
 * into P (K x W x W), += (tiled; see _kernels_tile.h). gather_rows and a SYRK per
 * component on the BLAS path. */
static PyObject *gather_syrk(PyObject *self, PyObject *args) {
    PyObject *oA, *oR, *ow, *oP;
    Py_ssize_t lo, dA[2], dR[2], dw[1], dP[3];
    double floor;
    void *scratch = NULL;
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOnOdO", &oA, &oR, &lo, &ow, &floor, &oP)) return NULL;
    TAKE(const double *, A, oA, "A", F64, 2, 0, dA);
    TAKE(const double *, R, oR, "resp", F64, 2, 0, dR);
    TAKE(const double *, w, ow, "row_w", F64, 1, 0, dw);
    TAKE(double *, P, oP, "P", F64, 3, 1, dP);
    Py_ssize_t m = dA[0], W = dA[1], K = dR[0];
    NEED(lo >= 0 && lo + m <= dR[1] && dw[0] >= m && dP[0] == K && dP[1] == W && dP[2] == W,
         "gather_syrk: shapes disagree");
    NEED(isa_used != ISA_NONE, "gather_syrk: no tiled kernel on this CPU (tile_isa is none)");
#ifdef TILED
    Py_ssize_t Wp = (W + 3) / 4 * 4, cap = (m + 7) / 8 * 8 + 8; /* rows of GT off 4 KiB */
    scratch = PyMem_Malloc(sizeof(int32_t) * (size_t)(m + 1) +
                           sizeof(double) * (size_t)(m + 1 + Wp * cap));
    if (!scratch) {
        PyErr_NoMemory();
        goto fail;
    }
    double *sw = scratch, *GT = sw + m + 1;
    int32_t *idx = (int32_t *)(GT + Wp * cap);
    int isa = isa_used;
    Py_BEGIN_ALLOW_THREADS
    if (isa == ISA_AVX512)
        t512_gather_syrk(A, m, W, R, dR[1], lo, w, floor, K, P, idx, sw, GT, cap);
    else
        t256_gather_syrk(A, m, W, R, dR[1], lo, w, floor, K, P, idx, sw, GT, cap);
    Py_END_ALLOW_THREADS
#endif
    RETURN_NONE_OR_FAIL_FREEING(scratch);
}

/* ---------------------------------------------------------------- refresh */
/* Weights, means and each component's shrinkage share, as Mixture._derive and
 * covariance._shrink compute them. */
static void weights_and_means(const double *s0, const double *s1, Py_ssize_t K, Py_ssize_t D,
                              double n_eff, double prior_weight, double tiny, double *weights,
                              double *means, double *share) {
    double total = 0.0;
    for (Py_ssize_t k = 0; k < K; k++) total += s0[k] + tiny;
    for (Py_ssize_t k = 0; k < K; k++) {
        double sk = s0[k] + tiny;
        weights[k] = sk / total;
        share[k] = 1.0;
        if (prior_weight > 0.0) {
            double nk = total > 0.0 ? sk / total * n_eff : 0.0;
            share[k] = nk / (nk + prior_weight);
        }
        for (Py_ssize_t d = 0; d < D; d++) means[k * D + d] = s1[k * D + d] / sk;
    }
}

/* U with U U^T = C^-1 (upper triangular, by Cholesky C = L L^T and U = L^-T) and
 * log det U for each of K (D, D) matrices; bad[k] where C_k is not positive definite. */
static void c_full_factor(const double *cov, Py_ssize_t K, Py_ssize_t D, double *prec,
                          double *log_det, uint8_t *bad, double *L, double *Li) {
    for (Py_ssize_t k = 0; k < K; k++) {
        const double *C = cov + k * D * D;
        double *U = prec + k * D * D;
        int ok = 1;
        for (Py_ssize_t i = 0; i < D * D; i++)
            if (!isfinite(C[i])) ok = 0;
        for (Py_ssize_t j = 0; ok && j < D; j++) {
            double acc = C[j * D + j];
            for (Py_ssize_t m = 0; m < j; m++) acc -= L[j * D + m] * L[j * D + m];
            if (!(acc > 0.0) || !isfinite(acc)) {
                ok = 0;
                break;
            }
            L[j * D + j] = sqrt(acc);
            for (Py_ssize_t i = j + 1; i < D; i++) {
                double a = C[i * D + j];
                for (Py_ssize_t m = 0; m < j; m++) a -= L[i * D + m] * L[j * D + m];
                L[i * D + j] = a / L[j * D + j];
            }
        }
        bad[k] = !ok;
        if (!ok) {
            for (Py_ssize_t i = 0; i < D * D; i++) U[i] = 0.0;
            log_det[k] = 0.0;
            continue;
        }
        for (Py_ssize_t j = 0; j < D; j++) {
            Li[j * D + j] = 1.0 / L[j * D + j];
            for (Py_ssize_t i = j + 1; i < D; i++) {
                double acc = 0.0;
                for (Py_ssize_t m = j; m < i; m++) acc -= L[i * D + m] * Li[m * D + j];
                Li[i * D + j] = acc / L[i * D + i];
            }
            for (Py_ssize_t i = 0; i < j; i++) Li[i * D + j] = 0.0;
        }
        double ld = 0.0;
        for (Py_ssize_t d = 0; d < D; d++) {
            ld += log(Li[d * D + d]);
            for (Py_ssize_t e = 0; e < D; e++) U[d * D + e] = Li[e * D + d];
        }
        log_det[k] = ld;
    }
}

static PyObject *full_factor(PyObject *self, PyObject *args) {
    PyObject *oc, *op, *ol, *ob;
    Py_ssize_t dc[3], dp[3], dl[1], db[1];
    Bufs s = {.n = 0};
    double *work = NULL;
    if (!PyArg_ParseTuple(args, "OOOO", &oc, &op, &ol, &ob)) return NULL;
    TAKE(const double *, cov, oc, "cov", F64, 3, 0, dc);
    TAKE(double *, prec, op, "prec_chol", F64, 3, 1, dp);
    TAKE(double *, ld, ol, "log_det", F64, 1, 1, dl);
    TAKE(uint8_t *, bad, ob, "bad", BOOL, 1, 1, db);
    NEED(dc[1] == dc[2] && dp[0] == dc[0] && dp[1] == dc[1] && dp[2] == dc[2] &&
             dl[0] == dc[0] && db[0] == dc[0],
         "full_factor: shapes disagree");
    work = PyMem_Malloc(sizeof(double) * 2 * (size_t)(dc[1] * dc[1] + 1));
    if (!work) {
        PyErr_NoMemory();
        goto fail;
    }
    c_full_factor(cov, dc[0], dc[1], prec, ld, bad, work, work + dc[1] * dc[1]);
    RETURN_NONE_OR_FAIL_FREEING(work);
}

static PyObject *full_derive(PyObject *self, PyObject *args) {
    PyObject *o0, *o1, *o2, *ow, *om, *oc, *op, *ol, *ob;
    double n_eff, reg, prior, tiny;
    Py_ssize_t d0[1], d1[2], d2[3], dw[1], dm[2], dc[3], dp[3], dl[1], db[1];
    Bufs s = {.n = 0};
    double *work = NULL;
    if (!PyArg_ParseTuple(args, "OOOddddOOOOOO", &o0, &o1, &o2, &n_eff, &reg, &prior, &tiny,
                          &ow, &om, &oc, &op, &ol, &ob))
        return NULL;
    TAKE(const double *, s0, o0, "s0", F64, 1, 0, d0);
    TAKE(const double *, s1, o1, "s1", F64, 2, 0, d1);
    TAKE(const double *, s2, o2, "s2", F64, 3, 0, d2);
    TAKE(double *, weights, ow, "weights", F64, 1, 1, dw);
    TAKE(double *, means, om, "means", F64, 2, 1, dm);
    TAKE(double *, cov, oc, "cov", F64, 3, 1, dc);
    TAKE(double *, prec, op, "prec_chol", F64, 3, 1, dp);
    TAKE(double *, ld, ol, "log_det", F64, 1, 1, dl);
    TAKE(uint8_t *, bad, ob, "bad", BOOL, 1, 1, db);
    Py_ssize_t K = d0[0], D = d1[1];
    NEED(d1[0] == K && d2[0] == K && d2[1] == D && d2[2] == D && dw[0] == K && dm[0] == K &&
             dm[1] == D && dc[0] == K && dc[1] == D && dc[2] == D && dp[0] == K &&
             dp[1] == D && dp[2] == D && dl[0] == K && db[0] == K,
         "full_derive: shapes disagree");
    work = PyMem_Malloc(sizeof(double) * (size_t)(2 * D * D + K + 1));
    if (!work) {
        PyErr_NoMemory();
        goto fail;
    }
    double *share = work + 2 * D * D;
    weights_and_means(s0, s1, K, D, n_eff, prior, tiny, weights, means, share);
    for (Py_ssize_t k = 0; k < K; k++) {
        double sk = s0[k] + tiny;
        double *C = cov + k * D * D;
        const double *S = s2 + k * D * D;
        const double *mu = means + k * D;
        for (Py_ssize_t d = 0; d < D; d++)
            for (Py_ssize_t e = 0; e < D; e++) C[d * D + e] = S[d * D + e] / sk - mu[d] * mu[e];
        for (Py_ssize_t d = 0; d < D; d++) {
            for (Py_ssize_t e = d + 1; e < D; e++) {
                double v = 0.5 * (C[d * D + e] + C[e * D + d]);
                C[d * D + e] = v;
                C[e * D + d] = v;
            }
            C[d * D + d] = 0.5 * (C[d * D + d] + C[d * D + d]);
        }
        if (prior > 0.0)
            for (Py_ssize_t d = 0; d < D; d++)
                for (Py_ssize_t e = 0; e < D; e++)
                    C[d * D + e] = share[k] * C[d * D + e] + (1.0 - share[k]) * (d == e ? 1.0 : 0.0);
        for (Py_ssize_t d = 0; d < D; d++) C[d * D + d] += reg;
    }
    c_full_factor(cov, K, D, prec, ld, bad, work, work + D * D);
    RETURN_NONE_OR_FAIL_FREEING(work);
}

static PyObject *full_operator(PyObject *self, PyObject *args) {
    PyObject *om, *op, *ol, *ow;
    Py_ssize_t dm[2], dp[3], dl[1], dw[2];
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOOO", &om, &op, &ol, &ow)) return NULL;
    TAKE(const double *, means, om, "means", F64, 2, 0, dm);
    TAKE(const double *, prec, op, "prec_chol", F64, 3, 0, dp);
    TAKE(const double *, ld, ol, "log_det", F64, 1, 0, dl);
    TAKE(double *, WT, ow, "WT", F64, 2, 1, dw);
    Py_ssize_t K = dm[0], D = dm[1];
    NEED(dp[0] == K && dp[1] == D && dp[2] == D && dw[0] == K * D && dw[1] == D + 1,
         "full_operator: shapes disagree");
    double h = sqrt(0.5);
    for (Py_ssize_t k = 0; k < K; k++) {
        const double *U = prec + k * D * D;
        for (Py_ssize_t d = 0; d < D; d++) {
            double *row = WT + (k * D + d) * (D + 1);
            double c = 0.0;
            for (Py_ssize_t e = 0; e < D; e++) {
                double u = U[e * D + d];
                row[e] = u * h;
                c += means[k * D + e] * u;
            }
            row[D] = -c * h;
        }
    }
    RETURN_NONE_OR_FAIL;
}

/* diag (var (K, D)) or spherical (var (K,)) variances from statistics; returns whether
 * every variance is positive */
static PyObject *linear_derive(PyObject *args, int spherical) {
    PyObject *o0, *o1, *o2, *ow, *om, *ov;
    double n_eff, reg, prior, tiny;
    Py_ssize_t d0[1], d1[2], d2[2], dw[1], dm[2], dv[2];
    Bufs s = {.n = 0};
    double *share = NULL;
    int nd = spherical ? 1 : 2;
    if (!PyArg_ParseTuple(args, "OOOddddOOO", &o0, &o1, &o2, &n_eff, &reg, &prior, &tiny, &ow,
                          &om, &ov))
        return NULL;
    TAKE(const double *, s0, o0, "s0", F64, 1, 0, d0);
    TAKE(const double *, s1, o1, "s1", F64, 2, 0, d1);
    TAKE(const double *, s2, o2, "s2", F64, nd, 0, d2);
    TAKE(double *, weights, ow, "weights", F64, 1, 1, dw);
    TAKE(double *, means, om, "means", F64, 2, 1, dm);
    TAKE(double *, var, ov, "var", F64, nd, 1, dv);
    Py_ssize_t K = d0[0], D = d1[1];
    NEED(d1[0] == K && d2[0] == K && (spherical || d2[1] == D) && dw[0] == K && dm[0] == K &&
             dm[1] == D && dv[0] == K && (spherical || dv[1] == D),
         "diag_derive: shapes disagree");
    share = PyMem_Malloc(sizeof(double) * (size_t)(K + 1));
    if (!share) {
        PyErr_NoMemory();
        goto fail;
    }
    weights_and_means(s0, s1, K, D, n_eff, prior, tiny, weights, means, share);
    int ok = 1;
    for (Py_ssize_t k = 0; k < K; k++) {
        double sk = s0[k] + tiny;
        const double *mu = means + k * D;
        if (spherical) {
            double msq = 0.0;
            for (Py_ssize_t d = 0; d < D; d++) msq += mu[d] * mu[d];
            double v = fmax(s2[k] / sk - msq / (double)D, 0.0);
            if (prior > 0.0) v = share[k] * v + (1.0 - share[k]);
            v += reg;
            var[k] = v;
            ok = ok && v > 0.0;
        } else {
            for (Py_ssize_t d = 0; d < D; d++) {
                double v = fmax(s2[k * D + d] / sk - mu[d] * mu[d], 0.0);
                if (prior > 0.0) v = share[k] * v + (1.0 - share[k]);
                v += reg;
                var[k * D + d] = v;
                ok = ok && v > 0.0;
            }
        }
    }
    PyMem_Free(share);
    release(&s);
    return PyBool_FromLong(ok);
fail:
    PyMem_Free(share);
    release(&s);
    return NULL;
}

static PyObject *diag_derive(PyObject *self, PyObject *args) { return linear_derive(args, 0); }
static PyObject *spherical_derive(PyObject *self, PyObject *args) {
    return linear_derive(args, 1);
}

/* the diag or spherical scoring operator from prec = 1/var and
 * log_const = log w + log det U - D/2 log 2 pi */
static PyObject *linear_operator(PyObject *args, int spherical) {
    PyObject *om, *op, *ol, *ob;
    Py_ssize_t dm[2], dp[2], dl[1], db[2];
    Bufs s = {.n = 0};
    if (!PyArg_ParseTuple(args, "OOOO", &om, &op, &ol, &ob)) return NULL;
    TAKE(const double *, means, om, "means", F64, 2, 0, dm);
    TAKE(const double *, prec, op, "prec", F64, spherical ? 1 : 2, 0, dp);
    TAKE(const double *, lc, ol, "log_const", F64, 1, 0, dl);
    TAKE(double *, BT, ob, "BT", F64, 2, 1, db);
    Py_ssize_t K = dm[0], D = dm[1];
    NEED(dp[0] == K && (spherical || dp[1] == D) && dl[0] == K && db[0] == K &&
             db[1] == (spherical ? D + 2 : 2 * D + 1),
         "diag_operator: shapes disagree");
    for (Py_ssize_t k = 0; k < K; k++) {
        const double *mu = means + k * D;
        double *row = BT + k * db[1];
        double c = 0.0;
        if (spherical) {
            double p = prec[k], msq = 0.0;
            row[0] = -0.5 * p;
            for (Py_ssize_t d = 0; d < D; d++) {
                row[1 + d] = mu[d] * p;
                msq += mu[d] * mu[d];
            }
            c = msq * p;
        } else {
            for (Py_ssize_t d = 0; d < D; d++) {
                double p = prec[k * D + d];
                row[d] = -0.5 * p;
                row[D + d] = mu[d] * p;
                c += mu[d] * mu[d] * p;
            }
        }
        row[db[1] - 1] = lc[k] - 0.5 * c;
    }
    RETURN_NONE_OR_FAIL;
}

static PyObject *diag_operator(PyObject *self, PyObject *args) {
    return linear_operator(args, 0);
}
static PyObject *spherical_operator(PyObject *self, PyObject *args) {
    return linear_operator(args, 1);
}

#include "_kernels_gaps.h"
#include "_kernels_watch.h"

/* ------------------------------------------------------------------ module */
static PyMethodDef methods[] = {
    {"full_log_joint", full_log_joint, METH_VARARGS,
     "full_log_joint(Y, const, n_features, L, lo): L[k, lo+i] = const[k] - "
     "sum_d Y[k*D+d, i]^2"},
    {"shift", shift, METH_VARARGS,
     "shift(L, lo, n, top, best): row maxima and argmax (first on ties), then "
     "L <- max(L - top, -230)"},
    {"normalise", normalise, METH_VARARGS,
     "normalise(E, lo, n, total): column sums in component order, then E /= total"},
    {"gather_rows", gather_rows, METH_VARARGS,
     "gather_rows(A, resp, lo, row_w, floor, G, counts): per component, rows with "
     "responsibility > 0 and >= floor, scaled by sqrt(resp * row_w)"},
    {"accumulate_rows", accumulate_rows, METH_VARARGS,
     "accumulate_rows(A, resp, lo, row_w, floor, P): P[k] += resp * row_w * A[i] for the "
     "rows whose responsibility is positive and at least floor"},
    {"design", design, METH_VARARGS,
     "design(X, lo, n, center, scale, kind, A): standardised design rows "
     "(kind 0 full [z,1], 1 diag [z*z,z,1], 2 spherical [|z|^2,z,1]); returns whether "
     "every value of X read was finite"},
    {"full_derive", full_derive, METH_VARARGS,
     "full_derive(s0, s1, s2, n_eff, reg_covar, prior_weight, tiny, weights, means, cov, "
     "prec_chol, log_det, bad)"},
    {"full_factor", full_factor, METH_VARARGS,
     "full_factor(cov, prec_chol, log_det, bad): U with U U^T = cov^-1 and log det U"},
    {"full_operator", full_operator, METH_VARARGS,
     "full_operator(means, prec_chol, log_det, WT): the full type's whitening operator"},
    {"diag_derive", diag_derive, METH_VARARGS,
     "diag_derive(s0, s1, s2, n_eff, reg_covar, prior_weight, tiny, weights, means, var)"},
    {"spherical_derive", spherical_derive, METH_VARARGS,
     "spherical_derive(s0, s1, s2, n_eff, reg_covar, prior_weight, tiny, weights, means, "
     "var)"},
    {"rows_from_columns", rows_from_columns, METH_VARARGS,
     "rows_from_columns(columns, out, bound, center, limit, valid): the columns as rows, "
     "valid where every value is within bound (and within limit of center)"},
    {"tile_isa", tile_isa, METH_VARARGS,
     "tile_isa([name]): the instruction set of the tiled log-joint ('avx512', 'avx2' or "
     "'none' for the BLAS path); with a name, use that one (at most the CPU's best)"},
    {"packed_len", packed_len, METH_VARARGS,
     "packed_len(n_features): doubles per component of pack_full's operator"},
    {"pack_full", pack_full, METH_VARARGS,
     "pack_full(WT, P): the full type's operator packed for log_joint"},
    {"log_joint", log_joint, METH_VARARGS,
     "log_joint(A, op, const, n_features, L, lo): tiled log-joint of rows A into "
     "L[:, lo:lo+len(A)] (full: op packed, const (K,); linear: op (K, W), const None)"},
    {"softmax", softmax, METH_VARARGS,
     "softmax(L, lo, n, lss, best, log_density, confidence[, T, Q]): responsibilities, "
     "component, log-density and confidence of rows lo..lo+n-1 from their log-joint "
     "(tiled); with T and Q, each component's responsibilities and their squares added"},
    {"gather_syrk", gather_syrk, METH_VARARGS,
     "gather_syrk(A, resp, lo, row_w, floor, P): P[k] += the sum of resp * row_w * a a^T "
     "over the rows with responsibility > 0 and >= floor (tiled)"},
    {"diag_operator", diag_operator, METH_VARARGS, "diag_operator(means, prec, log_const, BT)"},
    {"spherical_operator", spherical_operator, METH_VARARGS,
     "spherical_operator(means, prec, log_const, BT)"},
    {"gap_index", gap_index, METH_VARARGS,
     "gap_index(X, rows, off, cols) -> count: the rows with a NaN and their NaN's features; "
     "-1 if a value is infinite"},
    {"gap_fix", gap_fix, METH_VARARGS,
     "gap_fix(A, lo, rows, off, cols, ga, gb, kind): design rows with missing values as if "
     "those were at the centre"},
    {"gap_log_joint", gap_log_joint, METH_VARARGS,
     "gap_log_joint(A, lo, L, rows, off, cols, hoff, ga, gb, lam, lam_mu, half_const, "
     "log_scale, kind, step, hinv): the log-joint of rows with missing features (designed filled at zero) "
     "corrected to the observed marginal; keeps the E-step's steps and conditional "
     "covariances; False if a precision block is not positive definite"},
    {"gap_moments", gap_moments, METH_VARARGS,
     "gap_moments(A, lo, R, row_w, floor, rows, off, cols, hoff, ga, gb, step, hinv, kind, P): "
     "the M-step corrections of rows with missing features to the design products P"},
    {"piece_tallies", piece_tallies, METH_VARARGS,
     "piece_tallies(log_density, component, X, center, unusual_below, near_below, first, "
     "stride, unusual_sum, unusual_by, sampled, near) -> (ld_sum, ld2_sum, unusual, near): "
     "what the segment watch keeps of a learned piece, in one pass"},
    {"window_shapes", window_shapes, METH_VARARGS,
     "window_shapes(S, M, B, centers, seen, kind, ref_means, ref_inv_chol, means, covs, shift, "
     "log_det, ok): drift windows' means, covariances, mean shifts and log-determinants"},
    {"pairs_apart", pairs_apart, METH_VARARGS,
     "pairs_apart(means, cov, kind, reach) -> bool: every pair's squared mean gap at least "
     "reach times the sum of their covariances' traces"},
    {NULL, NULL, 0, NULL}};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_kernels",
                                    "shoal's compiled scoring and learning passes (see "
                                    "shoal.core.fused)",
                                    -1, methods};

PyMODINIT_FUNC PyInit__kernels(void) {
    detect_isa();
    return PyModule_Create(&module);
}
