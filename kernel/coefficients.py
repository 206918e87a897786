"""Coefficients (conductivity, mass coefficient, source, flux) as arrays.

A coefficient reaches a kernel as validated arrays:

* a scalar -> ``values`` of shape (1, 1);
* a per-cell (or per-facet) array of shape (m,) -> (m, 1);
* a callable ``f(x)``, ``x`` of shape (dim, n) -> values at the physical
  quadrature points, shape (m, n_quadrature_points);
* for conductivities also a constant (d, d) or per-cell (m, d, d) symmetric
  positive definite tensor;
* a per-region value (:class:`~galerkit.regions.RegionCoefficient`, from a
  dict ``{region: value}``) -> per-cell values, or values at the quadrature
  points when a region's value is a callable (each callable sees the points
  of its own region's cells only); per-cell tensors when a region's value is
  a tensor.

Every value is checked to be finite (and positive, or SPD, where the
physics requires it) before any kernel sees it; an error names the first
offending cell or facet and the point.
"""

from __future__ import annotations

import numpy as np

from .errors import InputError
from .regions import RegionCoefficient

__all__ = ["evaluate_callable", "scalar_values", "tensor_values"]

#: points per block when evaluating a user callable (bounds temporary memory)
BLOCK_POINTS = 1 << 20


def evaluate_callable(func, x, name):
    """Call ``func`` on points ``x`` (dim, N) in blocks; validate the result.

    Returns
    -------
    ndarray, shape (N,), float64
    """
    n = x.shape[1]
    out = np.empty(n)
    for lo in range(0, n, BLOCK_POINTS):
        hi = min(n, lo + BLOCK_POINTS)
        xb = np.ascontiguousarray(x[:, lo:hi])
        try:
            v = func(xb)
        except InputError:
            raise
        except Exception as exc:
            raise InputError(
                f"{name}: the callable failed on points of shape {xb.shape}: "
                f"{type(exc).__name__}: {exc}. It must take x of shape (dim, n) and "
                "return shape (n,)"
            ) from exc
        v = _real_array(v, f"{name}: the callable returned")
        if v.ndim == 0:
            v = np.full(hi - lo, float(v))
        if v.shape != (hi - lo,):
            raise InputError(
                f"{name}: the callable returned shape {v.shape} for x of shape {xb.shape}; "
                f"expected ({hi - lo},)"
            )
        out[lo:hi] = v
    return out


def _real_array(v, what):
    """``v`` as a float64 array; complex, text and other non-numbers refused."""
    try:
        a = np.asarray(v)
    except Exception as exc:  # ragged lists and the like
        raise InputError(f"{what} something that is not an array of numbers ({exc})") from None
    if a.dtype.kind == "c":
        raise InputError(f"{what} complex values (dtype {a.dtype}); galerkit needs real numbers")
    if a.dtype.kind not in "biuf":
        try:
            a = a.astype(np.float64)
        except (TypeError, ValueError):
            raise InputError(
                f"{what} values of dtype {a.dtype} that are not real numbers") from None
    return a.astype(np.float64, copy=False)


