"""JPEG compression history from pixels alone: block grid and quantiser estimation.

Pure functions (arrays in, dataclasses out). The analyser in
:mod:`app.traces.lossy_compression` chains them:

1. :func:`find_lattice` undoes an affine intensity map (``v = a * k + b``), so that a
   JPEG decoded to 8 or 12 bits and rescaled to 16 bits is measured in its own
   integer grey levels ``k``;
2. :func:`blocking_signature` measures the blocking artefact per phase offset along
   each axis, and :func:`find_block_origin` locates the 8 x 8 grid (the data may
   have been cropped after compression);
3. :func:`estimate_steps` estimates the quantisation step of each of the 64 DCT
   frequencies from the periodicity of its coefficient histogram;
4. where no 8 x 8 grid is found, :func:`wavelet_deadzone` looks for the deadzone a
   JPEG 2000 quantiser leaves in the 9/7 wavelet subbands (:func:`dwt97_2d`).

References
----------
Z. Fan and R. L. de Queiroz, "Identification of bitmap compression history: JPEG
detection and quantizer estimation", IEEE Trans. Image Processing 12(2):230-235,
2003.
ITU-T Recommendation T.81 (1992) | ISO/IEC 10918-1, A.3.3 (the 8 x 8 forward DCT
with the level shift of A.3.1, equal to the orthonormal 2D DCT-II).
ITU-T Recommendation T.800 | ISO/IEC 15444-1, Annexes E and F (JPEG 2000 deadzone
quantisation and the 9/7 wavelet transform).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.fft as sfft

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


@dataclass
class GridEstimate:
    """The block grid and the per-frequency quantisation steps.

    Attributes
    ----------
    origin : tuple of int
        ``(row, col)``, 0-7: first row and column at which a block starts.
    signature_rows, signature_cols : ndarray
        Blocking signature per phase offset 0-7 along each axis (mean ratio 1).
    steps : ndarray
        8 x 8 estimated steps in natural order; NaN where not measurable, 1 where the
        coefficients are measurable but show no step above 1.
    support : ndarray
        8 x 8 count of informative (non-zero) coefficients per frequency.
    fit : ndarray
        8 x 8 share of the informative coefficients that lie on multiples of the step.
    z : ndarray
        8 x 8 one-sided z score of that share against chance (0 where no step > 1).
    n_blocks : int
        Blocks used (not flat, not touching the clipping levels).
    origin_scores : ndarray
        8 x 8 grid-search score per candidate origin (lower is more JPEG-like).
    """

    origin: tuple[int, int]
    signature_rows: np.ndarray
    signature_cols: np.ndarray
    steps: np.ndarray
    support: np.ndarray
    fit: np.ndarray
    z: np.ndarray
    n_blocks: int
    origin_scores: np.ndarray = field(default_factory=lambda: np.zeros((8, 8)))

    @property
    def n_measured(self) -> int:
        """Frequencies whose step (> 1) was measured with significance."""
        return int(np.sum(np.isfinite(self.steps) & (self.steps > 1)))

    @property
    def n_measured_low(self) -> int:
        """Measured steps (> 1) among the low frequencies ``u + v <= 4``.

        The low frequencies carry most of the non-zero coefficients of a decoded
        JPEG, so a real quantiser shows there first; lattice-like coincidences of
        interpolated images were seen only at high frequencies.
        """
        low = (_U + _V) <= 4
        return int(np.sum(np.isfinite(self.steps) & (self.steps > 1) & low))


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


def blocking_signature(images: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Blocking artefact strength per phase offset 0-7 along rows and columns.

    For each phase ``p`` along an axis, the mean absolute difference between
    neighbouring pixels across the boundary at index ``i`` with ``i % 8 == p``, with
    differences clipped at their 99th percentile so that object edges do not
    dominate; divided by the mean over the eight phases. A JPEG-compressed image
    shows a peak at the phase where its blocks start.

    Parameters
    ----------
    images : ndarray
        ``(frames, rows, cols)`` or ``(rows, cols)``.

    Returns
    -------
    rows, cols : ndarray
        Eight values each (ratio to the mean; 1 everywhere for no blocking).

    References
    ----------
    Fan and de Queiroz (2003), section II: the blocking signature (pixel
    differences across block boundaries against those inside blocks).
    """
    x = np.asarray(images, dtype=np.float64)
    if x.ndim == 2:
        x = x[None]
    out = []
    for axis in (1, 2):
        d = np.abs(np.diff(x, axis=axis))
        if d.size == 0:
            out.append(np.ones(8))
            continue
        cap = np.percentile(d, 99)
        if cap > 0:
            d = np.minimum(d, cap)
        prof = d.mean(axis=(0, 2) if axis == 1 else (0, 1))
        # the difference d[i] is between i and i + 1: a boundary where a block starts at i + 1
        phase = (np.arange(prof.size) + 1) % 8
        sig = np.array([prof[phase == p].mean() if np.any(phase == p) else 0.0
                        for p in range(8)])
        m = sig.mean()
        out.append(sig / m if m > 0 else np.ones(8))
    return out[0], out[1]


