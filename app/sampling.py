"""Undersampling masks and the effective sampling rate on the true k-space support.

A retrospective undersampling experiment applies a mask to the FFT of an image.
When the image was interpolated by zero-filling, only the central region of that
FFT holds acquired data (the *true support*, measured per axis by the
``zero_filling`` analyser); a variable-density mask samples that region more
densely than its nominal rate says, so the reconstruction problem is easier than
the nominal acceleration claims. This module builds the common mask families and
counts, over many seeded random masks, the rate inside the true support.

Mask families (``family``):

``uniform``
    Uniform random: every k-space sample (2D) or line (1D) equally likely.
``polynomial``
    Variable density with polynomial decay, density ``(1 - r) ** decay`` of the
    normalised distance ``r`` from the centre (Lustig, Donoho and Pauly 2007).
``gaussian``
    Gaussian variable density, ``exp(-r**2 / (2 sigma**2))``.
``poisson``
    Variable-density Poisson disc: random points no closer than a minimum
    distance that grows with ``r``, ``radius(r) = r0 * (1 + slope * r)``, ``r0``
    tuned to the acceleration (Bridson 2007 for the disc condition; Vasanawala et
    al. 2011 for its use in MRI). Built as a maximal set by Luby's parallel
    independent-set rounds on the k-space grid.
``equispaced``
    Equispaced lines (or a 2D lattice) outside a fully sampled calibration region,
    spaced so that the total count matches the acceleration (fastMRI's
    "equispaced" masks; Zbontar et al. 2018).

Every family takes ``calib``: the fully sampled central region, a number of lines
(int) or a fraction of the axis (float < 1); it counts toward the sample budget.

References
----------
.. [1] Lustig, M., Donoho, D. and Pauly, J. M. "Sparse MRI: the application of
   compressed sensing for rapid MR imaging", Magn. Reson. Med. 58:1182-1195, 2007.
.. [2] Bridson, R. "Fast Poisson disk sampling in arbitrary dimensions",
   SIGGRAPH sketches, 2007.
.. [3] Vasanawala, S. S. et al. "Practical parallel imaging compressed sensing MRI:
   summary of two years of experience in accelerating body MRI of pediatric
   patients", Proc. IEEE ISBI, 1039-1043, 2011.
.. [4] Luby, M. "A simple parallel algorithm for the maximal independent set
   problem", SIAM J. Comput. 15(4):1036-1053, 1986.
.. [5] Zbontar, J. et al. "fastMRI: an open dataset and benchmarks for accelerated
   MRI", arXiv:1811.08839, 2018.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy import ndimage

from app.errors import InputError

FAMILIES = ("uniform", "polynomial", "gaussian", "poisson", "equispaced")
_DEFAULT_CALIB = {"uniform": 0, "polynomial": 0, "gaussian": 0, "poisson": 0,
                  "equispaced": 0.08}
_PARAMS = {
    "uniform": {},
    "polynomial": {"decay": 2.0},
    "gaussian": {"sigma": 0.3},
    "poisson": {"slope": 2.0},
    "equispaced": {},
}
_AXES = {"rows": 0, "cols": 1}


def support_from_report(report: dict[str, Any]) -> dict[str, Any]:
    """The image size and true k-space support of a rawproof report (its contract dict).

    The one rule the ``sampling`` command and the web page's calculator share: the
    last two entries of ``input.shape``, and per in-plane axis the ``zero_filling``
    trace's ``support_fraction`` estimate, 1.0 (the full grid) where the report
    has none or a value outside (0, 1].

    Parameters
    ----------
    report : dict
        A report of ``shared/REPORT_CONTRACT.md``.

    Returns
    -------
    dict
        ``shape`` ([rows, cols]), ``support`` ([rows, cols] fractions) and
        ``zero_filling_status`` (the trace's status, or None).

    Raises
    ------
    InputError
        ``not_a_report`` when the report says no image size of two axes or more.
    """
    if not isinstance(report, dict) or "error" in report:
        raise InputError("not_a_report", "the file is not a rawproof report with results")
    shape = (report.get("input") or {}).get("shape") if isinstance(report.get("input"),
                                                                   dict) else None
    try:
        size = [int(n) for n in shape[-2:]] if isinstance(shape, list) and len(shape) >= 2 \
            else None
    except (TypeError, ValueError):
        size = None
    if size is None:
        raise InputError("not_a_report", "the report does not say the image size")
    trace = ((report.get("traces") or {}).get("zero_filling") or {})
    est = trace.get("estimates") or {}
    support = []
    for axis in ("rows", "cols"):
        entry = est.get(axis)
        f = entry.get("support_fraction") if isinstance(entry, dict) else None
        support.append(float(f) if isinstance(f, int | float) and 0 < f <= 1 else 1.0)
    return {"shape": size, "support": support, "zero_filling_status": trace.get("status")}


def default_parameters(family: str) -> dict[str, Any]:
    """The parameters a family takes (``calib`` included) with their defaults."""
    if family not in FAMILIES:
        raise InputError("bad_family", f"unknown mask family {family!r}; use one of "
                         + ", ".join(FAMILIES))
    return {**_PARAMS[family], "calib": _DEFAULT_CALIB[family]}


# ----- input checks ---------------------------------------------------------------------
def _check(
    shape: Sequence[int], support: Sequence[float], family: str, acceleration: float, dims: int
) -> tuple[tuple[int, int], tuple[float, float]]:
    if family not in FAMILIES:
        raise InputError("bad_family", f"unknown mask family {family!r}; use one of "
                         + ", ".join(FAMILIES))
    if dims not in (1, 2):
        raise InputError("bad_dims", "dims must be 1 (phase-encode lines) or 2")
    try:
        shp = (int(shape[0]), int(shape[1]))
        sup = (float(support[0]), float(support[1]))
        acc = float(acceleration)
    except (TypeError, ValueError, IndexError) as exc:
        raise InputError("bad_value", f"shape, support and acceleration must be numbers: {exc}"
                         ) from exc
    if len(shape) != 2 or len(support) != 2:
        raise InputError("bad_value", "shape and support need two values each (rows, cols)")
    if min(shp) < 4:
        raise InputError("bad_value", "the image must be at least 4 x 4")
    if not all(0.0 < f <= 1.0 for f in sup):
        raise InputError("bad_value", "support fractions must be in (0, 1]")
    if not 1.0 <= acc <= shp[0] * shp[1] / 2:
        raise InputError("bad_value", "acceleration must be at least 1 and leave samples")
    return shp, sup


def _params(family: str, params: dict[str, Any]) -> dict[str, Any]:
    allowed = set(_PARAMS[family]) | {"calib"}
    unknown = set(params) - allowed
    if unknown:
        raise InputError("bad_param", f"family {family!r} takes no parameter(s) "
                         f"{sorted(unknown)}; allowed: {sorted(allowed)}")
    out = dict(_PARAMS[family])
    out["calib"] = _DEFAULT_CALIB[family]
    for k, v in params.items():
        try:
            out[k] = float(v)
        except (TypeError, ValueError) as exc:
            raise InputError("bad_param", f"parameter {k} must be a number") from exc
    return out


# ----- geometry -------------------------------------------------------------------------
def central_slice(n: int, width: int) -> slice:
    """Centred index range of ``width`` samples on an axis of ``n`` (DC at ``n // 2``).

    The convention of centred zero-filling: the acquired block starts at
    ``n // 2 - width // 2``.
    """
    width = int(np.clip(width, 0, n))
    start = n // 2 - width // 2
    return slice(start, start + width)


def support_mask(shape: Sequence[int], support: Sequence[float]) -> np.ndarray:
    """Boolean ``(rows, cols)`` mask of the true support (a centred box)."""
    out = np.zeros((int(shape[0]), int(shape[1])), dtype=bool)
    rs = central_slice(out.shape[0], int(round(support[0] * out.shape[0])))
    cs = central_slice(out.shape[1], int(round(support[1] * out.shape[1])))
    out[rs, cs] = True
    return out


def _calib_width(n: int, calib: float) -> int:
    return int(round(calib * n)) if 0 < calib < 1 else int(calib)


def _radius_1d(n: int) -> np.ndarray:
    k = np.arange(n) - n // 2
    return np.abs(k) / max(1.0, n / 2)


def _radius_2d(shape: tuple[int, int]) -> np.ndarray:
    ry = _radius_1d(shape[0])[:, None]
    rx = _radius_1d(shape[1])[None, :]
    return np.minimum(1.0, np.sqrt(ry**2 + rx**2))


# ----- samplers -------------------------------------------------------------------------
def _weighted_pick(weights: np.ndarray, count: int, rng: np.random.Generator) -> np.ndarray:
    """``count`` distinct indices drawn without replacement with the given weights.

    Efraimidis and Spirakis's method: the largest ``u ** (1 / w)`` keys
    (Information Processing Letters 97:181-185, 2006).
    """
    w = np.asarray(weights, dtype=np.float64).ravel()
    count = int(min(count, np.count_nonzero(w > 0)))
    if count <= 0:
        return np.zeros(0, dtype=int)
    u = rng.random(w.size)
    with np.errstate(divide="ignore"):
        keys = np.where(w > 0, np.log(u) / np.where(w > 0, w, 1.0), -np.inf)
    return np.argpartition(-keys, count - 1)[:count]


def _density(family: str, r: np.ndarray, p: dict[str, Any]) -> np.ndarray:
    if family == "polynomial":
        return np.clip(1.0 - r, 1e-6, 1.0) ** p["decay"]
    if family == "gaussian":
        return np.exp(-(r**2) / (2.0 * p["sigma"] ** 2)) + 1e-12
    return np.ones_like(r)


def _luby_poisson(radius: np.ndarray, rng: np.random.Generator, allowed: np.ndarray
                  ) -> np.ndarray:
    """A maximal variable-radius Poisson-disc set on a grid (Luby's rounds).

    Each round keeps every undecided point whose random priority beats all undecided
    points within its own radius, then removes the points within the radius of the
    kept ones; rounds repeat until none is undecided. Radii are quantised to at most
    8 levels (half-sample steps) so that each level is one maximum filter.
    """
    shape = radius.shape
    prio = rng.random(shape)
    level_r = np.maximum(0.5, np.round(radius * 2.0) / 2.0)
    levels = np.unique(level_r)
    if len(levels) > 8:
        edges = np.quantile(level_r, np.linspace(0, 1, 9))
        idx = np.clip(np.searchsorted(edges, level_r, side="right") - 1, 0, 7)
        level_r = np.array([level_r[idx == i].max() if np.any(idx == i) else 0.5
                            for i in range(8)])[idx]
        levels = np.unique(level_r)
    feet = []
    for r in levels:
        h = int(np.ceil(r))
        if radius.ndim == 1:
            yy = np.arange(-h, h + 1)
            fp = np.abs(yy) < r
        else:
            yy, xx = np.mgrid[-h:h + 1, -h:h + 1]
            fp = (yy**2 + xx**2) < r**2
        feet.append(fp)
    undecided = allowed.copy()
    selected = np.zeros(shape, dtype=bool)
    lev_masks = [level_r == r for r in levels]
    for _ in range(200):
        if not undecided.any():
            break
        p = np.where(undecided, prio, -1.0)
        new = np.zeros(shape, dtype=bool)
        for lm, fp in zip(lev_masks, feet, strict=True):
            cand = lm & undecided
            if not cand.any():
                continue
            fp_excl = fp.copy()
            fp_excl[tuple(s // 2 for s in fp.shape)] = False
            neigh = ndimage.maximum_filter(p, footprint=fp_excl, mode="constant", cval=-1.0) \
                if fp_excl.any() else np.full(shape, -1.0)
            new |= cand & (p > neigh)
        selected |= new
        blocked = new.copy()
        for lm, fp in zip(lev_masks, feet, strict=True):
            src = new & lm
            if src.any():
                blocked |= ndimage.binary_dilation(src, structure=fp)
        undecided &= ~blocked
    return selected


def _poisson_mask(n_shape: tuple[int, ...], r: np.ndarray, budget: int, slope: float,
                  allowed: np.ndarray, rng: np.random.Generator, r0: float | None
                  ) -> tuple[np.ndarray, float]:
    """Poisson-disc mask with about ``budget`` points inside ``allowed``; returns r0 too."""
    area = float(np.count_nonzero(allowed))
    shape_factor = (1.0 + slope * r[allowed]).mean()
    if r0 is None:
        # saturated random packing: density ~ 0.7 / radius^2 in 2D, ~0.75 / radius in 1D
        r0 = (np.sqrt(0.7 * area / max(budget, 1)) if r.ndim == 2
              else 0.75 * area / max(budget, 1)) / shape_factor
        for _ in range(6):
            got = np.count_nonzero(_luby_poisson(r0 * (1 + slope * r), rng, allowed))
            ratio = got / max(budget, 1)
            if abs(ratio - 1) < 0.03:
                break
            r0 *= np.sqrt(ratio) if r.ndim == 2 else ratio
    sel = _luby_poisson(r0 * (1 + slope * r), rng, allowed)
    return sel, float(r0)


def _fix_count(sel: np.ndarray, budget: int, weights: np.ndarray, allowed: np.ndarray,
               rng: np.random.Generator) -> np.ndarray:
    """Add or drop random points so that exactly ``budget`` are kept."""
    sel = sel.copy()
    have = int(np.count_nonzero(sel))
    if have > budget:
        on = np.flatnonzero(sel)
        drop = rng.choice(on, size=have - budget, replace=False)
        sel.flat[drop] = False
    elif have < budget:
        w = np.where(allowed & ~sel, weights, 0.0)
        add = _weighted_pick(w, budget - have, rng)
        sel.flat[add] = True
    return sel


def _equispaced(n_shape: tuple[int, ...], budget: int, allowed: np.ndarray,
                rng: np.random.Generator) -> np.ndarray:
    """Equispaced lattice over ``allowed`` with about ``budget`` points, random offset."""
    sel = np.zeros(n_shape, dtype=bool)
    if budget <= 0:
        return sel
    if len(n_shape) == 1:
        free = np.flatnonzero(allowed)
        step = len(free) / budget
        pos = (rng.random() * step + step * np.arange(budget)).astype(int)
        sel[free[np.clip(pos, 0, len(free) - 1)]] = True
        return sel
    total = float(np.count_nonzero(allowed))
    step = max(1, int(round(np.sqrt(total / budget))))
    oy, ox = rng.integers(0, step, size=2)
    lattice = np.zeros(n_shape, dtype=bool)
    lattice[oy::step, ox::step] = True
    return lattice & allowed


def make_mask(
    shape: Sequence[int],
    family: str,
    acceleration: float,
    *,
    dims: int = 1,
    axis: str = "cols",
    seed: int | np.random.Generator | None = 0,
    **params: Any,
) -> np.ndarray:
    """One undersampling mask over a centred k-space grid.

    Parameters
    ----------
    shape : (rows, cols)
    family : {"uniform", "polynomial", "gaussian", "poisson", "equispaced"}
    acceleration : float
        Nominal acceleration R: the mask keeps ``round(N / R)`` of ``N`` samples
        (lines in 1D), calibration region included (2D lattices: as close as the
        lattice allows).
    dims : {1, 2}
        1: whole phase-encode lines indexed along ``axis``; 2: single samples.
    axis : {"rows", "cols"}
        For ``dims=1``, the axis along which lines are chosen.
    seed : int or Generator
    **params
        ``calib`` and the family's own (``decay``, ``sigma``, ``slope``).

    Returns
    -------
    ndarray of bool, shape ``(rows, cols)``; DC at ``(rows // 2, cols // 2)``.

    References
    ----------
    .. [1] Lustig, Donoho and Pauly, Magn. Reson. Med. 58:1182-1195, 2007.
    .. [2] Zbontar et al., fastMRI, arXiv:1811.08839, 2018.
    """
    return _make_mask(shape, family, acceleration, dims=dims, axis=axis, seed=seed,
                      cache={}, **params)


def _make_mask(
    shape: Sequence[int],
    family: str,
    acceleration: float,
    *,
    dims: int,
    axis: str,
    seed: int | np.random.Generator | None,
    cache: dict[str, Any],
    **params: Any,
) -> np.ndarray:
    """:func:`make_mask`, reusing a tuned Poisson-disc radius from ``cache``."""
    shp, _ = _check(shape, (1.0, 1.0), family, acceleration, dims)
    p = _params(family, params)
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    if dims == 1:
        if axis not in _AXES:
            raise InputError("bad_value", "axis must be 'rows' or 'cols'")
        n = shp[_AXES[axis]]
        grid: tuple[int, ...] = (n,)
        r = _radius_1d(n)
        total = n
    else:
        grid = shp
        r = _radius_2d(shp)
        total = shp[0] * shp[1]
    budget = int(round(total / float(acceleration)))
    calib = np.zeros(grid, dtype=bool)
    if dims == 1:
        calib[central_slice(n, _calib_width(n, p["calib"]))] = True
    else:
        calib[central_slice(shp[0], _calib_width(shp[0], p["calib"])),
              central_slice(shp[1], _calib_width(shp[1], p["calib"]))] = True
    n_calib = int(np.count_nonzero(calib))
    if n_calib > budget:
        raise InputError("bad_param", f"the calibration region ({n_calib} samples) exceeds the "
                         f"budget of acceleration {acceleration} ({budget} samples)")
    allowed = ~calib
    rest = budget - n_calib
    if family == "equispaced":
        sel = _equispaced(grid, rest, allowed, rng)
    elif family == "poisson":
        sel, cache["r0"] = _poisson_mask(grid, r, rest, p["slope"], allowed, rng,
                                         cache.get("r0"))
        sel = _fix_count(sel, rest, 1.0 / (1.0 + p["slope"] * r) ** len(grid), allowed, rng)
    else:
        w = np.where(allowed, _density(family, r, p), 0.0)
        sel = np.zeros(grid, dtype=bool)
        sel.flat[_weighted_pick(w, rest, rng)] = True
    m = sel | calib
    if dims == 2:
        return m
    return np.broadcast_to(m[None, :] if axis == "cols" else m[:, None], shp).copy()


# ----- rates ----------------------------------------------------------------------------
def mask_rates(mask: np.ndarray, support: Sequence[float]) -> dict[str, float]:
    """Direct count: the fraction of samples a mask keeps, overall and in the support.

    Parameters
    ----------
    mask : ndarray of bool, ``(rows, cols)``, centred (DC at ``n // 2``)
    support : (rows fraction, cols fraction)

    Returns
    -------
    dict
        ``nominal_rate`` (kept / all), ``support_rate`` (kept in the support / support
        samples), ``outside_rate`` (kept outside / samples outside, NaN if none).

    References
    ----------
    .. [1] Lustig, Donoho and Pauly, Magn. Reson. Med. 58:1182-1195, 2007 (sampling
       density as the fraction of k-space samples kept).
    """
    m = np.asarray(mask, dtype=bool)
    sup = support_mask(m.shape, support)
    n_sup = int(np.count_nonzero(sup))
    n_out = m.size - n_sup
    return {
        "nominal_rate": float(np.count_nonzero(m)) / m.size,
        "support_rate": float(np.count_nonzero(m & sup)) / max(1, n_sup),
        "outside_rate": float(np.count_nonzero(m & ~sup)) / n_out if n_out else float("nan"),
    }


def _summary(values: list[float]) -> tuple[float, float]:
    a = np.asarray(values, dtype=np.float64)
    return float(a.mean()), float(a.std(ddof=1)) if len(a) > 1 else 0.0


def rates_of_masks(masks: Sequence[np.ndarray], support: Sequence[float]) -> dict[str, Any]:
    """Mean and spread of the rates of given masks (for masks from other sources)."""
    per = [mask_rates(m, support) for m in masks]
    nom, nom_sd = _summary([p["nominal_rate"] for p in per])
    sup, sup_sd = _summary([p["support_rate"] for p in per])
    _, eff_sd = _summary([1.0 / p["support_rate"] if p["support_rate"] > 0 else np.inf
                          for p in per])
    eff = 1.0 / sup if sup > 0 else float("inf")
    return {
        "n_masks": len(per),
        "nominal_rate": nom,
        "nominal_rate_std": nom_sd,
        "nominal_acceleration_measured": 1.0 / nom if nom > 0 else None,
        "support_rate": sup,
        "support_rate_std": sup_sd,
        "effective_acceleration": eff,
        "effective_acceleration_std": eff_sd,
    }


def random_masks(
    shape: Sequence[int],
    family: str,
    acceleration: float,
    *,
    dims: int = 1,
    axis: str = "cols",
    n_masks: int = 20,
    seed: int = 0,
    **params: Any,
) -> list[np.ndarray]:
    """The seeded masks :func:`effective_rate` averages over (mask ``i`` from child ``i``
    of ``numpy.random.SeedSequence(seed)``; a Poisson-disc radius is tuned once).

    References
    ----------
    .. [1] Lustig, Donoho and Pauly, Magn. Reson. Med. 58:1182-1195, 2007.
    """
    if not 1 <= int(n_masks) <= 10000:
        raise InputError("bad_value", "n_masks must be between 1 and 10000")
    children = np.random.SeedSequence(int(seed)).spawn(int(n_masks))
    cache: dict[str, Any] = {}
    return [_make_mask(shape, family, acceleration, dims=dims, axis=axis,
                       seed=np.random.default_rng(c), cache=cache, **params) for c in children]


def effective_rate(
    shape: Sequence[int],
    support: Sequence[float],
    family: str,
    acceleration: float,
    *,
    dims: int = 1,
    axis: str = "cols",
    n_masks: int = 20,
    seed: int = 0,
    **params: Any,
) -> dict[str, Any]:
    """Nominal rate, rate inside the true support and effective acceleration of a family.

    Parameters
    ----------
    shape : (rows, cols)
        The image (FFT) size the masks are drawn on.
    support : (rows fraction, cols fraction)
        The true support per axis (``zero_filling``'s ``support_fraction``); (1, 1)
        for a raw acquisition.
    family, acceleration, dims, axis, **params
        As in :func:`make_mask`.
    n_masks : int
        Random masks averaged (seeded, reproducible).
    seed : int
        Seed of the first mask; mask ``i`` uses a child of ``SeedSequence(seed)``.

    Returns
    -------
    dict
        ``family``, ``dims``, ``axis``, ``shape``, ``support``, ``params``,
        ``acceleration`` (nominal R), ``nominal_rate`` (+ ``_std``), ``support_rate``
        (+ ``_std``), ``effective_acceleration`` (1 / mean support rate; ``_std`` is
        the spread of 1 / support rate over masks), ``support_samples`` and ``n_masks``, ``seed``.

    References
    ----------
    .. [1] Lustig, Donoho and Pauly, Magn. Reson. Med. 58:1182-1195, 2007.
    """
    shp, sup = _check(shape, support, family, acceleration, dims)
    p = _params(family, params)
    masks = random_masks(shp, family, acceleration, dims=dims, axis=axis, n_masks=n_masks,
                         seed=seed, **p)
    out = {
        "family": family,
        "dims": dims,
        "axis": axis if dims == 1 else None,
        "shape": list(shp),
        "support": list(sup),
        "params": p,
        "acceleration": float(acceleration),
        "support_samples": int(np.count_nonzero(support_mask(shp, sup))),
        "seed": int(seed),
    }
    out.update(rates_of_masks(masks, sup))
    return out


def curve(
    shape: Sequence[int],
    support: Sequence[float],
    family: str,
    accelerations: Sequence[float],
    *,
    dims: int = 1,
    axis: str = "cols",
    n_masks: int = 10,
    seed: int = 0,
    **params: Any,
) -> dict[str, Any]:
    """Effective against nominal acceleration, for the given support and for raw data.

    Returns
    -------
    dict
        ``acceleration`` (the nominal values), ``effective`` and ``effective_std`` on
        the given support, ``raw_effective`` and ``raw_effective_std`` on the full grid
        (support 1, a raw acquisition), plus ``family``, ``dims``, ``support``.

    References
    ----------
    .. [1] Lustig, Donoho and Pauly, Magn. Reson. Med. 58:1182-1195, 2007.
    """
    eff, eff_sd, raw, raw_sd = [], [], [], []
    for r in accelerations:
        a = effective_rate(shape, support, family, r, dims=dims, axis=axis, n_masks=n_masks,
                           seed=seed, **params)
        b = effective_rate(shape, (1.0, 1.0), family, r, dims=dims, axis=axis,
                           n_masks=n_masks, seed=seed, **params)
        eff.append(a["effective_acceleration"])
        eff_sd.append(a["effective_acceleration_std"])
        raw.append(b["effective_acceleration"])
        raw_sd.append(b["effective_acceleration_std"])
    return {
        "family": family,
        "dims": dims,
        "support": [float(s) for s in support],
        "acceleration": [float(r) for r in accelerations],
        "effective": eff,
        "effective_std": eff_sd,
        "raw_effective": raw,
        "raw_effective_std": raw_sd,
    }
