"""Intensity quantisation: too few grey levels, a comb-shaped histogram, or clipping.

MR scanners store 12 to 16 bits; a set squeezed to 8 bits (a PNG export, a
windowed conversion) holds at most 256 grey levels. Integer rescaling leaves a
comb: 8-bit values multiplied by 16 into uint16 use only every 16th value; a
non-integer rescale leaves periodic empty levels. Clipping piles samples onto
the extreme values.

Level counting uses the stored values (``scaled=False``); k-space synthesised
from real images (see magnitude_only) is counted on those images, recovered by
the inverse FFT with its round-off grouped. Float data are first checked for a
lattice (all values on ``v0 + k d``); float32 images quantised to
256 levels and then scaled are caught that way.

Measures:

- ``distinct_levels``: distinct values among the samples examined;
  ``effective_bits = log2(distinct_levels)``; ``stated_bits`` is DICOM
  BitsStored, else the bit depth of an integer dtype.
- ``comb_score``: the share of lattice levels inside the used range that were
  left empty by a rescale (an integer factor ``g`` leaves ``1 - 1/g``; a
  non-integer factor leaves periodic gaps beyond Poisson chance). Natural data
  give about 0; every 16th value used gives about 0.94.
- clipped fractions: the share of samples on the lowest and highest values
  when those values stand far above their neighbours (a pile-up). A low pile-up
  explained by a constant (masked) background, or forming solid regions (zeros
  outside a resampled field of view), is reported but not counted as clipping:
  clipping piles scattered samples.

Status: ``present`` when at most 256 levels are used in a set large enough to
show more, when the histogram is a comb, or when more than
:data:`CLIP_FRACTION` of the samples are clipped; else ``absent``.

References
----------
.. [1] B. Widrow and I. Kollar, *Quantization Noise*, Cambridge University Press,
   2008 (uniform quantisation, level lattices).
.. [2] M. Stamm and K. J. R. Liu, "Forensic detection of image manipulation using
   statistical intrinsic fingerprints", IEEE Transactions on Information
   Forensics and Security 5(3):492-506, 2010 (periodic empty histogram bins left
   by contrast mapping and rescaling; volume and pages recalled from memory).
.. [3] NEMA PS3.3, DICOM Information Object Definitions, C.7.6.3 Image Pixel
   Module (BitsStored).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import ndimage

from app.io.volume import Volume
from app.traces.background import (
    FFT_TOLERANCE,
    Background,
    analysed_frames,
    constant_share,
    image_blocks,
    lattice_step,
)
from app.traces.base import Trace, inconclusive, register
from app.traces.context import Scope
from app.traces.rounding import round_sig
from app.traces.value_kind import ValueKind

TRACE_ID = "intensity_quantization"
MAX_FRAMES = 32
_COUNT_CHUNK = 1 << 17
MAX_SAMPLES = 2_000_000
SQUEEZED_LEVELS = 256
MIN_SAMPLES_FOR_LEVELS = 16 * SQUEEZED_LEVELS
COMB_SCORE = 0.08
COMB_MIN_DENSE = 64
CLIP_FRACTION = 0.002
CLIP_SPIKE = 5.0
SOLID_SHARE = 0.7
_DENSE_COUNT = 6.0
_WINDOW = 9


@dataclass
class LevelStats:
    """Grey levels of the samples examined.

    Attributes
    ----------
    levels : ndarray
        The distinct values, sorted.
    counts : ndarray of int
        Samples per distinct value.
    step : float or None
        Lattice step (1 for integers; the float lattice step; None when float
        values lie on no lattice).
    n_samples : int
    """

    levels: np.ndarray
    counts: np.ndarray
    step: float | None
    n_samples: int

    @property
    def distinct(self) -> int:
        return int(self.levels.size)


def level_stats(values: np.ndarray) -> LevelStats:
    """Count the distinct values of a sample of stored values.

    Parameters
    ----------
    values : ndarray
        Stored (unscaled) values; complex values count by real and imaginary part
        (by the real part alone when the imaginary part is zero).

    Returns
    -------
    LevelStats

    References
    ----------
    Widrow and Kollar, *Quantization Noise*, 2008 (uniform quantisation lattice).
    """
    v = np.asarray(values).ravel()
    if np.iscomplexobj(v):
        v = np.concatenate([v.real, v.imag]) if np.any(v.imag) else v.real
    if v.dtype.kind == "f":
        v = v[np.isfinite(v)]
    if v.size == 0:
        return LevelStats(np.zeros(0), np.zeros(0, int), None, 0)
    if v.dtype.kind in "iub":
        lo, hi = int(v.min()), int(v.max())
        if hi - lo < 1 << 24:
            # counted in chunks: no widened copy of the whole sample
            c = np.zeros(hi - lo + 1, dtype=np.int64)
            for i in range(0, v.size, _COUNT_CHUNK):
                part = v[i:i + _COUNT_CHUNK].astype(np.int64)
                if lo:
                    part -= lo
                c += np.bincount(part, minlength=hi - lo + 1)
            nz = np.flatnonzero(c)
            return LevelStats(nz + lo, c[nz], 1.0, int(v.size))
        lv, ct = np.unique(v.astype(np.int64), return_counts=True)
        return LevelStats(lv, ct, 1.0, int(v.size))
    lv, ct = np.unique(v, return_counts=True)
    return LevelStats(lv, ct, lattice_step(lv), int(v.size))


def comb_score(stats: LevelStats) -> tuple[float, int, int]:
    """Share of the lattice levels inside the used range that a rescale left empty.

    Two parts: values that all lie on a coarser lattice (integer rescaling by
    ``g``: only every ``g``-th value used) give ``1 - 1/g``; on that lattice,
    densely populated stretches (moving-average count of at least 6 over 9
    levels) are checked for empty levels beyond Poisson chance (a non-integer
    rescale leaves periodic gaps). The score is ``1 - (1 - excess) / g``.

    Returns
    -------
    score : float
        0 for natural data, about 0.94 when only every 16th value is used.
    n_dense : int
        Densely populated levels on the coarse lattice.
    factor : int
        The integer rescale factor ``g`` (1 when none).

    References
    ----------
    Stamm and Liu, IEEE TIFS 5(3), 2010 (empty bins left by rescaling).
    """
    if stats.step is None or stats.distinct < 2:
        return 0.0, 0, 1
    idx = np.round((stats.levels - stats.levels[0]) / stats.step).astype(np.int64)
    g = int(np.gcd.reduce(np.diff(idx))) or 1
    idx //= g
    if idx[-1] > 1 << 24:
        return 0.0, 0, g
    full = np.zeros(int(idx[-1]) + 1, dtype=np.float64)
    full[idx] = stats.counts
    w = min(_WINDOW, full.size)
    smooth = np.convolve(full, np.ones(w) / w, mode="same")
    dense = smooth >= _DENSE_COUNT
    n_dense = int(dense.sum())
    excess = 0.0
    if n_dense:
        empty = float(np.sum(full[dense] == 0))
        expected = float(np.sum(np.exp(-smooth[dense])))
        excess = max(0.0, empty - expected - 3.0 * np.sqrt(expected)) / n_dense
    return 1.0 - (1.0 - excess) / g, n_dense, g


def _pile(counts: np.ndarray, at: int, neighbours: np.ndarray, n: int) -> tuple[float, bool]:
    frac = float(counts[at] / n)
    ref = float(np.mean(neighbours)) if neighbours.size else 0.0
    return frac, bool(counts[at] >= CLIP_SPIKE * max(ref, 1.0))


def clipping(stats: LevelStats) -> dict[str, Any]:
    """Shares of samples on the lowest and highest values, and whether they pile up.

    A value is a pile-up when it holds at least 5 times the mean count of the 8
    nearest used levels. Common practice, no source.
    """
    if stats.distinct < 10:
        return {"low": 0.0, "high": 0.0, "low_pile": False, "high_pile": False}
    c = stats.counts
    low, low_pile = _pile(c, 0, c[1:9], stats.n_samples)
    high, high_pile = _pile(c, -1, c[-9:-1], stats.n_samples)
    return {"low": low, "high": high, "low_pile": low_pile, "high_pile": high_pile}


def solid_share(volume: Volume, frames: np.ndarray, value: float, tol: float,
                from_images: bool) -> float:
    """Share of the pixels holding ``value`` that lie in solid regions (kept by a 3 x 3 opening).

    Clipping piles scattered samples (the darkest noise, the brightest tissue)
    onto the extreme value; a mask or the zeros outside a resampled field of
    view form solid regions. Examines at most 8 evenly spaced frames. Common
    practice, no source.
    """
    frames = analysed_frames(frames.size, frames, 8)
    blocks = (image_blocks(volume, frames) if from_images
              else volume.iter_slices(8, scaled=False, indices=frames))
    n_on = n_solid = 0
    for _, block in blocks:
        b = np.asarray(block)
        b = b.real if from_images else b
        b = b.reshape(-1, *b.shape[-2:])
        on = np.abs(b.astype(np.float64) - value) <= tol
        for f in on:
            n_on += int(f.sum())
            n_solid += int(ndimage.binary_opening(f, structure=np.ones((3, 3), bool)).sum())
    return n_solid / n_on if n_on else 0.0


def stated_bits(volume: Volume) -> int | None:
    """Bits the header states (DICOM BitsStored, image bit depth), else the integer dtype's."""
    for key in ("bits_stored", "bit_depth"):
        v = volume.header.fields.get(key)
        if v:
            return int(v)
    if volume.dtype.kind in "iu":
        return int(volume.dtype.itemsize * 8)
    return None


