/*
 * galerkit.h -- C entry points of galerkit: finite element assembly on a host's arrays.
 *
 * The functions are numba cfuncs compiled inside an embedded Python
 * interpreter (module galerkit.bindings.host.cfuncs); there is no library to link.
 * A host starts Python (Py_Initialize), imports galerkit.bindings.host.cfuncs,
 * calls its addresses() function -- a dict {name: address} -- and casts each
 * address to the function pointer types below (bindings/host/c/example_host.c
 * shows the 40 lines it takes).  The addresses stay valid until Py_Finalize.
 *
 * Conventions
 *   - indices are 0-based int32_t (below 2**31 dofs and matrix entries);
 *     arrays are row-major: points[v * dim + r], cells[c * (dim + 1) + j],
 *     cell_dofs[c * n_local + a], position_map[(p * n_local + a) * n_local + b];
 *   - dim 2 (triangles) or 3 (tetrahedra); Lagrange degree 1..4 with n_local
 *     = 3, 6, 10, 15 (triangles) or 4, 10, 20, 35 (tetrahedra);
 *   - degree 1: the dofs are the vertices, n_dofs == n_vertices, and
 *     cell_dofs is not read (pass cells).  Degree > 1: cell_dofs in galerkit's
 *     local node order (vertices, then edge, face and interior nodes), for
 *     example plan["cell_dofs"] of galerkit.bindings.host.embed.pattern();
 *   - no pointer may be NULL, except cell_dofs for degree 1 (not read);
 *   - the matrix is CSR: row i holds columns indices[indptr[i] .. indptr[i+1]-1],
 *     sorted, values in data[] at the same positions.
 *
 * Phases
 *   1. nnz = galerkit_pattern_count(..., indptr)            once per mesh
 *   2. allocate indices[nnz], cell_order[n_cells],
 *      position_map[n_cells * n_local * n_local] (uint16_t),
 *      chunk_plan[GALERKIT_CHUNK_PLAN_LENGTH(n_chunks)] (int64_t);
 *      galerkit_pattern_fill(...)                             once per mesh
 *   3. galerkit_stiffness / galerkit_mass (into data[nnz]) and
 *      galerkit_load (into out[n_dofs])                       every time values change
 *   4. galerkit_p1_l2_error / galerkit_p1_h1_seminorm_error  any time
 *   n_chunks is the number of row ranges assembled in parallel (use numba's
 *   thread count: galerkit.bindings.host.cfuncs.num_threads()); pass the same
 *   value to the count, fill and numeric calls.
 *
 * Ownership: the caller allocates and frees every array; galerkit keeps no
 * pointer after a call returns.  Buffer lengths cannot be checked: every
 * array must have the length documented here.
 *
 * Validation: before any kernel runs, every call checks the counts, every
 * index (cells, cell_dofs, pattern, cell order, position map, row ranges),
 * finiteness of coordinates, coefficients and fields, and non-degenerate
 * cells; on failure it returns a negative GALERKIT_E_* status and writes
 * nothing to the outputs of the numeric calls (the pattern calls may have
 * written part of theirs).
 *
 * Thread safety: no global state.  Each call runs numba's parallel threads.
 * Concurrent calls from several host threads, on distinct output arrays,
 * are safe when numba's threading layer is "omp" or "tbb"
 * (numba.threading_layer()); with "workqueue" make one call at a time.
 * The calling thread does not need to hold the Python GIL.
 */
#ifndef GALERKIT_H
#define GALERKIT_H

#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* status codes (galerkit.bindings.host.cfuncs.STATUS, describe_status()) */
#define GALERKIT_OK             0   /* success */
#define GALERKIT_E_ARGUMENT    -1   /* a count or option out of range: fix the call */
#define GALERKIT_E_INDEX       -2   /* a cell / cell_dofs index outside 0..n-1 or repeated */
#define GALERKIT_E_POINTS      -3   /* a non-finite coordinate */
#define GALERKIT_E_DEGENERATE  -4   /* a cell with (near) zero volume: repair or remove it */
#define GALERKIT_E_COEFFICIENT -5   /* a non-finite coefficient or a conductivity <= 0 */
#define GALERKIT_E_PATTERN     -6   /* indptr / indices are not the pattern of these cells */
#define GALERKIT_E_PLAN        -7   /* cell_order / position_map / chunk_plan do not match */
#define GALERKIT_E_SIZE        -8   /* more than 2**31-1 entries, or a row above 65536 */
#define GALERKIT_E_FIELD       -9   /* a non-finite value in u or u_reference */

/* length of chunk_plan: n_chunks + 1 row starts, then n_chunks (first, end) cell windows */
#define GALERKIT_CHUNK_PLAN_LENGTH(n_chunks) (3 * (int64_t)(n_chunks) + 1)

/* source_kind of galerkit_load */
#define GALERKIT_SOURCE_CONSTANT 0  /* source[0]: one value */
#define GALERKIT_SOURCE_PER_CELL 1  /* source[n_cells] */
#define GALERKIT_SOURCE_PER_DOF  2  /* source[n_dofs]: load of the interpolant, M * source */

/*
 * galerkit_pattern_count -- row lengths of the sparsity pattern.
 *   cell_dofs  [n_cells * n_local]  in
 *   indptr     [n_dofs + 1]         out: row starts, indptr[n_dofs] = nnz
 *   returns nnz (>= 0) or a negative status.
 */
