"""What ``galerkit solve`` reads off a solution: heat flow, balance, regions, probes.

:func:`solution_quantities` gathers, for the ``[output]`` choices of a problem
file (:class:`~galerkit.bindings.command.problemfile.RunOptions`):

* ``fluxes``: the flux through each facet group (``integral kappa grad u . n``,
  positive in) or the heat from region ``a`` into ``b`` through an interface
  ``"a/b"``, consistent (residual-based; :mod:`galerkit.fluxes`) and, with
  ``gradient_flux``, the gradient flux beside it; by default every group with
  a condition;
* ``balance``: the source integral, the boundary flows and the imbalance;
* ``regions``: per cell region the cell count, volume, min / mean / max of u
  and the source integral;
* ``probes``: the values at the ``probes`` points.

:func:`quantity_lines` formats them for the report, :func:`write_probes_csv`
writes the probes as CSV (atomically).  :func:`error_bound` gives the
guaranteed energy-error bound of :func:`galerkit.estimate_error` (or why it is
not available) and :func:`bound_line` its report line.
"""

from __future__ import annotations

import io

import numpy as np

__all__ = ["solution_quantities", "quantity_lines", "write_probes_csv", "error_bound",
           "bound_line"]


def error_bound(sol, estimate=None, energy_error=None):
    """``(estimate or None, info)``: the error bound of ``sol`` and a JSON-ready summary.

    ``info`` holds ``available``; then ``bound``, ``relative`` (to the energy norm
    of the solution), ``energy_norm``, ``residual_estimate``, ``guaranteed``,
    ``terms``, ``notes`` and, with ``energy_error`` (the error against an exact
    solution), ``effectivity``; or ``reason``: one short phrase saying why the
    estimator does not cover this case (an unsupported case is not a failure).
    """
    import re

    from galerkit.errors import UnsupportedError
    from galerkit.estimators import estimate_error

    if estimate is None:
        try:
            estimate = estimate_error(sol)
        except UnsupportedError as exc:
            cause = re.split(r";|: |\. ", str(exc).removeprefix("estimate_error: "), maxsplit=1)[0]
            cells = {"triangle": "triangles", "tetrahedron": "tetrahedra"}.get(
                sol.mesh.cell_type, sol.mesh.cell_type)
            return None, {"available": False,
                          "reason": f"not available for P{sol.disc.degree} on {cells} ({cause})"}
    e = estimate
    info = {"available": True, "bound": e.bound,
            "relative": e.bound / e.energy_norm if e.energy_norm > 0 else None,
            "energy_norm": e.energy_norm, "residual_estimate": e.residual_estimate,
            "guaranteed": e.guaranteed, "terms": dict(e.terms), "notes": list(e.notes),
            "seconds": e.seconds}
    if energy_error is not None:
        info["effectivity"] = e.bound / energy_error if energy_error > 0 else None
    return e, info


def bound_line(info) -> str:
    """The report line of :func:`error_bound`'s summary."""
    if not info["available"]:
        return f"  error bound {info['reason']}"
    rel = "" if info["relative"] is None else f", {100 * info['relative']:.3g} % of the energy norm"
    kind = "guaranteed" if info["guaranteed"] else "NOT guaranteed, see the notes"
    eff = f", effectivity {info['effectivity']:.2f}" if info.get("effectivity") else ""
    return (f"  error bound {info['bound']:.3e} in the energy norm ({kind}{rel}{eff}; "
            f"residual estimate {info['residual_estimate']:.3e})")


def _is_interface(mesh, name):
    parts = name.split("/")
    return name not in mesh.facet_groups and (name in mesh.interfaces or (
        len(parts) == 2 and f"{parts[1]}/{parts[0]}" in mesh.interfaces))


def solution_quantities(sol, opts):
    """A dict with ``fluxes``, ``balance``, ``regions`` and ``probes`` (JSON-ready)."""
    mesh, problem = sol.mesh, sol.problem
    names = opts.fluxes
    if names is None:
        names = list(dict.fromkeys([*problem.dirichlet, *problem.neumann, *problem.robin]))
    fluxes = []
    for name in names:
        itf = _is_interface(mesh, name)
        get = sol.interface_flux if itf else sol.boundary_flux
        entry = {"name": name, "kind": "interface" if itf else "group",
                 "consistent": get(name, "consistent")}
        if opts.gradient_flux:
            entry["gradient"] = get(name, "gradient")
        fluxes.append(entry)
    hb = sol.heat_balance()
    balance = {"source": hb.source, "flows": hb.flows, "boundary": hb.boundary,
               "imbalance": hb.imbalance, "relative": hb.relative}
    regions = [{"name": r.name, "id": r.id, "cells": r.n_cells, "volume": r.volume,
                "min": r.u_min, "mean": r.u_mean, "max": r.u_max, "source": r.source}
               for r in sol.region_statistics()]
    probes = []
    if opts.probes is not None:
        values = sol.evaluate(np.ascontiguousarray(np.asarray(opts.probes).T))
        probes = [{"point": [float(c) for c in p], "value": float(v)}
                  for p, v in zip(opts.probes, values)]
    return {"fluxes": fluxes, "balance": balance, "regions": regions, "probes": probes}


def _g(v):
    return f"{v:.6g}"


def quantity_lines(q, opts):
    """Report lines (two leading spaces, a 12-character label) of :func:`solution_quantities`."""
    unit = f" {opts.units}" if opts.units else ""
    lines = []
    for f in q["fluxes"]:
        extra = f", gradient flux {_g(f['gradient'])}" if "gradient" in f else ""
        if f["kind"] == "interface":
            a, _, b = f["name"].partition("/")
            lines.append(f"  flux        {f['name']!r}: {_g(f['consistent'])} from {a!r} into "
                         f"{b!r} (consistent{extra})")
        else:
            lines.append(f"  flux        {f['name']!r}: {_g(f['consistent'])} "
                         f"(integral of k du/dn, > 0 into the domain; consistent{extra})")
    b = q["balance"]
    lines.append(f"  balance     sources {_g(b['source'])}, boundary flows {_g(b['boundary'])} "
                 f"(in), imbalance {b['imbalance']:.2e} (relative {b['relative']:.1e})")
    for r in q["regions"]:
        lines.append(f"  region      {r['name']!r}: {r['cells']} cells, volume {_g(r['volume'])}, "
                     f"{opts.name} {_g(r['min'])} .. {_g(r['max'])}{unit} (mean "
                     f"{_g(r['mean'])}), source integral {_g(r['source'])}")
    for i, p in enumerate(q["probes"], 1):
        at = ", ".join(_g(c) for c in p["point"])
        lines.append(f"  probe {i:<5d} ({at}): {opts.name} = {_g(p['value'])}{unit}")
    return lines


def write_probes_csv(path, q, opts):
    """The probes as CSV: ``x, y[, z], <name>``, one row per probe (atomically)."""
    from ..files import write_atomically

    dim = len(q["probes"][0]["point"])
    buf = io.StringIO()
    buf.write(",".join(["x", "y", "z"][:dim] + [opts.name]) + "\n")
    for p in q["probes"]:
        buf.write(",".join(repr(float(c)) for c in p["point"] + [p["value"]]) + "\n")
    text = buf.getvalue()

    def write(tmp):
        with open(tmp, "w", encoding="utf-8", newline="") as f:
            f.write(text)

    return write_atomically(path, write)
