/* _leastwise_native: compiled kernels of leastwise.engine.gram (the same bits as its numpy path):
 * gram_sums (the extended-precision Gram sums), split_gram (the double-double split of the
 * folded Gram matrix) and refine_residual (the residual of one refinement step).
 *
 * gram_sums(rows, out, start) computes, for float64 rows r (k x m, C order) into a
 * long double m x m array (C order),
 *
 *     out[i, j] = s_ij + sum_{t=1..k} r_ti * r_tj      (s_ij = out[i, j] if start, else 0)
 *
 * each entry one sequential long double sum over the rows in row order, every product
 * rounded once to long double before it is added: exactly what numpy's long double
 * matmul (which has no BLAS) and gram.accumulate_rows compute, so the results are the
 * same bits (tests/engine/test_native.py and test_solution_fast.py compare them). The
 * upper triangle is summed four entries at a time (their running sums stay in
 * registers; the order within each entry is unchanged) and mirrored. Built without
 * floating-point contraction (setup.py: -ffp-contract=off), so no fused multiply-add.
 * The interpreter lock is kept: the calls are short, and handing the lock to another
 * thread and winning it back costs more than they take.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <string.h>

static int get(PyObject *obj, Py_buffer *view, const char *fmt, int writable, int ndim) {
    int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0);
    if (PyObject_GetBuffer(obj, view, flags) < 0) return -1;
    if (view->ndim != ndim || strcmp(view->format, fmt) != 0) {
        PyErr_Format(PyExc_TypeError, "expected a C-contiguous %d-d array of format '%s'", ndim, fmt);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

/* gram_sums(rows, out, start): see the top of this file. */
static PyObject *gram_sums(PyObject *self, PyObject *args) {
    PyObject *rows_obj, *out_obj;
    int start;
    Py_buffer rows, out;
    if (!PyArg_ParseTuple(args, "OOp", &rows_obj, &out_obj, &start)) return NULL;
    if (get(rows_obj, &rows, "d", 0, 2) < 0) return NULL;
    if (get(out_obj, &out, "g", 1, 2) < 0) { PyBuffer_Release(&rows); return NULL; }
    Py_ssize_t k = rows.shape[0], m = rows.shape[1];
    if (out.shape[0] != m || out.shape[1] != m) {
        PyBuffer_Release(&rows); PyBuffer_Release(&out);
        PyErr_SetString(PyExc_ValueError, "out must be m x m for rows of m columns");
        return NULL;
    }
    const double *x = (const double *)rows.buf;
    long double *g = (long double *)out.buf;
    for (Py_ssize_t i = 0; i < m; i++) {
        long double *gi = g + i * m;
        Py_ssize_t j = i;
        /* four entries of row i at a time, their running sums held in registers */
        for (; j + 4 <= m; j += 4) {
            long double a0 = 0.0L, a1 = 0.0L, a2 = 0.0L, a3 = 0.0L;
            if (start) { a0 = gi[j]; a1 = gi[j + 1]; a2 = gi[j + 2]; a3 = gi[j + 3]; }
            for (Py_ssize_t r = 0; r < k; r++) {
                const double *xr = x + r * m;
                long double xi = (long double)xr[i];
                a0 = a0 + xi * (long double)xr[j];
                a1 = a1 + xi * (long double)xr[j + 1];
                a2 = a2 + xi * (long double)xr[j + 2];
                a3 = a3 + xi * (long double)xr[j + 3];
            }
            gi[j] = a0; gi[j + 1] = a1; gi[j + 2] = a2; gi[j + 3] = a3;
        }
        for (; j < m; j++) {
            long double a = start ? gi[j] : 0.0L;
            for (Py_ssize_t r = 0; r < k; r++) a = a + (long double)x[r * m + i] * (long double)x[r * m + j];
            gi[j] = a;
        }
        for (Py_ssize_t jj = i + 1; jj < m; jj++) g[jj * m + i] = gi[jj];
    }
    PyBuffer_Release(&rows);
    PyBuffer_Release(&out);
    Py_RETURN_NONE;
}


/* The exactly rounded sum of n finite doubles whose partial sums cannot overflow: CPython's
 * math.fsum (Shewchuk's non-overlapping partials, then round-half-even of the top ones), so
 * the same double. Zero terms are dropped and an all-zero sum is +0.0, as there. */