def block_dct(images: np.ndarray, origin: tuple[int, int], *, workers: int = 1
              ) -> tuple[np.ndarray, np.ndarray]:
    """Orthonormal 8 x 8 DCT-II of every whole block on the grid starting at ``origin``.

    Parameters
    ----------
    images : ndarray
        ``(frames, rows, cols)`` float64 grey levels.
    origin : (int, int)
        First row and column of the grid.

    Returns
    -------
    coefs : ndarray
        ``(n_blocks, 8, 8)`` DCT coefficients (JPEG's FDCT of T.81 A.3.3).
    pixels : ndarray
        ``(n_blocks, 8, 8)`` the blocks themselves.

    References
    ----------
    ITU-T T.81, A.3.3: the FDCT with C(0) = 1/sqrt(2) and the factor 1/4 is the
    orthonormal 2D DCT-II of an 8 x 8 block.
    """
    r0, c0 = origin
    x = images[:, r0:, c0:]
    f, h, w = x.shape
    h8, w8 = h // 8, w // 8
    x = x[:, :h8 * 8, :w8 * 8].reshape(f, h8, 8, w8, 8).transpose(0, 1, 3, 2, 4)
    blocks = x.reshape(-1, 8, 8)
    coefs = sfft.dctn(blocks, type=2, axes=(1, 2), norm="ortho", workers=workers)
    return coefs, blocks


def usable_blocks(blocks: np.ndarray, low: float, high: float) -> np.ndarray:
    """Blocks that carry quantiser information: not flat, not touching ``low``/``high``.

    Flat blocks have all AC coefficients zero, which fits every step; blocks with
    a pixel at a clipping level had their decoded values clipped, which moves their
    coefficients off the lattice (Fan and de Queiroz 2003, section III).
    """
    flat = np.ptp(blocks.reshape(len(blocks), -1), axis=1) == 0
    clipped = np.any((blocks <= low) | (blocks >= high), axis=(1, 2))
    return ~flat & ~clipped


def _origin_score(coefs: np.ndarray) -> float:
    """Share of high-frequency coefficients away from zero (JPEG zeroes most of them)."""
    hf = coefs.reshape(len(coefs), 64)[:, _HIGH]
    return float(np.mean(np.abs(hf) > 0.75))


_U, _V = np.meshgrid(np.arange(8), np.arange(8), indexing="ij")
_HIGH = ((_U + _V) >= 4).reshape(64)


def find_block_origin(images: np.ndarray, low: float, high: float, *, workers: int = 1,
                      max_blocks: int = 4096) -> tuple[tuple[int, int], np.ndarray]:
    """Locate the 8 x 8 grid: the origin whose blocks leave the most zeroed coefficients.

    On the grid the quantiser left them, most high-frequency DCT coefficients of a
    decoded JPEG are zero up to rounding noise; blocks straddling two JPEG blocks see
    the discontinuity at the block boundary (the blocking artefact) as
    high-frequency energy.

    Returns
    -------
    origin : (int, int)
    scores : ndarray
        8 x 8 score per candidate origin (share of high-frequency coefficients with
        magnitude above 0.75; lower is more JPEG-like).

    References
    ----------
    Fan and de Queiroz (2003): the blocking signature is strongest on the grid.
    """
    scores = np.ones((8, 8))
    for r in range(8):
        for c in range(8):
            coefs, blocks = block_dct(images, (r, c), workers=workers)
            ok = usable_blocks(blocks, low, high)
            coefs = coefs[ok][:max_blocks]
            if len(coefs):
                scores[r, c] = _origin_score(coefs)
    r, c = np.unravel_index(int(np.argmin(scores)), scores.shape)
    return (int(r), int(c)), scores


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
        8 x 8 each, natural order (see :class:`GridEstimate`).

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


