"""Quantisation step of each 8 x 8 DCT frequency from the periodicity of its coefficients.

Pure functions (arrays in, arrays out): :func:`estimate_steps` scores every
candidate step of each of the 64 frequencies by the share of informative
coefficients that lie on its multiples, against the share expected by chance.
The block grid the coefficients come from is found in :mod:`app.traces.dct_grid`.

References
----------
Z. Fan and R. L. de Queiroz, "Identification of bitmap compression history: JPEG
detection and quantizer estimation", IEEE Trans. Image Processing 12(2):230-235,
2003, section III.
"""

from __future__ import annotations

import numpy as np

#: Residual tolerance (grey-level DCT units) for a coefficient to count as lying on a
#: multiple of a candidate step. Decoded pixels are rounded to integers (variance
#: 1/12 per pixel, the same per coefficient for an orthonormal DCT: std 0.29), so one
#: unit is over three standard deviations.
_TOL = 1.0
#: Largest DCT coefficient that rounding the 64 pixels of a block can make on its own
#: (0.5 times the largest l1 norm of an orthonormal 8 x 8 basis function, 8): such
#: coherent rounding patterns of nearly flat blocks are structured, not uniform, so
#: coefficients up to this size carry no information about a step.
_ROUNDING_MAX = 4.0
#: Smallest share of the informative coefficients that must fit a step.
_MIN_FIT = 0.85
#: One-sided z score (binomial, against the share expected by chance) a step needs.
_MIN_Z = 6.0
#: Fewest informative coefficients for a step to be measured.
_MIN_SUPPORT = 8
#: Coefficients per frequency scored at most (evenly spaced; bounds the run time).
_MAX_COEFS = 1500
#: Informative coefficients needed to call a frequency's step 1 (fine, no lattice).
_MIN_SUPPORT_FINE = 80


