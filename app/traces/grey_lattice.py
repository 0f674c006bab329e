"""Grey-level lattices: integer data seen through a linear intensity map.

Two questions about the distinct values of an image, asked by different analysers:

- :func:`find_lattice` undoes an affine map ``v = a * k + b`` with integer ``k``,
  tolerating the rounding of a rescale to integers (about half a grey level), so
  that a JPEG decoded to 8 or 12 bits and rescaled to 16 bits is measured in its
  own grey levels (the JPEG finding of :mod:`app.traces.jpeg_pixels`);
- :func:`lattice_step` asks for the exact common step ``d`` of ``v0 + k d`` (the
  greatest common divisor of the integer gaps, or a float step within a relative
  tolerance), which the constant-background, quantisation and coil-combination
  analysers use to tell a lattice of stored levels from continuous values.

They answer different questions (an approximate affine lattice with its offset
against an exact step), so both are kept, here in one place.

References
----------
Common practice, no source: a linear rescale of integer data keeps the values on
an arithmetic progression; its step is the robust common difference.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class Lattice:
    """An affine grey-level lattice ``v = a * k + b`` with integer ``k``.

    Attributes
    ----------
    found : bool
    a, b : float
        Lattice step and offset (``a = 1, b = 0`` for plain integers).
    n_levels : int
        Distinct values seen.
    span : int
        ``k_max - k_min``: how many lattice steps the data cover.
    max_residual : float
        Largest ``|v - (a k + b)|``; about 0.5 for integer-rounded rescaling (0.75 allowed).
    reason : str
        Why no lattice was found (empty when found).
    """

    found: bool
    a: float = 1.0
    b: float = 0.0
    n_levels: int = 0
    span: int = 0
    max_residual: float = 0.0
    reason: str = ""


def find_lattice(values: np.ndarray, *, max_levels: int = 65536) -> Lattice:
    """Find an affine lattice ``v = a * k + b`` (integer ``k``) carrying the values.

    The step ``a`` is estimated from the differences of the sorted distinct values:
    the smallest differences belong to neighbouring lattice levels (within one unit
    when the rescaled values were rounded to integers); the lattice index of every
    value then follows, and ``a, b`` are refined by least squares.

    Parameters
    ----------
    values : ndarray
        Grey levels (any real dtype).
    max_levels : int
        More distinct values, or a lattice of more steps, than this are not treated
        as a lattice.

    Returns
    -------
    Lattice

    References
    ----------
    Common practice, no source: a linear rescale of integer data keeps the values on
    an arithmetic progression; its step is the robust common difference.
    """
    v = np.asarray(values)
    if np.iscomplexobj(v):
        return Lattice(False, reason="complex values")
    u = np.unique(v[np.isfinite(v)].astype(np.float64))
    n = int(u.size)
    if n < 2:
        return Lattice(False, n_levels=n, reason="fewer than two distinct values")
    if n > max_levels:
        return Lattice(False, n_levels=n, reason=f"{n} distinct values, not a lattice")
    d = np.diff(u)
    integer = bool(np.all(u == np.round(u)))
    dmin = float(d.min())
    tol = 1.0 + 1e-9 if integer and dmin >= 1.5 else 1e-6 * max(1.0, float(np.abs(u).max()))
    if integer and dmin < 1.5:
        a0 = 1.0
    else:
        near = d[d <= dmin + 2 * tol]
        a0 = float(np.mean(near))
    a, b = a0, float(u[0])
    for _ in range(3):
        k = np.round((u - b) / a)
        if k[-1] - k[0] > 16 * max_levels:
            return Lattice(False, n_levels=n, reason="values are not on a regular lattice")
        if np.ptp(k) == 0:
            break
        a, b = np.polyfit(k, u, 1)
        a, b = float(a), float(b)
    k = np.round((u - b) / a)
    if k[-1] - k[0] > max_levels:
        return Lattice(False, n_levels=n, reason=f"the values would need {int(k[-1] - k[0])} "
                       "lattice steps: not a regular lattice")
    res = float(np.max(np.abs(u - (a * k + b))))
    limit = 0.75 if integer and a > 1.5 else 1e-4 * max(1.0, a)
    if integer and abs(a - 1.0) < 1e-9:
        res = 0.0
    if res > limit:
        return Lattice(False, n_levels=n, max_residual=res,
                       reason="values are not on a regular lattice")
    if integer and a < 1.5:
        a, b = 1.0, 0.0
    else:
        # put b on the lowest value's lattice level so that k starts at 0
        b = b + a * float(k[0])
    return Lattice(True, a=a, b=b, n_levels=n, span=int(k[-1] - k[0]), max_residual=res)


def lattice_levels(values: np.ndarray, lattice: Lattice) -> np.ndarray:
    """Integer lattice index ``k = round((v - b) / a)`` of each value (float64)."""
    return np.round((np.asarray(values, dtype=np.float64) - lattice.b) / lattice.a)


LATTICE_TOL = 0.01


def lattice_step(values: np.ndarray, *, tol: float = LATTICE_TOL) -> float | None:
    """The step ``d`` of a lattice ``v0 + k d`` that holds all ``values``, or None.

    Integers: the greatest common divisor of the gaps between distinct values.
    Floats: the smallest gap between distinct values, accepted when every value
    lies within ``tol * d`` of the lattice (float images quantised to a few
    levels and then scaled). Common practice, no source.
    """
    v = np.asarray(values).ravel()
    if v.dtype.kind == "f":
        v = v[np.isfinite(v)]
    u = np.unique(v)
    if u.size < 2:
        return None
    if u.dtype.kind in "iub":
        return float(np.gcd.reduce(np.diff(u.astype(np.int64)))) or None
    if u.size > 1_000_000:
        return None
    u = u.astype(np.float64)
    d = float(np.diff(u).min())
    span = float(u[-1] - u[0])
    if d <= 0 or span / d > 1e7:
        return None
    d = span / round(span / d)
    r = (u - u[0]) / d
    return d if float(np.max(np.abs(r - np.round(r)))) <= tol else None
