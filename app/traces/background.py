"""The signal-free background (air) of each image, found once per Volume.

Several analysers read the background: the noise-law fit (coil combination),
the constant-background test (masking), the sign test (magnitude only). It is
found here once, on a bounded, evenly spaced subset of frames, and shared
through the analysis plan's ``background`` step.

K-space volumes are first brought to the image domain (centred orthonormal
inverse FFT of the analysed frames, :mod:`app.traces.image_domain`), so a fake
k-space made from processed images shows the processing. Each analysed frame's
magnitude image (root-sum-of-squares over channels) is segmented by
:func:`app.traces.background_mask.frame_background` (a histogram threshold,
morphology, and checks that the region is flat like noise and darker than the
object); the samples of all frames are pooled here, and :func:`constant_share`
reads whether that background is one constant value (masking) rather than noise.

This module also re-exports the per-frame segmentation, the image-domain frames
and the exact lattice step (:mod:`app.traces.grey_lattice`) under their old names.

References
----------
.. [1] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Transactions on Systems, Man, and Cybernetics 9(1):62-66, 1979.
.. [2] H. Gudbjartsson and S. Patz, "The Rician distribution of noisy MRI data",
   Magnetic Resonance in Medicine 34(6):910-914, 1995 (signal-free background
   as the region where the noise law is measured).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from app.io.volume import Volume
from app.traces.background_mask import frame_background, otsu_threshold
from app.traces.context import evenly_spaced
from app.traces.grey_lattice import LATTICE_TOL, lattice_step
from app.traces.image_domain import image_blocks, kspace_is_centred

__all__ = [
    "FFT_TOLERANCE",
    "FLATTENED_SHARE",
    "FRAME_SHARE",
    "LATTICE_TOL",
    "MASKED_SHARE",
    "MAX_FRAMES",
    "MAX_PIXELS",
    "MAX_SAMPLES_PER_FRAME",
    "MIN_FRAMES",
    "MIN_SAMPLES",
    "PURE_SHARE",
    "Background",
    "ConstantShare",
    "analysed_frames",
    "background_step",
    "constant_share",
    "find_background",
    "frame_background",
    "image_blocks",
    "kspace_is_centred",
    "lattice_step",
    "otsu_threshold",
]

MAX_FRAMES = 16
#: at most this share of the frames (but at least MIN_FRAMES) is examined
FRAME_SHARE = 0.25
MIN_FRAMES = 8
FFT_TOLERANCE = 1e-5
MAX_PIXELS = 1_500_000
MAX_SAMPLES_PER_FRAME = 32768
MIN_SAMPLES = 500


@dataclass
class Background:
    """Background samples of the analysed frames.

    Attributes
    ----------
    frames : ndarray of int
        Flat frame indices the background was looked for in.
    masks : ndarray of bool
        ``(len(frames), rows, cols)``: the background of each analysed frame.
    magnitude : ndarray of float64
        Background magnitudes (root-sum-of-squares over channels when multi-coil),
        at most :data:`MAX_SAMPLES_PER_FRAME` per frame.
    values : ndarray or None
        The physical values at the same positions: complex or real, shape ``(n,)``,
        or ``(coils, n)`` for multi-coil data.
    stored : ndarray or None
        The stored (unscaled) values at the same positions, single-channel data only.
    n_background : int
        Background samples found (before the per-frame sample cap).
    n_pixels : int
        Pixels in the analysed frames.
    method : {"threshold", "corners", "none"}
    reason : str or None
        Why the background is unusable (too few samples), else None.
    object_level : float
        Median magnitude of the pixels above the threshold (the object).
    signal_peak : float
        99.5th percentile of the magnitude in the analysed frames.
    nan_fraction : float
        Fraction of non-finite pixels (outside a resampled field of view).
    excluded_blocks : int
        Background blocks dropped as ghosting or stray signal.
    tolerance : float
        Values closer than this count as equal (round-off of the inverse FFT of
        k-space; 0 for stored image values).
    """

    frames: np.ndarray
    masks: np.ndarray
    magnitude: np.ndarray
    values: np.ndarray | None
    stored: np.ndarray | None
    n_background: int
    n_pixels: int
    method: str
    reason: str | None
    object_level: float
    signal_peak: float
    nan_fraction: float
    excluded_blocks: int = 0
    notes: list[str] = field(default_factory=list)
    tolerance: float = 0.0

    @property
    def usable(self) -> bool:
        """Whether enough background samples were found to measure noise."""
        return self.reason is None

    @property
    def fraction(self) -> float:
        """Fraction of the analysed pixels that are background."""
        return self.n_background / self.n_pixels if self.n_pixels else 0.0


def analysed_frames(n_frames: int, base: np.ndarray | None = None,
                    max_frames: int = MAX_FRAMES) -> np.ndarray:
    """At most ``max_frames`` evenly spaced frame indices (from ``base`` if given)."""
    return evenly_spaced(np.arange(n_frames) if base is None else base, max_frames)


def _magnitude(block: np.ndarray, multi: bool) -> np.ndarray:
    if multi:
        return np.sqrt((np.abs(block.astype(np.complex128 if np.iscomplexobj(block)
                                            else np.float64)) ** 2).sum(axis=1))
    return np.abs(block).astype(np.float64)


@dataclass
class _Accumulator:
    """Per-volume sums of the frames examined (blank frames are kept apart)."""

    frames: list[int] = field(default_factory=list)
    methods: set[str] = field(default_factory=set)
    excluded: int = 0
    n_px: int = 0
    n_nan: int = 0
    n_bg: int = 0
    peaks: list[float] = field(default_factory=list)
    obj_levels: list[float] = field(default_factory=list)
    mags: list[np.ndarray] = field(default_factory=list)
    vals: list[np.ndarray] = field(default_factory=list)
    stored: list[np.ndarray] = field(default_factory=list)


def find_background(volume: Volume, *, frames: Any = None,
                    max_frames: int = MAX_FRAMES) -> Background:
    """Find the background of a Volume on a bounded, evenly spaced subset of frames.

    Parameters
    ----------
    volume : Volume
    frames : sequence of int, optional
        Frames to choose from (the context's stated subset); default all.
    max_frames : int
        Upper bound on frames examined; fewer when the frames are large (at most
        :data:`MAX_PIXELS` pixels in all) and at most a quarter of the frames
        (:data:`FRAME_SHARE`) once there are more than :data:`MIN_FRAMES`.

    Returns
    -------
    Background

    References
    ----------
    Otsu 1979; Gudbjartsson and Patz, MRM 1995.
    """
    rows, cols = volume.image_shape
    share = max(MIN_FRAMES, int(np.ceil(FRAME_SHARE * volume.n_slices)))
    max_frames = max(1, min(max_frames, share, MAX_PIXELS // max(1, rows * cols)))
    idx = analysed_frames(volume.n_slices, frames, max_frames)
    notes = []
    if idx.size < volume.n_slices:
        notes.append(f"background found on {idx.size} of {volume.n_slices} frames, "
                     "evenly spaced")
    if volume.domain == "kspace":
        notes.append("noise and background measured on the inverse FFT of the k-space")
    multi = volume.coil_axis is not None
    acc = {True: _Accumulator(), False: _Accumulator()}
    masks = []
    single = not multi and volume.domain == "image"
    stored_iter = volume.iter_slices(8, scaled=False, indices=idx) if single else None
    for _, block in image_blocks(volume, idx):
        mag = _magnitude(block, multi)
        sblock = next(stored_iter)[1] if stored_iter is not None else None
        for j in range(mag.shape[0]):
            m = mag[j]
            fin = np.isfinite(m)
            all_fin = bool(fin.all())
            m_fin = m.ravel() if all_fin else m[fin]  # no copy in the common case
            blank = m_fin.size == 0 or float(m_fin.min()) == float(m_fin.max())
            mask, method, exc, t = frame_background(m)
            masks.append(mask)
            a = acc[blank]
            a.frames.append(len(masks) - 1)
            a.methods.add(method)
            a.excluded += exc
            a.n_px += m.size
            a.n_nan += 0 if all_fin else int((~fin).sum())
            if m_fin.size:
                a.peaks.append(float(np.percentile(m_fin, 99.5)))
                obj = m[~mask] if all_fin else m[fin & ~mask]
                above = obj[obj >= t]
                a.obj_levels.append(float(np.median(above)) if above.size else
                                    float(np.median(obj)) if obj.size else 0.0)
            pos = np.flatnonzero(mask)
            a.n_bg += pos.size
            if pos.size > MAX_SAMPLES_PER_FRAME:
                pos = pos[np.linspace(0, pos.size - 1, MAX_SAMPLES_PER_FRAME).astype(np.int64)]
            a.mags.append(m.ravel()[pos])
            if multi:
                a.vals.append(block[j].reshape(block.shape[1], -1)[:, pos])
            else:
                a.vals.append(block[j].ravel()[pos])
                if sblock is not None:
                    a.stored.append(sblock[j].ravel()[pos])
    use = acc[False] if acc[False].frames else acc[True]
    if acc[False].frames and acc[True].frames:
        notes.append(f"{len(acc[True].frames)} blank frame(s) (one value throughout) left out "
                     "of the background")
        for k in acc[True].frames:
            masks[k] = np.zeros_like(masks[k])
    methods, excluded = use.methods, use.excluded
    n_bg, n_px, n_nan = use.n_bg, use.n_px, use.n_nan
    peaks, obj_levels = use.peaks, use.obj_levels
    magnitude = np.concatenate(use.mags) if use.mags else np.zeros(0)
    values = (np.concatenate(use.vals, axis=-1) if use.vals else None)
    stored = np.concatenate(use.stored) if use.stored else None
    reason = None
    if n_bg < MIN_SAMPLES:
        reason = (f"only {n_bg} background samples found (at least {MIN_SAMPLES} needed): "
                  "the images hold no signal-free air region")
    method = "threshold" if "threshold" in methods else (
        "corners" if "corners" in methods else "none")
    return Background(
        frames=idx,
        masks=np.asarray(masks, dtype=bool),
        magnitude=magnitude,
        values=values,
        stored=stored,
        n_background=int(n_bg),
        n_pixels=int(n_px),
        method=method,
        reason=reason,
        object_level=float(np.median(obj_levels)) if obj_levels else 0.0,
        signal_peak=float(np.median(peaks)) if peaks else 0.0,
        nan_fraction=n_nan / n_px if n_px else 0.0,
        excluded_blocks=int(excluded),
        notes=notes,
        tolerance=FFT_TOLERANCE * max(peaks) if volume.domain == "kspace" and peaks else 0.0,
    )


def background_step(volume: Volume, scope: Any, notes: Any) -> Background:
    """The shared step: the background (air) of the analysed frames.

    Adds the stated frame subsampling to ``notes``.
    """
    bg = find_background(volume, frames=scope.frames)
    for note in bg.notes:
        notes.add(note)
    return bg


@dataclass
class ConstantShare:
    """The most common exact background value.

    Attributes
    ----------
    value : float or None
        The value (stored units where stored values exist).
    share : float
        Share of background samples holding exactly that value.
    neighbour_share : float
        Share holding the next lattice values either side (data on a lattice
        only; 0 for continuous data).
    masked : bool
        Whether the background is one constant rather than noise (see
        :func:`constant_share`).
    at_bottom : bool
        Whether the constant is the lowest background value.
    isolated : bool
        Whether the value stands alone on its lattice (its neighbours hold less
        than half as much, or it holds 90%); always True for continuous data.
    """

    value: float | None
    share: float
    neighbour_share: float
    masked: bool
    at_bottom: bool = True
    isolated: bool = True

    @property
    def flattened(self) -> bool:
        """Half or more of the background on one value: masked, or flattened otherwise.

        Compression or coarse quantisation can flatten noisy air onto one level
        with a few values below it; the noise law cannot be measured either way.
        Quantised noise of a sigma near one step is not flat: its neighbouring
        levels are busy.
        """
        return self.masked or (self.share >= FLATTENED_SHARE and self.isolated)


MASKED_SHARE = 0.3
FLATTENED_SHARE = 0.5
PURE_SHARE = 0.999


def constant_share(bg: Background) -> ConstantShare:
    """The most common exact background value and whether it means a constant background.

    Continuous noise never repeats one value in a large share of samples;
    masking, thresholding and noise-free synthesis do. Integer-stored noise with
    a sigma of a step or two does repeat values, but then the next lattice
    values either side are nearly as common, whereas a masked background stands
    alone (its neighbours are empty). The background counts as masked when at
    least :data:`MASKED_SHARE` of it holds one value (values within the
    background's round-off tolerance counting as one), that value is the
    lowest of the background (masks and thresholds set the air to the bottom;
    compression that flattens air leaves values below the flat level) unless it
    holds at least 99.9%, and, for data on a lattice (integers, or floats on few
    levels), it holds at least 90% or its two lattice neighbours together hold
    less than half as much (quantised noise of a sigma near one step has busy
    neighbours).
    Common practice, no source.
    """
    use_stored = bg.stored is not None and not np.iscomplexobj(bg.stored)
    v = np.asarray(bg.stored if use_stored else bg.magnitude).ravel()
    v = v[np.isfinite(v)] if v.dtype.kind == "f" else v
    if bg.tolerance > 0 and not use_stored:
        v = np.round(v / bg.tolerance) * bg.tolerance
    if v.size == 0:
        return ConstantShare(None, 0.0, 0.0, False)
    vals, counts = np.unique(v, return_counts=True)
    j = int(np.argmax(counts))
    share = float(counts[j] / v.size)
    neighbour = 0.0
    step = lattice_step(vals) if vals.size > 1 else None
    if step is not None:
        c = float(vals[j])
        gap = np.abs(vals.astype(np.float64) - c)
        near = np.abs(gap - step) <= LATTICE_TOL * step
        neighbour = float(counts[near].sum() / v.size)
    at_bottom = bool(vals[j] == vals[0])
    lattice_ok = step is None or share >= 0.9 or neighbour < 0.5 * share
    masked = share >= MASKED_SHARE and lattice_ok and (at_bottom or share >= PURE_SHARE)
    return ConstantShare(float(vals[j]), share, neighbour, masked, at_bottom, lattice_ok)