#: Side of the central region (per frame) searched for the grid origin.
_SEARCH_SIZE = 256


def central_region(x: np.ndarray, size: int) -> np.ndarray:
    """Central ``size + 8`` square of each frame, cut at multiples of 8.

    Cutting at multiples of 8 keeps the block phase (and, being even, the wavelet
    subband phase of the first three levels when ``size`` is a multiple of 8).
    """
    out = x
    for axis in (1, 2):
        n = x.shape[axis]
        if n > size + 8:
            start = ((n - size) // 2) // 8 * 8
            out = np.take(out, np.arange(start, start + size + 8), axis=axis)
    return out


def analyse_grid(levels: np.ndarray, *, low: float, high: float, workers: int = 1,
                 max_blocks: int = 4096, max_step: int = 255) -> GridEstimate:
    """Block grid, blocking signature and quantiser steps of integer grey levels.

    Parameters
    ----------
    levels : ndarray
        ``(frames, rows, cols)`` lattice indices (decoded JPEG grey levels).
    low, high : float
        Clipping levels (blocks touching them are left out).
    workers : int
        ``scipy.fft`` workers.
    max_blocks : int
        At most this many usable blocks (evenly spaced) enter the estimation.
    max_step : int
        Largest quantisation step tried.

    Returns
    -------
    GridEstimate

    References
    ----------
    Fan and de Queiroz (2003).
    """
    x = np.asarray(levels, dtype=np.float64)
    if x.ndim == 2:
        x = x[None]
    sig_r, sig_c = blocking_signature(x)
    origin, scores = find_block_origin(central_region(x, _SEARCH_SIZE), low, high,
                                       workers=workers, max_blocks=max_blocks)
    coefs, blocks = block_dct(x, origin, workers=workers)
    ok = usable_blocks(blocks, low, high)
    coefs, blocks = coefs[ok], blocks[ok]
    # identical blocks (repeated patterns of piecewise-constant images) would count
    # one coefficient value many times: keep each distinct block once
    flat = blocks.reshape(len(blocks), 64)
    _, first = np.unique(flat - flat.min(axis=1, keepdims=True), axis=0, return_index=True)
    coefs = coefs[np.sort(first)]
    if len(coefs) > max_blocks:
        coefs = coefs[np.linspace(0, len(coefs) - 1, max_blocks).round().astype(int)]
    steps, support, fit, z = estimate_steps(coefs, max_step=max_step)
    return GridEstimate(origin, sig_r, sig_c, steps, support, fit, z, int(len(coefs)), scores)


# ----- JPEG 2000: no block grid, but a deadzone in the wavelet subbands ----------------
#: CDF 9/7 lifting constants of the JPEG 2000 irreversible transform (ITU-T T.800,
#: Annex F, Table F.4; values written from memory, checked by the vanishing-moment
#: test in tests/test_jpeg_grid.py).
_ALPHA = -1.586134342059924
_BETA = -0.052980118572961
_GAMMA = 0.882911075530934
_DELTA = 0.443506852043971
_KAPPA = 1.230174104914001


def _lift97(x: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray]:
    """One level of the 1D CDF 9/7 analysis along ``axis`` (whole-sample symmetric
    extension), returning the low- and high-pass halves."""
    y = np.moveaxis(np.asarray(x, dtype=np.float64), axis, -1).copy()
    n = y.shape[-1]

    def ext(i: np.ndarray) -> np.ndarray:
        i = np.abs(i)
        return np.where(i > n - 1, 2 * (n - 1) - i, i)

    odd, even = np.arange(1, n, 2), np.arange(0, n, 2)
    for idx, c in ((odd, _ALPHA), (even, _BETA), (odd, _GAMMA), (even, _DELTA)):
        y[..., idx] += c * (y[..., ext(idx - 1)] + y[..., ext(idx + 1)])
    lo = y[..., even] / _KAPPA
    hi = y[..., odd] * _KAPPA
    return np.moveaxis(lo, -1, axis), np.moveaxis(hi, -1, axis)


def dwt97_2d(image: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """One level of the separable 2D CDF 9/7 wavelet transform over the last two axes.

    Returns
    -------
    ll, lh, hl, hh : ndarray
        Low-low, and the three detail subbands (rows high-pass in ``hl`` and ``hh``).

    References
    ----------
    ITU-T T.800 | ISO/IEC 15444-1, Annex F (irreversible 9/7 lifting);
    A. Cohen, I. Daubechies, J.-C. Feauveau, Comm. Pure Appl. Math. 45:485-560 (1992).
    """
    lo, hi = _lift97(image, -1)
    ll, lh = _lift97(lo, -2)
    hl, hh = _lift97(hi, -2)
    return ll, lh, hl, hh


@dataclass
class DeadzoneEvidence:
    """How empty the range just above zero is in each wavelet detail subband.

    Attributes
    ----------
    bands : list of dict
        ``{"level", "band", "n_small", "n_above", "zero_fraction", "gap_ratio"}`` per
        detail subband with enough coefficients above the gap.
    min_gap_ratio : float or None
        The smallest ``gap_ratio`` over those subbands.
    """

    bands: list[dict]
    min_gap_ratio: float | None


def wavelet_deadzone(levels: np.ndarray, *, n_levels: int = 3, low: float = 1.0,
                     high: float = 4.0, min_above: int = 100) -> DeadzoneEvidence:
    """Look for the deadzone that JPEG 2000's quantiser leaves in the wavelet subbands.

    JPEG 2000 (irreversible path) quantises each 9/7 subband with a deadzone scalar
    quantiser: coefficients below the (bit-plane truncated) step become zero and the
    others are rebuilt at 1.5, 2.5, ... steps. Re-transforming the decoded grey
    levels shows, in such a subband, a cluster at zero (rounding noise) and almost no
    coefficients between ``low`` and ``high`` grey levels. The coefficient density of
    an uncompressed image is unimodal at zero, so its density on ``[low, high)`` is
    at least about that on ``[high, 4 high)``, whatever the noise level.
    ``gap_ratio`` is the first density over the second (about 1 or more without
    compression, near 0 in a deadzone).

    Parameters
    ----------
    levels : ndarray
        ``(frames, rows, cols)`` integer grey levels (lattice indices).
    n_levels : int
        Decomposition levels examined.
    low, high : float
        The range (grey levels) that a deadzone leaves empty.
    min_above : int
        Subbands with fewer coefficients on ``[high, 4 high)`` are not scored.

    Returns
    -------
    DeadzoneEvidence

    References
    ----------
    ITU-T T.800 | ISO/IEC 15444-1, Annex E (deadzone scalar quantisation, E.1.1, and
    reconstruction, E.1.1.2) and Annex F (9/7 transform). Common practice, no source:
    reading the deadzone back from decoded pixels.
    """
    x = np.asarray(levels, dtype=np.float64)
    if x.ndim == 2:
        x = x[None]
    bands = []
    ll = x
    for lev in range(1, n_levels + 1):
        if min(ll.shape[-2:]) < 16:
            break
        ll, lh, hl, hh = dwt97_2d(ll)
        for name, b in (("LH", lh), ("HL", hl), ("HH", hh)):
            m = np.abs(b)
            n_small = int(np.sum((m >= low) & (m < high)))
            n_above = int(np.sum((m >= high) & (m < 4 * high)))
            if n_above >= min_above:
                ratio = (n_small / (high - low)) / (n_above / (3 * high))
                bands.append({"level": lev, "band": name, "n_small": n_small,
                              "n_above": n_above, "zero_fraction": float(np.mean(m < low)),
                              "gap_ratio": float(ratio)})
    gaps = [b["gap_ratio"] for b in bands]
    return DeadzoneEvidence(bands, float(min(gaps)) if gaps else None)