static double exact_sum(const double *terms, Py_ssize_t n, double *partials) {
    Py_ssize_t used = 0;
    for (Py_ssize_t t = 0; t < n; t++) {
        double x = terms[t];
        Py_ssize_t i = 0;
        for (Py_ssize_t j = 0; j < used; j++) {
            double y = partials[j];
            if (fabs(x) < fabs(y)) { double tmp = x; x = y; y = tmp; }
            double hi = x + y;
            double lo = y - (hi - x);
            if (lo != 0.0) partials[i++] = lo;
            x = hi;
        }
        used = i;
        if (x != 0.0) partials[used++] = x;
    }
    double hi = 0.0;
    if (used > 0) {
        Py_ssize_t k = used - 1;
        hi = partials[k];
        double lo = 0.0;
        while (k > 0) {
            double x = hi;
            double y = partials[--k];
            hi = x + y;
            double yr = hi - x;
            lo = y - yr;
            if (lo != 0.0) break;
        }
        if (k > 0 && ((lo < 0.0 && partials[k - 1] < 0.0) || (lo > 0.0 && partials[k - 1] > 0.0))) {
            double y = lo * 2.0;
            double x = hi + y;
            double yr = x - hi;
            if (y == yr) hi = x;
        }
    }
    return hi;
}

#define SPLITTER 134217729.0  /* Dekker's 2^27 + 1 */
#define REFINE_MAX_DIM 64      /* refine_residual's scratch arrays are on the stack */

/* split_gram(folded, pairs, a3t, neg_b): gram.split_gram's arrays from the folded m x m long
 * double Gram matrix (d = m - 1): pairs[0] = double(G), pairs[1] = double(G - pairs[0]);
 * a3t = [A_hi^T, hh, hl] with Dekker's halves hh + hl = A_hi^T; neg_b = [-b_hi, -b_lo]. */
static PyObject *split_gram(PyObject *self, PyObject *args) {
    PyObject *o[4];
    Py_buffer g, pairs, a3t, nb;
    if (!PyArg_ParseTuple(args, "OOOO", &o[0], &o[1], &o[2], &o[3])) return NULL;
    if (get(o[0], &g, "g", 0, 2) < 0) return NULL;
    if (get(o[1], &pairs, "d", 1, 3) < 0) { PyBuffer_Release(&g); return NULL; }
    if (get(o[2], &a3t, "d", 1, 3) < 0) { PyBuffer_Release(&g); PyBuffer_Release(&pairs); return NULL; }
    if (get(o[3], &nb, "d", 1, 2) < 0) {
        PyBuffer_Release(&g); PyBuffer_Release(&pairs); PyBuffer_Release(&a3t); return NULL;
    }
    Py_ssize_t m = g.shape[0], d = m - 1;
    int ok = g.shape[1] == m && m >= 2 && pairs.shape[0] == 2 && pairs.shape[1] == m && pairs.shape[2] == m
             && a3t.shape[0] == 3 && a3t.shape[1] == d && a3t.shape[2] == d && nb.shape[0] == 2 && nb.shape[1] == d;
    if (ok) {
        const long double *G = (const long double *)g.buf;
        double *hi = (double *)pairs.buf, *lo = hi + m * m;
        double *t0 = (double *)a3t.buf, *t1 = t0 + d * d, *t2 = t1 + d * d;
        double *nbh = (double *)nb.buf, *nbl = nbh + d;
        for (Py_ssize_t i = 0; i < m * m; i++) {
            double h = (double)G[i];
            hi[i] = h;
            lo[i] = (double)(G[i] - (long double)h);
        }
        for (Py_ssize_t r = 0; r < d; r++)
            for (Py_ssize_t c = 0; c < d; c++) {
                double a = hi[c * m + r];  /* A_hi^T[r, c] */
                double cc = SPLITTER * a;
                double h = cc - (cc - a);
                t0[r * d + c] = a;
                t1[r * d + c] = h;
                t2[r * d + c] = a - h;
            }
        for (Py_ssize_t i = 0; i < d; i++) { nbh[i] = -hi[i * m + d]; nbl[i] = -lo[i * m + d]; }
    }
    PyBuffer_Release(&g); PyBuffer_Release(&pairs); PyBuffer_Release(&a3t); PyBuffer_Release(&nb);
    if (!ok) { PyErr_SetString(PyExc_ValueError, "shapes: folded m x m, pairs 2 x m x m, a3t 3 x d x d, neg_b 2 x d"); return NULL; }
    Py_RETURN_NONE;
}