def _informative(x: np.ndarray, q: np.ndarray, tol: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Which AC coefficients are scored for candidate step ``q``, and their chance of a hit.

    Coefficients up to ``_ROUNDING_MAX`` can be coherent rounding patterns of nearly
    flat blocks and say nothing about a step. A lattice bin ``[kq - q/2, kq + q/2)``
    wholly above that floor is scored whole (chance of a hit ``2 tol / q`` for a
    smooth density); a bin the floor cuts through is scored only inside the window
    ``|c - kq| <= d`` that the floor leaves symmetric around the multiple (chance
    ``tol / d``), since a one-sided cut would put the steep lower tail of the
    coefficient distribution near the multiple and fake a fit. For steps above
    ``2 * _ROUNDING_MAX``, the outer half of the zero bin is scored too, as certain
    misses: there a coarser candidate than the true step sees the true step's
    multiples.

    Returns
    -------
    inform : ndarray of bool
    p : ndarray
        Probability of a hit under no lattice (0 where not informative).
    """
    a = np.abs(x)
    k = np.round(a / q)
    centre = k * q
    d = np.minimum(centre - _ROUNDING_MAX, q / 2)
    in_bin = (k >= 1) & (d > tol) & (np.abs(a - centre) <= d)
    zero_outer = (k == 0) & (q / 2 > _ROUNDING_MAX) & (a >= np.maximum(q / 4, _ROUNDING_MAX))
    p = np.where(in_bin, tol / np.where(d > 0, d, 1.0), 0.0)
    return in_bin | zero_outer, np.clip(p, 0.0, 1.0)


def _candidate_scores(s: np.ndarray, q: np.ndarray, *, dc: bool
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Informative count, share on the lattice, binomial z and mean |residual| per step.

    AC coefficients are scored as :func:`_informative` says (inlined here, in single
    precision, for speed).
    """
    tol = np.minimum(_TOL, q / 4)
    nq = np.zeros(q.size, dtype=int)
    frac = np.zeros(q.size)
    mres = np.zeros(q.size)
    z = np.zeros(q.size)
    chunk = max(1, 2_000_000 // max(s.size, 1))
    a = np.abs(s).astype(np.float32)[None, :]
    for i in range(0, q.size, chunk):
        qq = q[i:i + chunk, None].astype(np.float32)
        tt = tol[i:i + chunk, None].astype(np.float32)
        if dc:
            x = s[None, :]
            # the DC level shift is unknown after an affine rescale: fit the phase
            ph = np.angle(np.mean(np.exp(2j * np.pi * x / qq), axis=1, keepdims=True))
            x = x - ph * qq / (2 * np.pi)
            dev = np.abs(x - qq * np.round(x / qq))
            inform = np.ones(x.shape, dtype=bool)
            hit = dev <= tt
            p = np.broadcast_to(2 * tt / qq, x.shape)
        else:
            k = np.rint(a / qq)
            centre = k * qq
            dev = np.abs(a - centre)
            d = np.minimum(centre - np.float32(_ROUNDING_MAX), qq / 2)
            in_bin = (k >= 1) & (d > tt) & (dev <= d)
            zero_outer = ((k == 0) & (qq / 2 > _ROUNDING_MAX)
                          & (a >= np.maximum(qq / 4, np.float32(_ROUNDING_MAX))))
            inform = in_bin | zero_outer
            hit = in_bin & (dev <= tt)
            p = np.where(in_bin, tt / np.where(d > 0, d, np.float32(1)), np.float32(0))
            np.clip(p, 0, 1, out=p)
        n = inform.sum(axis=1)
        h = hit.sum(axis=1)
        ep = p.sum(axis=1, dtype=np.float64)
        var = (p * (1 - p)).sum(axis=1, dtype=np.float64)
        nq[i:i + chunk] = n
        frac[i:i + chunk] = h / np.maximum(n, 1)
        res = np.where(inform, dev, 0).sum(axis=1, dtype=np.float64)
        mres[i:i + chunk] = res / np.maximum(n, 1)
        z[i:i + chunk] = (h - ep) / np.sqrt(np.maximum(var, 1e-12))
    return nq, frac, z, mres


#: Screening passes: coefficients scored per candidate step before the full pass.
_SCREEN_COEFS = (64, 256)
#: A candidate is dropped after a screening pass when its screened hits are so few
#: that a step with a full-sample share of _MIN_FIT (0.85) on its lattice would show
#: them with probability below this (binomial lower tail).
_SCREEN_P = 1e-5


def _screened_scores(s: np.ndarray, q: np.ndarray, *, dc: bool
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_candidate_scores` on every step, cheaply: screen on subsamples first.

    The full scores are computed only for steps that the screening passes (evenly
    spaced subsamples of 64, then 256 coefficients) cannot rule out: a step is ruled
    out when the binomial probability of so few lattice hits among the screened
    informative coefficients, for a step whose true share is 0.85, is below
    ``_SCREEN_P``. The others get zero support, which no acceptance rule passes;
    every step that could be accepted gets exactly the full computation.
    """
    from scipy.stats import binom

    keep = np.ones(q.size, dtype=bool)
    for size in _SCREEN_COEFS:
        if s.size <= 2 * size or keep.sum() <= 8:
            break
        sub = s[np.linspace(0, s.size - 1, size).round().astype(int)]
        n_s, f_s, _, _ = _candidate_scores(sub, q[keep], dc=dc)
        alive = binom.cdf(np.rint(f_s * n_s), n_s, _MIN_FIT) >= _SCREEN_P
        keep[np.flatnonzero(keep)[~alive]] = False
    nq = np.zeros(q.size, dtype=int)
    frac = np.zeros(q.size)
    z = np.zeros(q.size)
    mres = np.full(q.size, np.inf)
    if np.any(keep):
        nq[keep], frac[keep], z[keep], mres[keep] = _candidate_scores(s, q[keep], dc=dc)
    return nq, frac, z, mres


def _multiple_of_true_step(s: np.ndarray, q: float, m: int, *, dc: bool) -> bool:
    """Whether step ``q`` stands against its divisor ``q / m``.

    Multiples of the true step fit every divisor, so the divisor wins only where
    it explains coefficients the coarser step cannot: among the scored
    coefficients off the ``q`` lattice, at least 3, with a share of 0.85 on the
    ``q / m`` lattice and a z score of 4 against chance. (Under the coarser step,
    the coefficients off its lattice are rounding noise and fit the finer one only
    by chance.)
    """
    qf = q / m
    tol_f = min(_TOL, qf / 4)
    tol_c = min(_TOL, q / 4)
    if dc:
        # both lattices through the origin of the coarser one (unknown level shift)
        ph = np.angle(np.mean(np.exp(2j * np.pi * s / q)))
        x = s - ph * q / (2 * np.pi)
        p = np.full(x.shape, 2 * tol_f / qf)
    else:
        inform, p = _informative(s, np.float64(qf), np.float64(tol_f))
        x, p = s[inform], p[inform]
    off = np.abs(x - q * np.round(x / q)) > tol_c
    x, p = x[off], p[off]
    n = int(x.size)
    if n < 3:
        return True
    hits = np.abs(x - qf * np.round(x / qf)) <= tol_f
    z = (hits.sum() - p.sum()) / np.sqrt(max(float((p * (1 - p)).sum()), 1e-12))
    return not (hits.mean() >= _MIN_FIT and z >= 4.0)


def _step_for(c: np.ndarray, *, dc: bool, max_step: int) -> tuple[float, int, float, float]:
    """Largest step whose multiples carry the coefficients ``c`` (one frequency).

    Returns ``(step, support, fit, z)``; step NaN when too few informative
    coefficients, 1 when many coefficients show no step above 1.
    """
    s = c if dc else c[np.abs(c) >= 1.5]  # the zero cluster fits every step
    if s.size > _MAX_COEFS:
        s = s[np.linspace(0, s.size - 1, _MAX_COEFS).round().astype(int)]
    n = int(s.size)
    if n < _MIN_SUPPORT:
        return float("nan"), n, float("nan"), 0.0
    top = max_step if dc else int(min(max_step, 2 * np.max(np.abs(s)) + 2))
    q = np.arange(2, max(top, 2) + 1, dtype=np.float64)
    nq, frac, z, mres = _screened_scores(s, q, dc=dc)
    good = (nq >= _MIN_SUPPORT) & (frac >= _MIN_FIT) & (z >= _MIN_Z)
    if not np.any(good):
        # a step of 1 only where many coefficients are too large to be rounding
        # patterns (whose magnitude is at most 0.5 * 8 = 4) and still fit no step
        strong = int(np.sum(np.abs(s) > _ROUNDING_MAX)) if not dc else n
        step = 1.0 if strong >= _MIN_SUPPORT_FINE else float("nan")
        return step, n, float("nan"), 0.0
    j = int(np.nonzero(good)[0][-1])
    # the tolerance lets a few steps next to the true one fit the same clusters:
    # take the best-fitting one among the good steps just below the largest
    near = np.nonzero(good & (q >= 0.9 * q[j] - 1))[0]
    j = int(near[np.argmin(mres[near] - 1e-9 * q[near])])
    changed = True
    while changed:
        changed = False
        for m in (2, 3, 5, 7):
            qf = q[j] / m
            if qf >= 2 and qf == int(qf) and good[int(qf) - 2] and not _multiple_of_true_step(
                    s, float(q[j]), m, dc=dc):
                j = int(qf) - 2
                changed = True
                break
    return float(q[j]), int(nq[j]), float(frac[j]), float(z[j])


def estimate_steps(coefs: np.ndarray, *, max_step: int = 255
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Quantisation step of each of the 64 DCT frequencies from its histogram's period.

    For each frequency, the coefficients of the decoded blocks lie near integer
    multiples of the step (blurred by about +-1 from rounding the decoded pixels).
    Every candidate step ``q = 2 .. max_step`` is scored by the share of informative
    coefficients within one unit of a multiple of ``q`` (coefficients above the
    largest rounding pattern, 4, in whole or symmetrically cut lattice bins; see
    :func:`_informative`), against the share expected by chance; the largest ``q``
    with a share of at least 0.85 and a z score of at least 6 is the estimate,
    refined to the best-fitting step just below it (the tolerance lets neighbours
    fit too), and replaced by a divisor only where the divisor explains
    coefficients the coarser step cannot (divisors of the true step also fit;
    multiples of it do not, since odd multiples fall between). The DC term is
    measured with its phase fitted, so an unknown level shift does not matter.
    Steps are NaN where too few coefficients are informative ("too large to
    measure": all fall in the zero bin) and 1 where at least 80 coefficients above
    the rounding floor fit no step above 1 ("too small to measure").

    Parameters
    ----------
    coefs : ndarray
        ``(n_blocks, 8, 8)`` DCT coefficients on the detected grid.
    max_step : int
        Largest step tried (255 for baseline 8-bit tables).

    Returns
    -------
    steps, support, fit, z : ndarray
        8 x 8 each, natural order (see :class:`app.traces.dct_grid.GridEstimate`).

    References
    ----------
    Fan and de Queiroz (2003), section III: quantiser estimation from the
    periodicity of the DCT coefficient histogram.
    """
    c = np.asarray(coefs, dtype=np.float64).reshape(len(coefs), 64)
    steps = np.full(64, np.nan)
    support = np.zeros(64, dtype=int)
    fit = np.full(64, np.nan)
    z = np.zeros(64)
    for f in range(64):
        steps[f], support[f], fit[f], z[f] = _step_for(c[:, f], dc=f == 0, max_step=max_step)
    return (steps.reshape(8, 8), support.reshape(8, 8), fit.reshape(8, 8), z.reshape(8, 8))