typedef int64_t (*galerkit_pattern_count_fn)(int32_t n_dofs, int32_t n_cells, int32_t n_local,
                                              const int32_t *cell_dofs, int32_t n_chunks,
                                              int32_t *indptr);

/*
 * galerkit_pattern_fill -- column indices and the scatter plan.
 *   indptr        [n_dofs + 1]                  in (from galerkit_pattern_count)
 *   indices       [nnz]                          out: sorted columns of each row
 *   cell_order    [n_cells]                      out: cells sorted by smallest dof
 *   position_map  [n_cells * n_local * n_local]  out: offset of column dof[b] in row dof[a]
 *   chunk_plan    [GALERKIT_CHUNK_PLAN_LENGTH(n_chunks)]  out: row ranges, cell windows
 *   returns GALERKIT_OK or a negative status.
 */
typedef int32_t (*galerkit_pattern_fill_fn)(int32_t n_dofs, int32_t n_cells, int32_t n_local,
                                            const int32_t *cell_dofs, int32_t n_chunks,
                                            const int32_t *indptr, int32_t *indices,
                                            int32_t *cell_order, uint16_t *position_map,
                                            int64_t *chunk_plan);

/*
 * galerkit_stiffness -- values of integral(kappa grad u . grad v) into data[nnz].
 *   points        [n_vertices * dim]   in
 *   cells         [n_cells * (dim+1)]  in: vertex indices
 *   cell_dofs     [n_cells * n_local]  in: degree > 1 only (not read for degree 1)
 *   conductivity  [n_values]           in: n_values 1 (constant) or n_cells, all > 0
 *   indptr, indices, cell_order, position_map, chunk_plan: in, from the pattern calls
 *   data          [nnz]                out: overwritten
 *   returns GALERKIT_OK or a negative status.
 */
typedef int32_t (*galerkit_stiffness_fn)(int32_t dim, int32_t degree, int32_t n_vertices,
                                         const double *points, int32_t n_cells,
                                         const int32_t *cells, int32_t n_dofs,
                                         const int32_t *cell_dofs, int32_t n_values,
                                         const double *conductivity, const int32_t *indptr,
                                         const int32_t *indices, const int32_t *cell_order,
                                         const uint16_t *position_map, int32_t n_chunks,
                                         const int64_t *chunk_plan, double *data);

/*
 * galerkit_mass -- values of integral(c u v) into data[nnz]; arguments as
 * galerkit_stiffness, coefficient [n_values] any finite values.
 */
typedef int32_t (*galerkit_mass_fn)(int32_t dim, int32_t degree, int32_t n_vertices,
                                    const double *points, int32_t n_cells, const int32_t *cells,
                                    int32_t n_dofs, const int32_t *cell_dofs, int32_t n_values,
                                    const double *coefficient, const int32_t *indptr,
                                    const int32_t *indices, const int32_t *cell_order,
                                    const uint16_t *position_map, int32_t n_chunks,
                                    const int64_t *chunk_plan, double *data);

/*
 * galerkit_load -- integral(f v) into out[n_dofs].
 *   source_kind  GALERKIT_SOURCE_CONSTANT | _PER_CELL | _PER_DOF
 *   source       [1 | n_cells | n_dofs]  in: finite values
 *   cell_order, chunk_plan: in, from galerkit_pattern_fill
 *   returns GALERKIT_OK or a negative status.
 */
typedef int32_t (*galerkit_load_fn)(int32_t dim, int32_t degree, int32_t n_vertices,
                                    const double *points, int32_t n_cells, const int32_t *cells,
                                    int32_t n_dofs, const int32_t *cell_dofs,
                                    int32_t source_kind, const double *source,
                                    const int32_t *cell_order, int32_t n_chunks,
                                    const int64_t *chunk_plan, double *out);

/*
 * galerkit_p1_l2_error -- ||u - u_reference||_L2 of two nodal P1 fields
 * (u, u_reference [n_vertices]), exact for the difference of the interpolants;
 * written to result[0].  Returns GALERKIT_OK or a negative status.
 */
typedef int32_t (*galerkit_p1_l2_error_fn)(int32_t dim, int32_t n_vertices, const double *points,
                                           int32_t n_cells, const int32_t *cells,
                                           const double *u, const double *u_reference,
                                           double *result);

/*
 * galerkit_p1_h1_seminorm_error -- ||grad(u - u_reference)||_L2, as above.
 */
typedef int32_t (*galerkit_p1_h1_seminorm_error_fn)(int32_t dim, int32_t n_vertices,
                                                    const double *points, int32_t n_cells,
                                                    const int32_t *cells, const double *u,
                                                    const double *u_reference, double *result);

/* every entry point, for X-macros: X(short_name) with the full name galerkit_##short_name */
#define GALERKIT_ENTRY_POINTS(X) \
    X(pattern_count) X(pattern_fill) X(stiffness) X(mass) X(load) \
    X(p1_l2_error) X(p1_h1_seminorm_error)

/* a table of the function pointers, filled by the host from addresses() */
struct galerkit_api {
#define GALERKIT_API_FIELD(name) galerkit_##name##_fn name;
    GALERKIT_ENTRY_POINTS(GALERKIT_API_FIELD)
#undef GALERKIT_API_FIELD
};

#ifdef __cplusplus
}
#endif

#endif /* GALERKIT_H */
