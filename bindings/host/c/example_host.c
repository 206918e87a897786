/*
 * example_host.c -- a C host that assembles P1 matrices through galerkit's C entry points.
 *
 * It starts an embedded Python, imports galerkit.bindings.host.cfuncs, reads the
 * function addresses from cfuncs.addresses(), builds a structured triangle
 * mesh of the unit square in C, assembles on its own arrays through the
 * function pointers and checks the results against exact values.  Prints one
 * line per check and PASS or FAIL; exit status 0 only when every check passes.
 *
 * Build (flags of the Python that has galerkit installed):
 *   cc -std=c99 -O2 -I bindings/host/c $(python3-config --embed --cflags) \
 *      bindings/host/c/example_host.c $(python3-config --embed --ldflags) -o example_host
 * Run:
 *   GALERKIT_SITE_DIRS=<site-packages of that Python, os.pathsep-separated> ./example_host
 *   (PYTHONHOME=<its base prefix> if the interpreter does not find its standard library)
 *
 * GALERKIT_SITE_DIRS is read here: each directory is added with
 * site.addsitedir(), which also runs its .pth files (a virtual environment's
 * site-packages with an editable install needs that).
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>

#include "galerkit.h"

static int failures = 0;

static void check(int ok, const char *what, double got, double want)
{
    printf("%s  %-58s got % .15e  want % .15e\n", ok ? "ok  " : "FAIL", what, got, want);
    if (!ok)
        failures++;
}

static int close_to(double got, double want, double tol)
{
    return fabs(got - want) <= tol * (1.0 + fabs(want));
}

/* --- the embedded interpreter --------------------------------------------- */
static int load_api(struct galerkit_api *api, int32_t *n_threads)
{
    const char *setup =
        "import os, site\n"
        "for d in os.environ.get('GALERKIT_SITE_DIRS', '').split(os.pathsep):\n"
        "    if d:\n"
        "        site.addsitedir(d)\n";
    if (PyRun_SimpleString(setup) != 0)
        return -1;
    PyObject *module = PyImport_ImportModule("galerkit.bindings.host.cfuncs");
    if (module == NULL) {
        PyErr_Print();
        fprintf(stderr, "cannot import galerkit.bindings.host.cfuncs: set GALERKIT_SITE_DIRS to the "
                        "site-packages where galerkit is installed\n");
        return -1;
    }
    PyObject *table = PyObject_CallMethod(module, "addresses", NULL);
    PyObject *threads = PyObject_CallMethod(module, "num_threads", NULL);
    if (table == NULL || threads == NULL || !PyDict_Check(table)) {
        PyErr_Print();
        Py_XDECREF(table);
        Py_XDECREF(threads);
        Py_DECREF(module);
        return -1;
    }
    *n_threads = (int32_t)PyLong_AsLong(threads);
    int missing = 0;
#define GALERKIT_GET(name)                                                          \
    {                                                                               \
        PyObject *address = PyDict_GetItemString(table, "galerkit_" #name);        \
        if (address == NULL) {                                                      \
            fprintf(stderr, "addresses() has no entry galerkit_" #name "\n");       \
            missing++;                                                              \
        } else {                                                                    \
            api->name = (galerkit_##name##_fn)(uintptr_t)PyLong_AsUnsignedLongLong(address); \
        }                                                                           \
    }
    GALERKIT_ENTRY_POINTS(GALERKIT_GET)
#undef GALERKIT_GET
    Py_DECREF(table);
    Py_DECREF(threads);
    Py_DECREF(module);
    return (missing || PyErr_Occurred()) ? -1 : 0;
}

/* --- a structured mesh of the unit square, built by the host --------------- */
/* (n+1)^2 vertices, 2 n^2 right triangles; square (i, j) is split along its
   diagonal from (i, j) to (i+1, j+1). */
static void unit_square(int32_t n, double *points, int32_t *cells)
{
    double h = 1.0 / n;
    for (int32_t j = 0; j <= n; j++)
        for (int32_t i = 0; i <= n; i++) {
            points[2 * (j * (n + 1) + i)] = i * h;
            points[2 * (j * (n + 1) + i) + 1] = j * h;
        }
    int32_t c = 0;
    for (int32_t j = 0; j < n; j++)
        for (int32_t i = 0; i < n; i++) {
            int32_t v00 = j * (n + 1) + i, v10 = v00 + 1, v01 = v00 + n + 1, v11 = v01 + 1;
            int32_t *t = cells + 3 * c;
            t[0] = v00; t[1] = v10; t[2] = v11;
            t[3] = v00; t[4] = v11; t[5] = v01;
            c += 2;
        }
}

/* value of entry (row, col), NaN when it is not in the pattern */
static double entry(const int32_t *indptr, const int32_t *indices, const double *data,
                    int32_t row, int32_t col)
{
    for (int32_t j = indptr[row]; j < indptr[row + 1]; j++)
        if (indices[j] == col)
            return data[j];
    return NAN;
}

static int run_checks(const struct galerkit_api *g, int32_t n, int32_t n_chunks)
{
    const int32_t dim = 2, degree = 1, n_local = 3;
    const int32_t nv = (n + 1) * (n + 1), m = 2 * n * n;
    const double h = 1.0 / n, area = 0.5 * h * h;
    char what[128];

    /* the host's arrays: allocated and freed here (galerkit keeps no pointer) */
    double *points = malloc(sizeof(double) * 2 * nv);
    int32_t *cells = malloc(sizeof(int32_t) * 3 * m);
    int32_t *indptr = malloc(sizeof(int32_t) * (nv + 1));
    unit_square(n, points, cells);

    int64_t nnz = g->pattern_count(nv, m, n_local, cells, n_chunks, indptr);
    snprintf(what, sizeof what, "[n=%d] pattern_count: nnz > 0 and nnz = indptr[n_vertices]", n);
    check(nnz > 0 && nnz == indptr[nv], what, (double)nnz, (double)indptr[nv]);
    if (nnz <= 0) {
        free(points); free(cells); free(indptr);
        return -1;
    }
    int32_t *indices = malloc(sizeof(int32_t) * nnz);
    int32_t *order = malloc(sizeof(int32_t) * m);
    uint16_t *posmap = malloc(sizeof(uint16_t) * m * n_local * n_local);
    int64_t *chunks = malloc(sizeof(int64_t) * GALERKIT_CHUNK_PLAN_LENGTH(n_chunks));
    double *K = malloc(sizeof(double) * nnz), *M = malloc(sizeof(double) * nnz);
    double *b = malloc(sizeof(double) * nv), *u = malloc(sizeof(double) * nv);
    double *zero = calloc(nv, sizeof(double));
    double one = 1.0, result = -1.0;

    int32_t st = g->pattern_fill(nv, m, n_local, cells, n_chunks, indptr, indices, order, posmap,
                                 chunks);
    snprintf(what, sizeof what, "[n=%d] pattern_fill status", n);
    check(st == GALERKIT_OK, what, st, GALERKIT_OK);

    st = g->stiffness(dim, degree, nv, points, m, cells, nv, cells, 1, &one, indptr, indices,
                      order, posmap, n_chunks, chunks, K);
    snprintf(what, sizeof what, "[n=%d] stiffness status", n);
    check(st == GALERKIT_OK, what, st, GALERKIT_OK);
    st = g->mass(dim, degree, nv, points, m, cells, nv, cells, 1, &one, indptr, indices, order,
                 posmap, n_chunks, chunks, M);
    snprintf(what, sizeof what, "[n=%d] mass status", n);
    check(st == GALERKIT_OK, what, st, GALERKIT_OK);

    /* stiffness rows sum to zero: constants are in the kernel (any FEM text) */
    double worst = 0.0, total = 0.0, asym = 0.0;
    for (int32_t i = 0; i < nv; i++) {
        double s = 0.0;
        for (int32_t j = indptr[i]; j < indptr[i + 1]; j++) {
            s += K[j];
            total += M[j];
            double t = entry(indptr, indices, K, indices[j], i);
            if (fabs(t - K[j]) > asym)
                asym = fabs(t - K[j]);
        }
        if (fabs(s) > worst)
            worst = fabs(s);
    }
    snprintf(what, sizeof what, "[n=%d] max |stiffness row sum| (exact 0)", n);
    check(worst <= 1e-13, what, worst, 0.0);
    snprintf(what, sizeof what, "[n=%d] max |K_ij - K_ji| (exact 0)", n);
    check(asym <= 1e-15, what, asym, 0.0);
    snprintf(what, sizeof what, "[n=%d] sum of mass entries = area of the square", n);
    check(close_to(total, 1.0, 1e-14), what, total, 1.0);

    /* element matrices of a right triangle with legs h (closed form, e.g. Hughes 2000):
       stiffness of the right-angle vertex 1, of the others 1/2; mass A/6 on the diagonal,
       A/12 off it.  Assembled on this mesh that is the 5-point stencil: an interior vertex
       has K_ii = 4, K = -1 to its four axis neighbours and 0 along the split diagonal,
       and M_ii = 6 A / 6 = h^2 / 2. */
    if (n >= 2) {
        int32_t i = (n / 2) * (n + 1) + n / 2;
        double v;
        v = entry(indptr, indices, K, i, i);
        snprintf(what, sizeof what, "[n=%d] interior K_ii (5-point stencil)", n);
        check(close_to(v, 4.0, 1e-14), what, v, 4.0);
        v = entry(indptr, indices, K, i, i + 1);
        snprintf(what, sizeof what, "[n=%d] interior K_i,i+1", n);
        check(close_to(v, -1.0, 1e-14), what, v, -1.0);
        v = entry(indptr, indices, K, i, i + n + 1);
        snprintf(what, sizeof what, "[n=%d] interior K_i,i+n+1", n);
        check(close_to(v, -1.0, 1e-14), what, v, -1.0);
        v = entry(indptr, indices, K, i, i + n + 2);
        snprintf(what, sizeof what, "[n=%d] interior K along the split diagonal", n);
        check(fabs(v) <= 1e-14, what, v, 0.0);
        v = entry(indptr, indices, M, i, i);
        snprintf(what, sizeof what, "[n=%d] interior M_ii = h^2 / 2", n);
        check(close_to(v, 0.5 * h * h, 1e-14), what, v, 0.5 * h * h);
        v = entry(indptr, indices, M, i, i + 1);
        snprintf(what, sizeof what, "[n=%d] interior M_i,i+1 = 2 A / 12", n);
        check(close_to(v, area / 6.0, 1e-14), what, v, area / 6.0);
    } else {
        /* two triangles: vertex 0 has a 45 degree angle in both, each giving 1/2
           (cotangent form of the same element matrix): K_00 = 1; edge 0-1 lies in
           triangle 0 only, opposite a 45 degree angle: K_01 = -cot(45)/2 = -1/2 */
        double v = entry(indptr, indices, K, 0, 0);
        check(close_to(v, 1.0, 1e-14), "[n=1] K_00 = 1/2 + 1/2", v, 1.0);
        v = entry(indptr, indices, K, 0, 1);
        check(close_to(v, -0.5, 1e-14), "[n=1] K_01", v, -0.5);
        v = entry(indptr, indices, M, 0, 0);
        check(close_to(v, 2.0 * area / 6.0, 1e-14), "[n=1] M_00 = 2 A / 6", v, 2.0 * area / 6.0);
    }

    /* load of f = 1 sums to the area; f = 2 per dof gives M * 2 */
    st = g->load(dim, degree, nv, points, m, cells, nv, cells, GALERKIT_SOURCE_CONSTANT, &one,
                 order, n_chunks, chunks, b);
    total = 0.0;
    for (int32_t i = 0; i < nv; i++)
        total += b[i];
    snprintf(what, sizeof what, "[n=%d] load of f = 1 sums to the area", n);
    check(st == GALERKIT_OK && close_to(total, 1.0, 1e-14), what, total, 1.0);

    /* errors of u = x against 0: ||x||_L2 = 1/sqrt(3), |x|_H1 = 1 (exact: x is in P1) */
    for (int32_t v = 0; v < nv; v++)
        u[v] = points[2 * v];
    st = g->p1_l2_error(dim, nv, points, m, cells, u, zero, &result);
    snprintf(what, sizeof what, "[n=%d] L2 error of x against 0 = 1/sqrt(3)", n);
    check(st == GALERKIT_OK && close_to(result, 1.0 / sqrt(3.0), 1e-14), what, result,
          1.0 / sqrt(3.0));
    st = g->p1_h1_seminorm_error(dim, nv, points, m, cells, u, zero, &result);
    snprintf(what, sizeof what, "[n=%d] H1 seminorm error of x against 0 = 1", n);
    check(st == GALERKIT_OK && close_to(result, 1.0, 1e-14), what, result, 1.0);

    /* bad input is refused with a status, nothing runs on it */
    cells[0] = nv;  /* out of range */
    st = g->stiffness(dim, degree, nv, points, m, cells, nv, cells, 1, &one, indptr, indices,
                      order, posmap, n_chunks, chunks, K);
    snprintf(what, sizeof what, "[n=%d] cell index out of range -> GALERKIT_E_INDEX", n);
    check(st == GALERKIT_E_INDEX, what, st, GALERKIT_E_INDEX);
    cells[0] = 0;
    double keep = points[2 * cells[1]];
    points[2 * cells[1]] = points[2 * cells[0]];  /* collapse an edge of cell 0 */
    double y1 = points[2 * cells[1] + 1];
    points[2 * cells[1] + 1] = points[2 * cells[0] + 1];
    st = g->mass(dim, degree, nv, points, m, cells, nv, cells, 1, &one, indptr, indices, order,
                 posmap, n_chunks, chunks, M);
    snprintf(what, sizeof what, "[n=%d] collapsed cell -> GALERKIT_E_DEGENERATE", n);
    check(st == GALERKIT_E_DEGENERATE, what, st, GALERKIT_E_DEGENERATE);
    points[2 * cells[1]] = keep;
    points[2 * cells[1] + 1] = y1;
    double minus = -1.0;
    st = g->stiffness(dim, degree, nv, points, m, cells, nv, cells, 1, &minus, indptr, indices,
                      order, posmap, n_chunks, chunks, K);
    snprintf(what, sizeof what, "[n=%d] conductivity -1 -> GALERKIT_E_COEFFICIENT", n);
    check(st == GALERKIT_E_COEFFICIENT, what, st, GALERKIT_E_COEFFICIENT);
    posmap[0] = 200;  /* an offset past the end of its row */
    st = g->stiffness(dim, degree, nv, points, m, cells, nv, cells, 1, &one, indptr, indices,
                      order, posmap, n_chunks, chunks, K);
    snprintf(what, sizeof what, "[n=%d] corrupted position map -> GALERKIT_E_PLAN", n);
    check(st == GALERKIT_E_PLAN, what, st, GALERKIT_E_PLAN);

    free(points); free(cells); free(indptr); free(indices); free(order); free(posmap);
    free(chunks); free(K); free(M); free(b); free(u); free(zero);
    return 0;
}

int main(void)
{
    struct galerkit_api api;
    int32_t n_threads = 1;
    Py_Initialize();
    if (load_api(&api, &n_threads) != 0) {
        printf("FAIL: could not load the galerkit entry points\n");
        Py_FinalizeEx();
        return 2;
    }
    printf("galerkit entry points loaded; %d numba threads\n", (int)n_threads);
    run_checks(&api, 1, n_threads);   /* the 2-triangle unit square */
    run_checks(&api, 8, n_threads);   /* an 8 x 8 structured grid */
    run_checks(&api, 5, 3);           /* another chunk count: same values */
    if (Py_FinalizeEx() < 0)
        failures++;
    printf("%s (%d failed checks)\n", failures ? "FAIL" : "PASS", failures);
    return failures ? 1 : 0;
}