/* refine_residual(a3t, neg_b, cross, w0, out): the negated residual of gram._refine_once,
 * out[i] = fsum(-b_hi[i], -b_lo[i], cross[i], p[0..d-1, i], e[0..d-1, i]) with Dekker's
 * two-product p + e = a_hi w0 (e in that function's order); cross = A_lo w0 (from numpy). */
static PyObject *refine_residual(PyObject *self, PyObject *args) {
    PyObject *o[5];
    Py_buffer a3t, nb, cross, w, out;
    if (!PyArg_ParseTuple(args, "OOOOO", &o[0], &o[1], &o[2], &o[3], &o[4])) return NULL;
    if (get(o[0], &a3t, "d", 0, 3) < 0) return NULL;
    if (get(o[1], &nb, "d", 0, 2) < 0) { PyBuffer_Release(&a3t); return NULL; }
    if (get(o[2], &cross, "d", 0, 1) < 0) { PyBuffer_Release(&a3t); PyBuffer_Release(&nb); return NULL; }
    if (get(o[3], &w, "d", 0, 1) < 0) {
        PyBuffer_Release(&a3t); PyBuffer_Release(&nb); PyBuffer_Release(&cross); return NULL;
    }
    if (get(o[4], &out, "d", 1, 1) < 0) {
        PyBuffer_Release(&a3t); PyBuffer_Release(&nb); PyBuffer_Release(&cross); PyBuffer_Release(&w); return NULL;
    }
    Py_ssize_t d = w.shape[0];
    int ok = d >= 1 && d <= REFINE_MAX_DIM && a3t.shape[0] == 3 && a3t.shape[1] == d && a3t.shape[2] == d
             && nb.shape[0] == 2 && nb.shape[1] == d && cross.shape[0] == d && out.shape[0] == d;
    if (ok) {
        const double *t0 = (const double *)a3t.buf, *t1 = t0 + d * d, *t2 = t1 + d * d;
        const double *nbh = (const double *)nb.buf, *nbl = nbh + d;
        const double *cr = (const double *)cross.buf, *w0 = (const double *)w.buf;
        double *res = (double *)out.buf;
        double hh[REFINE_MAX_DIM], hl[REFINE_MAX_DIM], terms[3 + 2 * REFINE_MAX_DIM], partials[3 + 2 * REFINE_MAX_DIM];
        for (Py_ssize_t k = 0; k < d; k++) {
            double c = SPLITTER * w0[k];
            hh[k] = c - (c - w0[k]);
            hl[k] = w0[k] - hh[k];
        }
        for (Py_ssize_t i = 0; i < d; i++) {
            terms[0] = nbh[i]; terms[1] = nbl[i]; terms[2] = cr[i];
            for (Py_ssize_t k = 0; k < d; k++) {
                Py_ssize_t at = k * d + i;
                double p = t0[at] * w0[k];
                double e = t1[at] * hh[k] - p;
                e = e + t1[at] * hl[k];
                e = e + t2[at] * hh[k];
                e = e + t2[at] * hl[k];
                terms[3 + k] = p;
                terms[3 + d + k] = e;
            }
            res[i] = exact_sum(terms, 3 + 2 * d, partials);
        }
    }
    PyBuffer_Release(&a3t); PyBuffer_Release(&nb); PyBuffer_Release(&cross); PyBuffer_Release(&w); PyBuffer_Release(&out);
    if (!ok) { PyErr_SetString(PyExc_ValueError, "shapes: a3t 3 x d x d, neg_b 2 x d, cross, w0 and out d (d <= 64)"); return NULL; }
    Py_RETURN_NONE;
}

static PyMethodDef methods[] = {
    {"gram_sums", gram_sums, METH_VARARGS, "gram_sums(rows, out, start): out = (out if start else 0) + rows^T rows in long double, row by row."},
    {"split_gram", split_gram, METH_VARARGS, "split_gram(folded, pairs, a3t, neg_b): gram.split_gram's arrays, in place."},
    {"refine_residual", refine_residual, METH_VARARGS, "refine_residual(a3t, neg_b, cross, w0, out): the negated residual of one refinement step."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_leastwise_native", NULL, -1, methods};

PyMODINIT_FUNC PyInit__leastwise_native(void) {
    PyObject *m = PyModule_Create(&module);
    if (m != NULL && PyModule_AddIntConstant(m, "REFINE_MAX_DIM", REFINE_MAX_DIM) < 0) {
        Py_DECREF(m);
        return NULL;
    }
    return m;
}