def _sample_values(volume: Volume, frames: np.ndarray) -> np.ndarray:
    rows, cols = volume.image_shape
    per = rows * cols * max(1, volume.n_coils)
    keep = max(1, min(frames.size, MAX_SAMPLES // max(per, 1)))
    frames = analysed_frames(frames.size, frames, keep)
    parts = [np.asarray(b).ravel() for _, b in volume.iter_slices(8, scaled=False,
                                                                  indices=frames)]
    return np.concatenate(parts) if parts else np.zeros(0)


def fft_levels(values: np.ndarray, tol: float) -> LevelStats:
    """Grey levels of real images recovered from k-space (values carry FFT round-off).

    Sorted values are split where neighbours differ by more than ``5 * tol``;
    each run is one level (its mean). When the runs are about as many as the
    values (continuous data) every value counts as its own level, without a
    lattice. Common practice, no source.
    """
    v = np.sort(np.asarray(values, dtype=np.float64).ravel())
    v = v[np.isfinite(v)]
    if v.size < 2 or tol <= 0:
        return level_stats(v)
    starts = np.r_[0, np.flatnonzero(np.diff(v) > 5.0 * tol) + 1]
    if starts.size > 0.2 * v.size:
        return LevelStats(v, np.ones(v.size, dtype=np.int64), None, int(v.size))
    counts = np.diff(np.r_[starts, v.size])
    centres = np.add.reduceat(v, starts) / counts
    return LevelStats(centres, counts, lattice_step(centres), int(v.size))


def _kspace_image_values(volume: Volume, frames: np.ndarray) -> tuple[np.ndarray, float]:
    """Real parts of the images behind k-space (bounded), and the round-off tolerance."""
    rows, cols = volume.image_shape
    keep = max(1, min(frames.size, MAX_SAMPLES // max(rows * cols * volume.n_coils, 1)))
    frames = analysed_frames(frames.size, frames, keep)
    parts = [np.asarray(b).real.ravel() for _, b in image_blocks(volume, frames)]
    v = np.concatenate(parts) if parts else np.zeros(0)
    peak = float(np.max(np.abs(v))) if v.size else 0.0
    return v, FFT_TOLERANCE * peak


def _histogram(stats: LevelStats) -> dict[str, Any]:
    if stats.distinct == 0:
        return {"edges": [], "counts": []}
    lo, hi = float(stats.levels[0]), float(stats.levels[-1])
    step = stats.step
    if step and (hi - lo) / step + 1 <= 1024:
        nb = int(round((hi - lo) / step)) + 1
        edges = lo - step / 2 + step * np.arange(nb + 1)
    else:
        nb = 1024 if hi > lo else 1
        edges = np.linspace(lo, hi if hi > lo else lo + 1, nb + 1)
    counts, _ = np.histogram(stats.levels, bins=edges, weights=stats.counts)
    return {"edges": [round_sig(e, 6) for e in edges],
            "counts": [int(x) for x in counts]}


def _decision(distinct: int, comb: float, clipped: float) -> dict[str, Any]:
    """The number the call rests on, for calibration: the largest of three margins,
    each zero at its own threshold and positive beyond it: ``log2(256 / levels)``
    (fewer levels than 8 bits hold), ``(comb - 0.08) / 0.08`` (share of empty levels in
    the used range) and ``log10(clipped / 0.002)`` (samples piled on an end value)."""
    margins = [np.log2(SQUEEZED_LEVELS / max(distinct, 1)),
               (comb - COMB_SCORE) / COMB_SCORE,
               np.log10(max(clipped, 1e-12) / CLIP_FRACTION)]
    return {"statistic": "quantisation_margin", "value": float(max(margins)), "threshold": 0.0,
            "false_alarm_rate": None, "p_value": None}


@register(TRACE_ID, version="1", order=70,
          default_estimates={"distinct_levels": None, "effective_bits": None,
                             "clipped_fraction": None})
def analyse(volume: Volume, *, scope: Scope, background: Background | None = None,
            value_kind: ValueKind | None = None) -> Trace:
    """Count grey levels, look for a comb-shaped histogram and for clipping.

    References
    ----------
    Widrow and Kollar 2008; Stamm and Liu, IEEE TIFS 2010; DICOM PS3.3 C.7.6.3.
    """
    frames = analysed_frames(volume.n_slices, scope.frames, MAX_FRAMES)
    from_images = (volume.domain == "kspace" and value_kind is not None
                   and value_kind.domain in ("magnitude", "real_signed"))
    if from_images:
        # k-space synthesised from real images: the grey levels are those images'
        values, tol = _kspace_image_values(volume, frames)
        stats = fft_levels(values, tol)
    else:
        stats = level_stats(_sample_values(volume, frames))
    if stats.n_samples == 0:
        return inconclusive(TRACE_ID, "No finite values to count grey levels in.")
    bits = stated_bits(volume)
    eff = float(np.log2(stats.distinct)) if stats.distinct > 0 else 0.0
    score, n_dense, factor = comb_score(stats)
    clip = clipping(stats)
    masked_low = False
    if clip["low_pile"]:
        try:
            bg = background
            const = constant_share(bg) if bg is not None and bg.usable else None
            if const is not None and const.masked and const.value is not None:
                if from_images:
                    # both come from the inverse FFT: equal within its round-off
                    masked_low = abs(const.value - float(stats.levels[0])) <= 5 * max(
                        bg.tolerance, 1e-30)
                else:
                    masked_low = bg.stored is not None and const.value == float(
                        stats.levels[0])
        except Exception:  # noqa: BLE001 - the background is optional evidence here
            masked_low = False
    solid_low = None
    if clip["low_pile"] and not masked_low:
        tol = 5 * FFT_TOLERANCE * float(np.max(np.abs(stats.levels))) if from_images else 0.0
        solid_low = solid_share(volume, frames, float(stats.levels[0]), tol, from_images)
        masked_low = solid_low >= SOLID_SHARE
    high = clip["high"] if clip["high_pile"] else 0.0
    low = clip["low"] if clip["low_pile"] and not masked_low else 0.0
    clipped = high + low
    lattice_note = ""
    if volume.dtype.kind == "f" and stats.step is not None and stats.distinct > 1:
        lattice_note = f" on a lattice of step {stats.step:.4g}"
    squeezed = (stats.distinct <= SQUEEZED_LEVELS and stats.n_samples >= MIN_SAMPLES_FOR_LEVELS
                and stats.distinct > 1)
    comb = score >= COMB_SCORE and (n_dense >= COMB_MIN_DENSE or
                                    (factor > 1 and stats.distinct >= COMB_MIN_DENSE))
    evidence = {
        "histogram": _histogram(stats),
        "clipped_low_fraction": round_sig(clip['low']),
        "clipped_high_fraction": round_sig(clip['high']),
        "clip_values": [float(stats.levels[0]), float(stats.levels[-1])],
        "low_pile_up": clip["low_pile"], "high_pile_up": clip["high_pile"],
        "low_explained_by_masking": masked_low,
        "low_pile_solid_share": None if solid_low is None else round_sig(solid_low),
        "distinct_levels": stats.distinct,
        "stated_bits": bits,
        "comb_score": round_sig(score),
        "dense_levels": n_dense,
        "integer_factor": factor,
        "lattice_step": None if stats.step is None else round_sig(stats.step, 6),
        "n_samples": stats.n_samples,
        "frames_examined": int(frames.size),
        "measured_on": "images behind the k-space" if from_images else "stored values",
    }
    estimates = {"distinct_levels": stats.distinct, "effective_bits": round(eff, 2),
                 "clipped_fraction": round_sig(clipped)}
    evidence["decision"] = _decision(stats.distinct, score, clipped)
    findings = []
    if squeezed:
        of = f" of the {bits} bits stated" if bits else ""
        findings.append(f"only {stats.distinct} grey levels{lattice_note} "
                        f"({eff:.1f} effective bits{of})")
    if comb:
        how = (f"only every {factor}th value used" if factor > 1 and score < 1 - 0.9 / factor
               else f"{100 * score:.0f}% of the levels in the used range empty")
        if factor > 1 and score >= 1 - 0.9 / factor:
            how = f"only every {factor}th value used, and gaps between those"
        findings.append(f"a comb-shaped histogram ({how}), as rescaling of integer values "
                        "leaves")
    if clipped >= CLIP_FRACTION:
        parts = []
        if high:
            parts.append(f"{100 * high:.2f}% at the top value {stats.levels[-1]:.6g}")
        if low:
            parts.append(f"{100 * low:.2f}% at the bottom value {stats.levels[0]:.6g}")
        findings.append("clipping (" + ", ".join(parts) + ")")
    if findings:
        conf = 0.9 if squeezed or comb else 0.75
        summary = "The grey levels show " + "; ".join(findings) + "."
        return Trace(TRACE_ID, "present", conf, summary, estimates, evidence)
    of = f" ({bits} bits stated)" if bits else ""
    summary = (f"{stats.distinct} distinct grey levels{lattice_note}, {eff:.1f} effective "
               f"bits{of}; no comb, no clipping beyond {100 * CLIP_FRACTION:.1f}%.")
    if stats.n_samples < MIN_SAMPLES_FOR_LEVELS and stats.distinct <= SQUEEZED_LEVELS:
        return inconclusive(TRACE_ID, f"Too few samples ({stats.n_samples}) to tell the grey "
                            "levels used from those available.", **evidence)
    return Trace(TRACE_ID, "absent", 0.8, summary, estimates, evidence)
