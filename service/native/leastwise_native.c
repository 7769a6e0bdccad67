/* _leastwise_native: the extended-precision Gram sums of leastwise.engine.gram, compiled.
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

static PyMethodDef methods[] = {
    {"gram_sums", gram_sums, METH_VARARGS, "gram_sums(rows, out, start): out = (out if start else 0) + rows^T rows in long double, row by row."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_leastwise_native", NULL, -1, methods};

PyMODINIT_FUNC PyInit__leastwise_native(void) { return PyModule_Create(&module); }