def _first_bad(values, bad, where_shape, name, what, points=None, unit="cell", offset=0,
               todo=""):
    flat = np.flatnonzero(bad.ravel())
    i = int(flat[0])
    c = offset + (i // where_shape[1] if values.ndim == 2 else i)
    msg = (f"{name}: {what} value {float(values.ravel()[i])!r} in {unit} {c} "
           f"({flat.size} such values)")
    if points is not None:
        msg += f" at x = {points[:, i].tolist()}"
    raise InputError(msg + (f"; {todo}" if todo else ""))


#: positive coefficients below this (the smallest normal double) underflow
TINY = float(np.finfo(np.float64).tiny)
_RESCALE = ("it underflows double precision (smallest normal number 2.2e-308), so the "
            "matrix would be singular or meaningless; rescale the units of the problem")


def scalar_values(value, n_items, name, *, positive=False, points=None,
                  point_shape=None, unit="cell", nonnegative=False, first_item=0):
    """Normalise a scalar coefficient.

    Parameters
    ----------
    value : float, ndarray (n_items,), or callable
    n_items : int
        Number of cells (or facets).
    name : str
        For messages ("conductivity", "source", ...).
    positive : bool
        Require every value > 0 (conductivities).
    nonnegative : bool
        Require every value >= 0 (Robin heat transfer coefficients).
    first_item : int
        Number of the first item, for messages (blocks of cells).
    points : callable or None
        ``points()`` returns the physical quadrature points (dim, n_items*nq);
        only called for callables.
    point_shape : tuple
        ``(n_items, nq)`` of the points.

    Returns
    -------
    ndarray, shape (1, 1), (n_items, 1) or (n_items, nq), float64, C-contiguous
    """
    if isinstance(value, RegionCoefficient):
        if value.has_tensor:
            raise InputError(f"{name}: a per-region tensor is given where a scalar is needed")
        x = points() if value.has_callable else None
        v = value.cell_values(n_items, first_item, lambda: x, point_shape)
        _validate(v, name, positive, x, unit, nonnegative, first_item)
        return np.ascontiguousarray(v)
    if callable(value):
        x = points()
        v = evaluate_callable(value, x, name).reshape(point_shape)
        _validate(v, name, positive, x, unit, nonnegative, first_item)
        return np.ascontiguousarray(v)
    if isinstance(value, (bool, np.bool_)):
        raise InputError(f"{name}: expected a number, an array or a callable, got a bool")
    try:
        arr = np.asarray(value)
    except Exception:  # ragged lists and the like
        arr = np.empty(0, dtype=object)
    if arr.dtype == object or not (np.issubdtype(arr.dtype, np.number)):
        raise InputError(
            f"{name}: expected a number, an array of shape ({n_items},) or a callable, "
            f"got {type(value).__name__}"
        )
    if np.iscomplexobj(arr):
        raise InputError(f"{name}: complex values are not supported")
    arr = arr.astype(np.float64)
    if arr.ndim == 0:
        v = arr.reshape(1, 1)
    elif arr.shape == (n_items,):
        v = arr.reshape(n_items, 1)
    else:
        raise InputError(
            f"{name}: array of shape {arr.shape} given; expected a scalar or one value "
            f"per {unit}, shape ({n_items},)"
        )
    _validate(v, name, positive, None, unit, nonnegative, first_item)
    return np.ascontiguousarray(v)


def _validate(v, name, positive, points, unit, nonnegative=False, offset=0):
    bad = ~np.isfinite(v)
    if bad.any():
        _first_bad(v, bad, v.shape, name, "non-finite", points, unit, offset)
    if positive:
        bad = v <= 0
        if bad.any():
            _first_bad(v, bad, v.shape, name, "non-positive", points, unit, offset)
        bad = v < TINY
        if bad.any():
            _first_bad(v, bad, v.shape, name, "subnormal", points, unit, offset, _RESCALE)
    if nonnegative:
        bad = v < 0
        if bad.any():
            _first_bad(v, bad, v.shape, name, "negative", points, unit, offset)


def tensor_values(value, n_cells, dim, name):
    """A constant (d, d) or per-cell (m, d, d) SPD tensor -> (1|m, d, d).

    Returns ``None`` when ``value`` is not tensor-shaped (a scalar form).
    A per-region value with a tensor in some region gives per-cell tensors.
    """
    if isinstance(value, RegionCoefficient):
        if not value.has_tensor:
            return None
        value = value.tensors(dim)
    if callable(value):
        return None
    try:
        nd = np.ndim(value)
    except Exception:  # ragged nested lists
        raise InputError(f"{name}: cannot be read as an array of numbers (ragged nesting?); "
                         f"give a number, one value per cell, a callable, or a ({dim}, {dim}) "
                         "tensor") from None
    if nd < 2:
        return None
    arr = _real_array(value, f"{name}: the tensor holds")
    if arr.shape == (dim, dim):
        arr = arr.reshape(1, dim, dim)
    elif arr.shape != (n_cells, dim, dim):
        raise InputError(
            f"{name}: tensor of shape {arr.shape} given; expected ({dim}, {dim}) or "
            f"({n_cells}, {dim}, {dim})"
        )
    fin = np.isfinite(arr).all(axis=(1, 2))
    if not fin.all():
        c = int(np.flatnonzero(~fin)[0])
        raise InputError(f"{name}: tensor of cell {c} has non-finite entries")
    asym = np.abs(arr - arr.transpose(0, 2, 1)).max(axis=(1, 2))
    scale = np.abs(arr).max(axis=(1, 2))
    bad = asym > 1e-12 * np.maximum(scale, 1e-300)
    if bad.any():
        c = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"{name}: tensor of cell {c} is not symmetric: {arr[c].tolist()}; "
            "conductivity tensors must be symmetric positive definite"
        )
    lam = np.linalg.eigvalsh(arr).min(axis=1)
    bad = lam <= 0
    if bad.any():
        c = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"{name}: tensor of cell {c} is not positive definite (smallest eigenvalue "
            f"{lam[c]:.3e}); conductivity tensors must be symmetric positive definite"
        )
    bad = lam < TINY
    if bad.any():
        c = int(np.flatnonzero(bad)[0])
        raise InputError(f"{name}: tensor of cell {c} has the subnormal smallest eigenvalue "
                         f"{lam[c]:.3e}; {_RESCALE}")
    return np.ascontiguousarray(arr)
