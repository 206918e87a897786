"""Mutation check of the test suite: ``make mutants``.

Applies small deliberate faults to the kernel, one at a time, and requires a
fast selection of tests (``SELECTION``) to fail on each.  Prints one line per
fault (killed / SURVIVED, the first failing test, seconds) and exits 1 if any
fault survives or if the selection fails on the unmodified code.

How it stays safe:

* the repository is never modified: the package (kernel/ as ``galerkit``,
  bindings/ as ``galerkit.bindings``) and tests/ are copied into a temporary
  folder that ``PYTHONPATH`` puts ahead of the editable install; each fault
  is a text substitution in that copy, undone (file copied back) afterwards,
  and the folder is removed at the end, also on Ctrl-C;
* numba's on-disk cache cannot serve a stale compiled fault: every run gets
  its own ``NUMBA_CACHE_DIR``, a copy of the cache that the unmodified run
  filled, minus the entries of the mutated file *and of every module that
  imports it, transitively* (numba keys a cache entry on its own file only,
  so a kernel that inlines a helper of another file would otherwise keep
  the old helper).  The mutated file itself gets a new modification time, so
  numba would recompile it anyway; deleting is the belt to those braces.
  ``NUMBA_DISABLE_JIT`` is refused: with it the kernels would run as Python
  and a fault in a numba-only path (e.g. ``prange`` typing) would go unseen.

A fault counts as killed only when a test of the selection fails (pytest exit
1), not when the run crashes.  Each fault may name the test seen to kill it;
that test runs first (then the rest of the selection), which saves time only.

Usage: ``python tests/mutants.py [-k SUBSTRING] [--list]``.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

_F = "tests/test_functionals_exact.py::test_"
_A = "tests/test_assembly_reference.py::test_"
E21, E22 = (f"{_F}errors_of_an_interpolated_polynomial_equal_sympy_integrals[{c}]"
            for c in ("2-1", "2-2"))
N21 = f"{_F}norms_and_energy_of_an_interpolated_polynomial_equal_sympy_integrals[2-1]"
A21, A22, A23, A24 = (
    f"{_A}element_stiffness_mass_load_equal_exact_integrals_of_an_independent_basis[2-{k}]"
    for k in (1, 2, 3, 4))
B21, B31 = (f"{_A}facet_mass_and_load_equal_exact_surface_integrals[{c}]" for c in ("2-1", "3-1"))
T23 = f"{_A}two_cell_matrices_are_the_sums_of_the_element_matrices[2-3]"
_E = "tests/test_estimators.py::test_"
EOSC = f"{_E}oscillation_terms_equal_their_closed_forms"
EPATCH = f"{_E}patch_test_linear_solution_gives_a_zero_bound"
ERES = f"{_E}residual_estimator_equals_its_closed_form_on_a_two_cell_mesh"
ELOOSE = f"{_E}bound_survives_a_loose_iterative_solve"
ECONST = f"{_E}constant_source_has_exact_moments_and_the_bound_stays_above_the_error"
EROT = f"{_E}bound_of_an_anisotropic_problem_does_not_depend_on_the_axes"
EMARK = "tests/test_adaptivity.py::test_doerfler_marking_takes_the_fewest_largest_cells"
EBIS = "tests/test_bisection.py::test_refinement_is_conforming_nested_and_keeps_tags_and_angles"
EBIS3 = ("tests/test_bisection3d.py::test_local_bisection_is_conforming_nested_and_keeps_tags_"
         "and_regions")
EANG3 = "tests/test_bisection3d.py::test_angles_stay_bounded_under_repeated_refinement"
_E3 = "tests/test_estimators3d.py::test_"
E3OSC = f"{_E3}oscillation_terms_equal_their_closed_forms_in_3d"
E3PATCH = f"{_E3}patch_test_linear_solution_gives_a_zero_bound_in_3d"
E3RES = f"{_E3}residual_estimator_equals_its_closed_form_on_one_cube_in_3d"
E3LOOSE = f"{_E3}bound_survives_a_loose_iterative_solve_in_3d"
E3RT = f"{_E3}raviart_thomas_mass_and_misfit_equal_a_collapsed_gauss_rule"
E3NULL = f"{_E3}null_space_patch_solve_equals_the_mixed_system[tensor]"
ESMOOTH = (f"{_E}bound_is_above_the_error_of_a_smooth_solution_on_every_level_with_"
           "effectivity_below_1_5")
_PK = "tests/test_estimators_pk.py::test_pk_"
PKOSC = f"{_PK}oscillation_term_equals_its_closed_form"
PKSMOOTH = f"{_PK}bound_is_above_the_error_of_a_smooth_solution_with_effectivity_below_1_5"
PKMIXED = f"{_PK}bound_is_above_the_error_of_a_mixed_condition_problem"
PKLOOSE = f"{_PK}bound_survives_a_loose_iterative_solve"
PKRES = f"{_PK}residual_estimator_has_the_element_laplacian"
PKPATCH = f"{_PK}patch_test_polynomial_solution_gives_a_zero_bound"
_P3 = "tests/test_estimators_pk3d.py::test_pk3d_"
P3OSC = f"{_P3}oscillation_term_equals_its_closed_form"
P3BDATA = f"{_P3}boundary_data_term_equals_its_closed_form"
P3PATCH = f"{_P3}patch_test_polynomial_solution_gives_a_zero_bound[2]"
P3LOOSE = f"{_P3}bound_survives_a_loose_iterative_solve"
P3RT = f"{_P3}rt_reference_tables_equal_exact_sympy_moments_and_are_unisolvent[2]"
P3SMOOTH = f"{_P3}bound_is_above_the_error_of_a_smooth_solution_with_effectivity_below_1_5[2-sizes0]"
P3MIXED = f"{_P3}bound_is_above_the_error_of_a_mixed_condition_problem[False]"
P3NUMBER = f"{_P3}bound_does_not_depend_on_the_vertex_numbering"
PKJUMP = f"{_PK}residual_estimator_flux_jump_weight_equals_its_closed_form"
PKMIN = f"{_PK}minimised_flux_stays_above_the_error_and_below_the_patch_flux"
FLUX_WALL = "tests/test_fluxes.py::test_composite_wall_flux_equals_the_series_resistance_formula[2]"
FLUX_CYL = "tests/test_fluxes.py::test_hollow_cylinder_flux_converges_at_the_expected_rates"
FLUX_BAL = "tests/test_fluxes.py::test_consistent_fluxes_of_all_tags_sum_to_minus_the_source[2]"
REG_K = "tests/test_regions.py::test_region_dict_stiffness_equals_per_cell_values"
FOLD = ("tests/test_bad_input.py::test_inverted_cell_overlapping_its_neighbour_is_refused_"
        "naming_both_cells")
FOLD3 = ("tests/test_bad_input.py::test_inverted_tetrahedron_overlapping_its_neighbour_is_"
         "refused_naming_both_cells")
_FNP = "tests/test_mesh.py::test_boundary_facets_equal_a_numpy_count_of_all_facet_occurrences"
FACETS_NP, FACETS_NP_RING = f"{_FNP}[0]", f"{_FNP}[3]"
_M = "tests/test_mesh.py::test_"
NONMANIFOLD = f"{_M}three_triangles_sharing_one_edge_are_non_manifold"
REORIENT = f"{_M}negatively_oriented_cells_are_reoriented_and_counted"
CELL_TABLES = f"{_M}generators_write_the_cell_tables_counted_by_hand"
SIDE_TAGS = f"{_M}side_tags_have_the_right_sizes_and_lie_on_their_side"
TAG_IDS = f"{_M}facet_tags_are_sorted_unique_copies_whatever_the_ids_given"
COMPONENTS = f"{_M}connected_components_equal_scipy_csgraph"
VOLUMES = f"{_M}generated_mesh_volume_equals_the_domain_volume"

# (name, file relative to kernel/, old text, new text[, test to run first]); old must
# occur exactly once.  The test to run first is the one seen to kill the fault: it saves
# running the selection up to it; the whole selection still runs if it passes.
MUTANTS = [
    ("facet pass: folded facets never detected (two cells on the same side pass)", "topology.py",
     "same[h] = 1 if side == side0[h] else 0", "same[h] = 0", FOLD),
    ("facet pass: a facet of exactly three cells not counted as shared", "topology.py",
     "else:\n                    shared_here += 1", "elif cnt > 3:\n                    shared_here += 1",
     NONMANIFOLD),
    ("facet pass: boundary facets with the wrong local index", "topology.py",
     "facet_local[out] = o % k", "facet_local[out] = (o + 1) % k", FACETS_NP),
    ("facet pass: large facet buckets merged with the wrong cells", "topology.py",
     "                    tmp_occ[o] = occ[j]", "                    tmp_occ[o] = occ[i]",
     FACETS_NP_RING),
    ("cell check: re-oriented cells not counted", "mesh.py",
     "n_negative += 1 if negative else 0", "n_negative += 0", REORIENT),
    ("generator: second triangle of each square listed clockwise", "generators.py",
     "[0, nx + 2, nx + 1]]", "[0, nx + 1, nx + 2]]", CELL_TABLES),
    ("side tags: the upper sides never tagged", "generators.py",
     "if abs(x - upper[a]) <= tol:", "if abs(x - upper[a]) < -tol:", SIDE_TAGS),
    ("set_facet_tag: unsorted ids kept as given", "mesh.py",
     "if ids.size > 1 and not (ids[1:] > ids[:-1]).all():", "if False:", TAG_IDS),
    ("cell check: tetrahedron volumes divided by 6.1", "mesh.py",
     "+ a2 * (b0 * c1 - b1 * c0)) / 6.0, longest", "+ a2 * (b0 * c1 - b1 * c0)) / 6.1, longest",
     VOLUMES),
    ("cell check: triangle areas scaled by 1.02", "mesh.py",
     "return 0.5 * (ax * by - ay * bx), longest", "return 0.51 * (ax * by - ay * bx), longest",
     VOLUMES),
    ("l2_error scaled by 1.03", "functionals.py",
     "t = _integrate(disc, u, _L2, exact=exact, quadrature_degree=quadrature_degree)\n"
     "    return t if per_cell else float(np.sqrt(max(t.sum(), 0.0)))",
     "t = _integrate(disc, u, _L2, exact=exact, quadrature_degree=quadrature_degree)\n"
     "    return t if per_cell else 1.03 * float(np.sqrt(max(t.sum(), 0.0)))", E21),
    ("h1_seminorm_error scaled by 1.03", "functionals.py",
     "quadrature_degree=quadrature_degree)\n    return t if per_cell else float(np.sqrt(max("
     "t.sum(), 0.0)))\n\n\ndef energy_error",
     "quadrature_degree=quadrature_degree)\n    return t if per_cell else 1.03 * float(np.sqrt("
     "max(t.sum(), 0.0)))\n\n\ndef energy_error", E21),
    ("energy_error ignores a tensor conductivity", "functionals.py",
     "if mode != _H1 and tensor.shape[0] > 0:",
     "if mode == _FUNCTIONAL and tensor.shape[0] > 0:", E21),
    ("energy_error samples a callable conductivity at one point", "functionals.py",
     "kq = kappa[kci, q * kqs]", "kq = kappa[kci, 0]", E21),
    ("per-cell conductivity of the functionals ignored", "functionals.py",
     "        if kappa.shape[0] > 1:\n            kci = ib",
     "        if kappa.shape[0] > 1:\n            kci = zero", E21),
    ("energy functional: source term with the wrong sign", "functionals.py",
     "acc += w[q] * (0.5 * kq * s - fq * uh)", "acc += w[q] * (0.5 * kq * s + fq * uh)", N21),
    ("functionals' default quadrature one degree short for P2", "functionals.py",
     "deg = 2 * disc.degree + 2 if quadrature_degree is None",
     "deg = 2 * disc.degree + 2 - (disc.degree == 2) if quadrature_degree is None", E22),
    ("physical gradient with the transposed inverse Jacobian (functionals)", "functionals.py",
     "gr += Jinv[j, r] * dV[q, a, j]", "gr += Jinv[r, j] * dV[q, a, j]", E21),
    ("h1_norm adds the norms instead of their squares", "functionals.py",
     "return float(np.hypot(l2_norm(", "return float(np.add(l2_norm(", N21),
    ("P1 stiffness ignores the conductivity", "assembly.py",
     "scale = kappa[c if kappa.shape[0] > 1 else 0, 0] / (fact * abs(det))",
     "scale = 1.0 / (fact * abs(det))", A21),
    ("per-cell tensor conductivity: first cell's tensor everywhere", "assembly.py",
     "                # C = |det J| J^-1 K J^-T\n                ti = c if tensor.shape[0] > 1 "
     "else 0",
     "                # C = |det J| J^-1 K J^-T\n                ti = 0", T23),
    ("callable mass coefficient taken at the first point", "assembly.py",
     "                w = coef[ci, q]\n", "                w = coef[ci, 0]\n", A21),
    ("P3 stiffness quadrature one degree short", "assembly.py",
     "R = stiffness_table(d, k, max(2 * k - 2, 0)).sum(axis=0, keepdims=True)",
     "R = stiffness_table(d, k, max(2 * k - 2 - (k == 3), 0)).sum(axis=0, keepdims=True)", A23),
    ("P4 mass quadrature one degree short", "assembly.py",
     "mass_table(mesh.dim, k, 2 * k).sum(axis=0, keepdims=True)",
     "mass_table(mesh.dim, k, 2 * k - (k == 4)).sum(axis=0, keepdims=True)", A24),
    ("pattern sort: heapsort sifts towards the smaller child (long rows unsorted)",
     "assembly.py", "if child + 1 < end and a[lo + child + 1] > a[lo + child]:",
     "if child + 1 < end and a[lo + child + 1] < a[lo + child]:",
     "tests/test_assembly.py::test_p4_tetrahedra_long_rows_match_coo_reference"),
    ("transposed local matrix: scatter reads the (unset) lower triangle", "assembly.py",
     "data[base + posmap[p, a, b]] += Kloc[b, a]", "data[base + posmap[p, a, b]] += Kloc[a, b]"),
    ("boundary load: sign flipped", "assembly.py",
     "            out[dofs[c, a]] += s * v", "            out[dofs[c, a]] -= s * v", B21),
    ("boundary mass ignores its coefficient", "assembly.py",
     "v += coef[ci, q] * R[f, q, a, b]", "v += R[f, q, a, b]", B21),
    ("3D facet area without the factor 1/2", "assembly.py",
     "return 0.5 * np.sqrt(x * x + y * y + z * z)", "return np.sqrt(x * x + y * y + z * z)", B31),
    ("Neumann flux enters with the wrong sign", "problem.py",
     "            b += asm.boundary_load(tag, flux)\n",
     "            b -= asm.boundary_load(tag, flux)\n"),
    ("Dirichlet lifting with the wrong sign", "boundary.py",
     "s -= a * g_full[c]", "s += a * g_full[c]"),
    ("transposed Jacobian (geometry)", "geometry.py",
     "            J[i, j] = points[vj, i] - points[v0, i]",
     "            J[j, i] = points[vj, i] - points[v0, i]", A22),
    ("physical quadrature points with a transposed map", "geometry.py",
     "s += (points[cells[c, j + 1], i] - points[v0, i]) * ref[q, j]",
     "s += (points[cells[c, j + 1], i] - points[v0, i]) * ref[q, d - 1 - j]", A21),
    ("basis derivative factor off", "elements.py",
     "R[:, :, m - 1] * (k / m)", "R[:, :, m - 1] * (k / (m + 1))"),
    ("Radon's 7-point rule with its two orbit weights swapped", "quadrature.py",
     "(w1, (a1, a1, 1 - 2 * a1)),", "(w2, (a1, a1, 1 - 2 * a1)),"),
    ("CG update steps x by 0.9 alpha", "sparse.py",
     "x[i] += alpha * p[i]", "x[i] += 0.9 * alpha * p[i]"),
    ("error bound: Poincare constant h/(2 pi) instead of h/pi", "estimators.py",
     "eo = hcell[c] / math.pi * osc[c]", "eo = hcell[c] / (2 * math.pi) * osc[c]", EOSC),
    ("error bound: trace constant without its 1/pi part", "estimators.py",
     "(1 / math.pi**2 + 1 / math.pi)", "(1 / math.pi**2)", EOSC),
    ("error bound: edge flux of K grad u_h with a sign flipped", "estimators.py",
     "return v[c, 0] * dy - v[c, 1] * dx", "return v[c, 0] * dy + v[c, 1] * dx", EPATCH),
    ("error bound: patch circulation maximised instead of minimised", "estimators.py",
     "t0 = -bb / aa", "t0 = bb / aa", ESMOOTH),
    ("error bound: routed residual flux dropped", "estimators.py",
     "_cell_terms(pts, cells, area, kinv, flux_h, P, T,",
     "_cell_terms(pts, cells, area, kinv, flux_h, P, 0 * T,", ELOOSE),
    ("error bound: a cell taken as its own neighbour", "estimators.py",
     "if c2 != c and (cells[c2, 0] == b", "if (cells[c2, 0] == b", ERES),
    ("error bound: constant source moment f |K| / 2 on the first vertex", "estimators.py",
     "fmom[c, 0] = f * A / 3.0", "fmom[c, 0] = f * A / 2.0", ECONST),
    ("residual estimator: constant source norm doubled", "estimators.py",
     "fnorm2[c] = f * f * A", "fnorm2[c] = 2 * f * f * A", ERES),
    ("error bound: K^-1 of a tensor with an off-diagonal sign flipped", "estimators.py",
     "kinv[c, 0, 1] = -k01 / det", "kinv[c, 0, 1] = k01 / det", EROT),
    ("residual estimator: full jump on each side", "estimators.py",
     "(mine - other) ** 2 / (2 * lamF)", "(mine - other) ** 2 / lamF", ERES),
    ("residual estimator: jump weighted by the smaller conductivity of the two cells",
     "estimators.py", "lamF = max(lam, lam_min[nb_])", "lamF = min(lam, lam_min[nb_])", PKJUMP),
    ("Doerfler marking takes one cell fewer", "adaptivity.py",
     "return np.sort(order[:min(k, n)])", "return np.sort(order[:max(min(k, n) - 1, 1)])",
     EMARK),
    ("bisection closure skipped", "bisection.py",
     "        if not need.any():\n            break", "        if True:\n            break", EBIS),
    ("tet bisection: second child of a tag-0 cell not reversed", "bisection3d.py",
     "L[d, 0], L[d, 1], L[d, 2], L[d, 3] = x3, zi, x2, x1",
     "L[d, 0], L[d, 1], L[d, 2], L[d, 3] = x3, zi, x1, x2", EBIS3),
    ("tet bisection: facet origins of the first child swapped", "bisection3d.py",
     "origin[c, 3] = -1, o3, o1, o2", "origin[c, 3] = -1, o3, o2, o1", EBIS3),
    ("tet bisection: closure skipped", "bisection3d.py",
     "        todo[c] = hit", "        todo[c] = False", EBIS3),
    ("tet bisection: type A cells bisected as tagged simplices", "bisection3d.py",
     "            if t == _TYPE_A:", "            if False:", EANG3),
    ("3D error bound: trace constant without its 2/(3 pi) part", "estimators3d.py",
     "(1 / math.pi**2 + 2 / (3 * math.pi))", "(1 / math.pi**2)", E3OSC),
    ("3D error bound: patch target with half, not a third, of each face flux",
     "estimators3d.py", "+ qf[c, pl[p, j]] / 3.0", "+ qf[c, pl[p, j]] / 2.0", E3PATCH),
    ("3D error bound: routed residual flux dropped", "estimators3d.py",
     "+ P[c, 3, i] + T[c, i]", "+ P[c, 3, i]", E3LOOSE),
    ("3D residual estimator: full jump on each side", "estimators3d.py",
     "jump**2 / (2 * lamF)", "jump**2 / lamF", E3RES),
    ("3D error bound: flux misfit integral with 1/24 for 1/20", "estimators3d.py",
     "return vol / 20.0 * acc", "return vol / 24.0 * acc", E3RT),
    ("3D error bound: Raviart-Thomas mass matrix with 15 for 16", "estimators3d.py",
     "(16.0 * t1 + t2)", "(15.0 * t1 + t2)", E3RT),
    ("3D error bound: a divergence row with its signs flipped", "estimators3d.py",
     "A[rr, uj] += ps[p, j]", "A[rr, uj] -= ps[p, j]", E3NULL),
    ("3D error bound: patch cycles (divergence-free part) not added", "estimators3d.py",
     "                        y[f] += acc", "                        y[f] += 0.0 * acc", E3PATCH),
    ("3D error bound: tree flux through the parent face without its orientation",
     "estimators3d.py", "y[pf[p, jp]] = ps[p, jp] * s", "y[pf[p, jp]] = s", E3PATCH),
    ("3D error bound: a cycle closed through the tree with the wrong sign", "estimators3d.py",
     "Z[pf[p, jp], jz] = ps[p, jp] * s", "Z[pf[p, jp], jz] = -ps[p, jp] * s", E3PATCH),
    ("P_k error bound: Poincare constant h/(2 pi) instead of h/pi", "equilibration.py",
     "eo = h / math.pi * osc", "eo = h / (2 * math.pi) * osc", PKOSC),
    ("P_k error bound: Legendre parity ignored on reversed edges", "equilibration.py",
     "sg = -1.0 if (eflip[p, e] and j % 2 == 1) else 1.0", "sg = 1.0", PKSMOOTH),
    ("P_k error bound: routed residual flux dropped", "equilibration.py",
     "uloc, dphi, w, tau, X, T, ref", "uloc, dphi, w, tau, X, 0 * T, ref", PKLOOSE),
    ("P_k residual estimator: element Laplacian dropped", "equilibration.py",
     "elres = fv + (Hu @ Hm", "elres = fv + 0 * (Hu @ Hm", PKRES),
    ("P_k residual estimator: jump term scaled by h_F^(3/2) instead of h_F^(1/2)",
     "equilibration.py", "hE[ii, ci] ** 2 * jump2", "hE[ii, ci] ** 3 * jump2", PKJUMP),
    ("P_k residual estimator: jump weighted by the smaller conductivity of the two cells",
     "equilibration.py", "lamF = np.maximum(lam_min[ci], lam_min[other])",
     "lamF = np.minimum(lam_min[ci], lam_min[other])", PKJUMP),
    ("minimised flux: stream function free on the boundary (normal trace changed)",
     "flux_minimisation.py", "    free[fixed] = False", "    free[fixed[:0]] = False", PKMIN),
    ("minimised flux: right-hand side with its sign flipped", "flux_minimisation.py",
     "    loc = -np.einsum", "    loc = np.einsum", PKMIN),
    ("P_k error bound: stiffness part of the patch divergence with its sign flipped",
     "equilibration.py", "tgt = np.ascontiguousarray(t1 - t2)",
     "tgt = np.ascontiguousarray(t1 + t2)", PKSMOOTH),
    ("P_k error bound: Neumann moment at the first facet vertex with its sign flipped",
     "equilibration.py", "ma = -flen[:, None]", "ma = flen[:, None]", PKMIXED),
    ("P_k error bound: patch energy in the K norm instead of K^-1", "equilibration.py",
     "G = np.ascontiguousarray(J.transpose(0, 2, 1) @ Kinv @ J)",
     "G = np.ascontiguousarray(J.transpose(0, 2, 1) @ Kt @ J)", PKMIXED),
    ("P_k 3D bound: every face moment table of the identity vertex order (global face "
     "coordinates ignored)", "equilibration3d.py",
     "Ve, _ = _rt_values_3d(k, _face_points(i, p, bary))",
     "Ve, _ = _rt_values_3d(k, _face_points(i, 0, bary))", P3SMOOTH),
    ("P_k 3D reference basis: divergence of x p with k + 2 for k + 3", "equilibration3d.py",
     "divs.append((k + 3) * p)", "divs.append((k + 2) * p)", P3RT),
    ("P_k 3D bound: Poincare constant h/(2 pi) instead of h/pi", "equilibration3d.py",
     "eo = h / math.pi * osc", "eo = h / (2 * math.pi) * osc", P3OSC),
    ("P_k 3D bound: trace constant without its 2/(3 pi) part", "equilibration3d.py",
     "(1 / math.pi**2 + 2 / (3 * math.pi))", "(1 / math.pi**2)", P3BDATA),
    ("P_k 3D bound: routed residual flux dropped", "equilibration3d.py",
     "uloc, dphi_e, we, tau_e, X, T, ref", "uloc, dphi_e, we, tau_e, X, 0 * T, ref", P3LOOSE),
    ("P_k 3D bound: patch residual not taken out of the divergence rows", "equilibration3d.py",
     "r[u] = tgt[c, la, j] - cr[p] * qint[j] / qint[0]", "r[u] = tgt[c, la, j]", P3LOOSE),
    ("P_k 3D bound: stiffness part of the patch divergence with its sign flipped",
     "equilibration3d.py", "tgt = np.ascontiguousarray(t1 - t2)",
     "tgt = np.ascontiguousarray(t1 + t2)", P3SMOOTH),
    ("P_k 3D bound: Neumann moments with their sign flipped", "equilibration3d.py",
     "mom = -farea[:, None, None]", "mom = farea[:, None, None]", P3MIXED),
    ("P_k 3D residual estimator: element Laplacian dropped", "equilibration3d.py",
     "elres = fv + (Hu @ Hm", "elres = fv + 0 * (Hu @ Hm", P3PATCH),
    ("P_k 3D bound: private rows of a cell not eliminated (Schur update dropped)",
     "equilibration3d.py", "                            s_ -= Sp[u, npr + t1] * AB[p, u, t2]\n",
     "                            s_ -= 0.0 * Sp[u, npr + t1] * AB[p, u, t2]\n", P3PATCH),
    ("P_k 3D bound: cell blocks of a batch looked up in reverse order", "equilibration3d.py",
     "slot[cells] = np.arange(cells.size)", "slot[cells] = np.arange(cells.size)[::-1]",
     P3PATCH),
    ("multigrid Galerkin product scaled (coarse operator 1.5 P^T A P)", "multigrid.py",
     "        c_ptr, c_ind, c_val = spgemm(*lv.R, *AP, n_next)\n",
     "        c_ptr, c_ind, c_val = spgemm(*lv.R, *AP, n_next)\n        c_val = 1.5 * c_val\n"),
    ("multigrid prolongator smoothed with 0.9 of its weight", "multigrid.py",
     "            scale = omega / l1[i]\n", "            scale = 0.9 * omega / l1[i]\n"),
    ("multigrid radius-2 aggregates: the second ring ignores the strength test", "multigrid.py",
     "                        if agg[m] == -1 and data[kk] * data[kk] > t2 * abs(diag[j] * diag[m]):",
     "                        if agg[m] == -1:",
     "tests/test_multigrid.py::test_aggregates_follow_the_three_pass_rule_with_radius[2]"),
    ("multigrid aggregate pattern count leaves out each aggregate's own entry", "multigrid.py",
     "        mark[a] = a\n        total += 1\n", "        mark[a] = a\n",
     "tests/test_multigrid.py::"
     "test_radius_two_first_aggregates_on_tetrahedra_lower_the_operator_complexity"),
    ("SpGEMM drops the products after the first of a column", "sparse.py",
     "                        c_val[k] += av * b_val[kb]\n", "                        c_val[k] += 0.0\n"),
    ("consistent flux: residual with the load scaled by 0.97", "fluxes.py",
     "self.residual = A @ sol.u - b", "self.residual = A @ sol.u - 0.97 * b", FLUX_BAL),
    ("flux: facet measure off by the factor d", "fluxes.py",
     "self.measure = d * vol * norm", "self.measure = vol * norm", FLUX_BAL),
    ("consistent flux: Robin facet flux with the wrong sign", "fluxes.py",
     "out[sel] = a * (g - uq[sel])", "out[sel] = a * (uq[sel] - g)", FLUX_BAL),
    ("gradient flux with the inward normal", "fluxes.py",
     "self.normal = -g / norm[:, None]", "self.normal = g / norm[:, None]", FLUX_WALL),
    ("interface flux: region stiffness of every cell", "fluxes.py",
     "K.data -= asm.stiffness(kappa).data", "K.data -= 0.5 * asm.stiffness(kappa).data",
     FLUX_WALL),
    ("per-region constant values: the last region's value everywhere", "regions.py",
     "            for i, v in self.by_id.items():\n                table[i] = float(v)",
     "            for i, v in self.by_id.items():\n                table[:] = float(v)", REG_K),
    ("per-region callable evaluated on every cell", "regions.py",
     "                xs = np.ascontiguousarray(x[:, sel, :].reshape(x.shape[0], -1))",
     "                xs = np.ascontiguousarray(x[:, sel[:1].repeat(sel.size), :]"
     ".reshape(x.shape[0], -1))", REG_K),
]

# the fast selection, cheapest first (-x stops at the first failure); the largest
# cases (P4 on tetrahedra, P3-P4 functionals) are left to the full suite
SELECTION = [
    "tests/test_quadrature.py",
    "tests/test_elements.py",
    "tests/test_multigrid.py::test_dot_and_fused_cg_update_match_numpy",
    "tests/test_multigrid.py::test_coarse_operators_are_galerkin_products",
    "tests/test_multigrid.py::test_prolongator_is_the_smoothed_tentative_prolongator",
    "tests/test_multigrid.py::test_spgemm_matches_scipy",
    "tests/test_multigrid.py::test_aggregates_follow_the_three_pass_rule_with_radius",
    "tests/test_multigrid.py::"
    "test_radius_two_first_aggregates_on_tetrahedra_lower_the_operator_complexity",
    *(f"{_A}element_stiffness_mass_load_equal_exact_integrals_of_an_independent_basis[{c}]"
      for c in ("2-1", "2-2", "2-3", "2-4", "3-1", "3-2")),
    *(f"{_A}facet_mass_and_load_equal_exact_surface_integrals[{c}]"
      for c in ("2-1", "2-2", "3-1", "3-2")),
    *(f"{_A}two_cell_matrices_are_the_sums_of_the_element_matrices[{c}]" for c in ("2-3", "3-2")),
    *(f"{_F}errors_of_an_interpolated_polynomial_equal_sympy_integrals[{c}]"
      for c in ("2-1", "2-2", "3-1", "3-2")),
    *(f"{_F}norms_and_energy_of_an_interpolated_polynomial_equal_sympy_integrals[{c}]"
      for c in ("2-1", "2-2", "3-2")),
    *(f"{_F}zero_against_products_of_sines_gives_the_closed_forms[{c}]" for c in ("2-1", "3-1")),
    FOLD, FOLD3, _FNP, NONMANIFOLD, REORIENT, CELL_TABLES, SIDE_TAGS, TAG_IDS,
    COMPONENTS, VOLUMES,
    "tests/test_boundary.py",
    "tests/test_regions.py",
    "tests/test_fluxes.py",
    "tests/test_problem.py::test_neumann_manufactured_solution_rates[1-5]",
    "tests/test_problem.py::test_square_dirichlet_rates_are_k_plus_1_in_l2_and_k_in_h1[1-5-4]",
    EOSC, EPATCH, ERES, ELOOSE, ESMOOTH, EMARK, EBIS, EBIS3, EANG3,
    E3OSC, E3PATCH, E3RES, E3LOOSE, E3RT, E3NULL,
    PKOSC, PKRES, PKPATCH, PKLOOSE, PKSMOOTH, PKMIXED, PKJUMP, PKMIN,
    P3RT, P3OSC, P3BDATA, P3PATCH, P3LOOSE, P3SMOOTH, P3MIXED, P3NUMBER,
]


def module_imports():
    """module name -> set of galerkit modules it imports (kernel and bindings)."""
    deps = {}
    for folder, prefix in ((ROOT / "kernel", ""), (ROOT / "bindings", "bindings.")):
        for f in folder.rglob("*.py"):
            text = f.read_text()
            names = set(re.findall(r"from \.\.?(\w+) import", text))
            names |= set(re.findall(r"from galerkit\.(\w+) import", text))
            for group in re.findall(r"from \.\.? import ([\w, ]+)", text):
                names |= {n.strip() for n in group.split(",")}
            deps[prefix + f.stem] = names
    return deps


def dependents(module):
    """``module`` and every module importing it, transitively (file stems)."""
    deps = module_imports()
    out, grew = {module}, True
    while grew:
        grew = False
        for mod, names in deps.items():
            stem = mod.split(".")[-1]
            if stem not in out and names & out:
                out.add(stem)
                grew = True
    return out


def drop_cache(cache_dir, stems):
    """Delete numba cache files of the given source files (``<stem>.<func>-<line>...``)."""
    for p in Path(cache_dir).rglob("*"):
        if p.suffix in (".nbi", ".nbc") and p.name.split(".")[0] in stems:
            p.unlink()


def run_selection(tree, cache_dir, stop_first=True, first=None):
    env = dict(os.environ)
    env["PYTHONPATH"] = str(tree) + os.pathsep + env.get("PYTHONPATH", "")
    env["NUMBA_CACHE_DIR"] = str(cache_dir)
    env.pop("NUMBA_DISABLE_JIT", None)
    cmd = [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "-rf",
           "-o", "addopts="] + (["-x"] if stop_first else []) + \
        ([first] if first else []) + [t for t in SELECTION if t != first]
    t0 = time.perf_counter()
    run = subprocess.run(cmd, cwd=tree, env=env, capture_output=True, text=True)
    failed = re.findall(r"^FAILED (\S+)", run.stdout, re.M)
    return run.returncode, failed, time.perf_counter() - t0, run.stdout + run.stderr


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("-k", default="", help="only faults whose name contains this")
    ap.add_argument("--list", action="store_true", help="list the faults and exit")
    args = ap.parse_args(argv)
    if os.environ.get("NUMBA_DISABLE_JIT", "0") not in ("", "0"):
        sys.exit("mutants: NUMBA_DISABLE_JIT is set; the faults must run compiled")
    chosen = [m for m in MUTANTS if args.k in m[0]]
    if args.list:
        for name, f, *_ in chosen:
            print(f"{f:16s} {name}")
        return 0
    work = Path(tempfile.mkdtemp(prefix="galerkit-mutants-"))
    try:
        tree = work / "src"
        shutil.copytree(ROOT / "kernel", tree / "galerkit",
                        ignore=shutil.ignore_patterns("__pycache__", "*.nbi", "*.nbc"))
        shutil.copytree(ROOT / "bindings", tree / "galerkit" / "bindings",
                        ignore=shutil.ignore_patterns("__pycache__", "*.nbi", "*.nbc"))
        shutil.copytree(ROOT / "tests", tree / "tests",
                        ignore=shutil.ignore_patterns("__pycache__"))
        probe = subprocess.run(
            [sys.executable, "-c", "import galerkit; print(galerkit.__file__)"],
            cwd=tree, capture_output=True, text=True,
            env=dict(os.environ, PYTHONPATH=str(tree), NUMBA_CACHE_DIR=str(work / "probe")))
        if not probe.stdout.strip().startswith(str(tree)):
            sys.exit(f"mutants: the copy is not the galerkit that Python imports: {probe}")
        for name, f, old, *_ in chosen:  # every fault must apply exactly once
            n = (ROOT / "kernel" / f).read_text().count(old)
            if n != 1:
                sys.exit(f"mutants: {name!r}: the text to change occurs {n} times in kernel/{f}")
        cache0 = work / "cache0"
        rc, failed, secs, out = run_selection(tree, cache0, stop_first=False)
        print(f"unmodified code: {'passes' if rc == 0 else 'FAILS'} ({secs:.0f} s)", flush=True)
        if rc != 0:
            print(out[-4000:])
            return 1
        survivors = []
        total = time.perf_counter()
        for i, (name, f, old, new, *first) in enumerate(chosen, 1):
            target = tree / "galerkit" / f
            pristine = target.read_text()
            cache = work / f"cache{i}"
            shutil.copytree(cache0, cache)
            drop_cache(cache, dependents(Path(f).stem))
            try:
                target.write_text(pristine.replace(old, new))
                rc, failed, secs, out = run_selection(tree, cache,
                                                      first=first[0] if first else None)
            finally:
                target.write_text(pristine)
                shutil.rmtree(cache, ignore_errors=True)
            # killed = a test failed (exit 1); a crash or collection error (exit >= 2)
            # is not counted as a kill: the fault must be seen by an assertion
            killed = rc == 1 and bool(failed)
            if not killed:
                survivors.append(name)
            what = failed[0] if failed else ("no test failed" if rc == 0 else
                                             f"pytest exit {rc}: {out.strip()[-300:]}")
            print(f"{i:2d}. {'killed  ' if killed else 'SURVIVED'} {name}  [{what}]  "
                  f"{secs:.0f} s", flush=True)
        print(f"{len(chosen) - len(survivors)} of {len(chosen)} faults killed "
              f"({time.perf_counter() - total:.0f} s)")
        return 1 if survivors else 0
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
