"""Shared spectral helpers: one FFT pass per Volume, shared by the spectral analysers.

The pass streams the volume slice batch by slice batch, takes a 2D FFT of each
frame (``scipy.fft`` with ``workers=``), sums power over receive coils, and
accumulates per-axis energy profiles (averaged over frames and over the other
axis). Only the profiles, one representative power map and, for 3D volumes, a
through-plane profile from a subset of columns are kept, so memory stays bounded.

The spectral analysers (zero-filling, k-space filtering, partial Fourier) take
the result from the analysis plan's ``spectrum`` step (:func:`spectrum_step`).

References
----------
.. [1] Bracewell, R. N. *The Fourier Transform and Its Applications*, 3rd ed.,
   McGraw-Hill, 2000 (power spectra, sampling and interpolation by zero-padding).
.. [2] Bernstein, M. A., King, K. F. and Zhou, X. J. *Handbook of MRI Pulse
   Sequences*, Elsevier, 2004, ch. 13 (k-space zero-filling and apodization).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.fft as sfft

from app.io.volume import Volume
from app.traces.rounding import round_sig

_TINY = 1e-30
#: at most this many columns go into the through-plane (slice-axis) profile
SLICE_PROFILE_COLUMNS = 16
#: the through-plane profile needs at least this many slices
MIN_SLICES_FOR_PROFILE = 16


@dataclass
class Spectrum:
    """What one FFT pass over a Volume measured.

    Attributes
    ----------
    shape : tuple of int
        ``(rows, cols)`` of each frame.
    n_frames : int
        Frames that went into the profiles.
    profiles : dict
        Axis name (``"rows"``, ``"cols"``, optionally ``"slices"``) -> mean power per
        spatial frequency, centred order (DC at index ``n // 2``), float64.
    log_profiles : dict
        The same axes -> mean of the power in dB (a geometric mean). Unlike the mean
        power, it is not dominated by the few strongest object frequencies of the other
        axis, so noise-floor steps stand out.
    mean_power : ndarray
        ``(rows, cols)`` power averaged over frames (centred).
    mean_log : ndarray
        ``(rows, cols)`` power in dB averaged over frames (centred); the detectors
        read it column by column (or row by row), so that axis-aligned steps (the
        edges of zero-filled k-space) add up while the rings of the object do not.
    map_power : ndarray
        Power spectrum (centred, summed over coils) of the representative frame.
    map_index : int
        Flat frame index of the representative frame.
    domain : str
        ``"image"`` or ``"kspace"`` (the Volume's domain).
    complex_input : bool
        Whether the frames were complex (phase kept) rather than real.
    kspace_shifted : bool or None
        For k-space input, whether the data had to be ``fftshift``-ed (DC at the corner).
    notes : list of str
        Sentences about what was measured (stated subsampling, skipped axes).
    noise_floor_db : dict
        Axis -> level (dB) of the mean-power profile's outermost sixteenth, the floor
        the spectrum reaches at the edge of k-space.
    """

    shape: tuple[int, int]
    n_frames: int
    profiles: dict[str, np.ndarray]
    log_profiles: dict[str, np.ndarray]
    mean_power: np.ndarray
    mean_log: np.ndarray
    map_power: np.ndarray
    map_index: int
    domain: str = "image"
    complex_input: bool = False
    kspace_shifted: bool | None = None
    notes: list[str] = field(default_factory=list)
    noise_floor_db: dict[str, float] = field(default_factory=dict)


def to_db(power: Any) -> np.ndarray:
    """Power to decibels, ``10 log10(p)``, with a floor so that zeros stay finite."""
    p = np.asarray(power, dtype=np.float64)
    return 10.0 * np.log10(np.maximum(p, _TINY))


def frame_power(
    block: np.ndarray,
    *,
    domain: str = "image",
    multi_coil: bool = False,
    shift: bool = True,
    workers: int = 2,
) -> np.ndarray:
    """Centred k-space power of a batch of frames, summed over coils.

    Parameters
    ----------
    block : ndarray
        ``(b, rows, cols)`` or ``(b, coils, rows, cols)``.
    domain : {"image", "kspace"}
        For ``"image"`` the frames are transformed with ``scipy.fft.fft2``; for
        ``"kspace"`` they already are k-space.
    multi_coil : bool
        Whether axis 1 indexes coils (power is summed over it).
    shift : bool
        ``fftshift`` the result so that DC sits at ``n // 2`` (for k-space input,
        ``False`` when the data is already centred).
    workers : int
        Threads for ``scipy.fft``.

    Returns
    -------
    ndarray
        ``(b, rows, cols)`` float32 power.

    References
    ----------
    .. [1] Bracewell, R. N. *The Fourier Transform and Its Applications*, 2000.
    """
    if domain == "image":
        if np.iscomplexobj(block):
            spec = sfft.fft2(block.astype(np.complex64, copy=False), workers=workers)
        else:
            spec = sfft.fft2(block.astype(np.float32, copy=False), workers=workers)
    else:
        spec = block
    power = (spec.real.astype(np.float32) ** 2) + (spec.imag.astype(np.float32) ** 2)
    if multi_coil:
        power = power.sum(axis=1)
    if shift:
        power = sfft.fftshift(power, axes=(-2, -1))
    return power


def half_power(block: np.ndarray, *, multi_coil: bool = False, workers: int = 2) -> np.ndarray:
    """Unshifted power of the real frames' ``rfft2`` (the non-negative column half).

    ``(b, rows, cols // 2 + 1)`` float32, summed over coils when ``multi_coil``;
    :func:`expand_half` gives the full plane.

    References
    ----------
    .. [1] Bracewell, R. N. *The Fourier Transform and Its Applications*, 2000
       (a real signal's transform is Hermitian: ``F(-k) = conj(F(k))``).
    """
    spec = sfft.rfft2(block.astype(np.float32, copy=False), workers=workers)
    re, im = spec.real, spec.imag
    power = re * re
    power += im * im
    if multi_coil:
        power = power.sum(axis=1)
    return power


def _half_weighted_sum(power: np.ndarray, cols: int) -> np.ndarray:
    """Per-frame sum of the full power plane from its ``rfft2`` half, ``(b, 1, 1)``."""
    total = 2.0 * power.sum(axis=(1, 2), dtype=np.float64) - power[..., 0].sum(axis=1)
    if cols % 2 == 0:
        total -= power[..., -1].sum(axis=1)
    return total.reshape(-1, 1, 1)


def expand_half(half: np.ndarray, cols: int) -> np.ndarray:
    """The full unshifted plane of a centrosymmetric map from its ``rfft2`` half.

    ``full[r, c] = half[-r mod rows, cols - c]`` for the columns past the half.
    """
    rows, nh = half.shape[-2:]
    full = np.empty(half.shape[:-2] + (rows, cols), dtype=half.dtype)
    full[..., :nh] = half
    if cols > nh:
        r = (-np.arange(rows)) % rows
        c = cols - np.arange(nh, cols)
        full[..., nh:] = half[..., r, :][..., c]
    return full


def _kspace_needs_shift(power: np.ndarray) -> bool:
    """Whether k-space power has its peak near the corner (DC at index 0) not the centre."""
    rows, cols = power.shape[-2:]
    mean = power.reshape(-1, rows, cols).mean(axis=0)
    r, c = np.unravel_index(int(np.argmax(mean)), mean.shape)
    dr = min(abs(r - rows // 2), rows - abs(r - rows // 2))
    dc = min(abs(c - cols // 2), cols - abs(c - cols // 2))
    dr0 = min(r, rows - r)
    dc0 = min(c, cols - c)
    return bool(dr0 + dc0 < dr + dc)


def _slice_axis_plan(volume: Volume, frame_indices: np.ndarray) -> tuple[bool, str | None]:
    """Whether a through-plane profile is measurable, and why not if it is not."""
    if volume.domain != "image":
        return False, "through-plane profile not measured for k-space input"
    frame_axes = [a for a in volume.axes[:-2] if a != "coils"]
    if frame_axes != ["slices"]:
        return False, None
    n = volume.slice_axis_size or 0
    if n < MIN_SLICES_FOR_PROFILE:
        return False, None
    if len(frame_indices) != n:
        return False, "through-plane profile not measured: frames were subsampled"
    return True, None


def compute_spectrum(
    volume: Volume,
    *,
    frame_indices: Any = None,
    batch: int = 16,
    workers: int = 2,
) -> Spectrum:
    """Stream a Volume once and accumulate its k-space energy profiles.

    Parameters
    ----------
    volume : Volume
    frame_indices : sequence of int, optional
        Flat frames to use (default all).
    batch : int
        Frames per batch.
    workers : int
        ``scipy.fft`` threads.

    Returns
    -------
    Spectrum

    References
    ----------
    .. [1] Bracewell, R. N. *The Fourier Transform and Its Applications*, 2000.
    """
    rows, cols = volume.image_shape
    idx_all = np.arange(volume.n_slices) if frame_indices is None else np.asarray(frame_indices)
    multi = volume.coil_axis is not None
    complex_input = volume.value_type == "complex"
    rep = int(idx_all[len(idx_all) // 2])
    sum_p: np.ndarray | None = None
    sum_log: np.ndarray | None = None
    map_power = np.zeros((rows, cols), dtype=np.float32)
    n_frames = 0
    shift: bool | None = None
    notes: list[str] = []
    do_slices, why_not = _slice_axis_plan(volume, idx_all)
    if why_not:
        notes.append(why_not)
    col_sel = np.unique(np.linspace(0, cols - 1, min(cols, SLICE_PROFILE_COLUMNS)).astype(int))
    col_buf = None
    if do_slices:
        n_s = len(idx_all)
        lead = (n_s, volume.n_coils) if multi else (n_s,)
        dt = np.complex64 if complex_input else np.float32
        col_buf = np.zeros(lead + (rows, len(col_sel)), dtype=dt)
    # real images: the power of a real frame is centrosymmetric, so half of it
    # (``rfft2``) carries everything; the sums are taken over the half, unshifted,
    # and expanded and centred once at the end
    half = volume.domain == "image" and not complex_input
    pos = 0
    for idx, block in volume.iter_slices(batch, indices=idx_all):
        if block.dtype.kind not in "iub" and not np.all(np.isfinite(block)):
            # a copy: the block may be a view of the caller's (or a read-only mapped) array
            block = np.nan_to_num(block)
        if half:
            power = half_power(block, multi_coil=multi, workers=workers)
            mean = _half_weighted_sum(power, cols) / np.float32(rows * cols)
        elif volume.domain == "kspace":
            if shift is None:
                raw = frame_power(block, domain="kspace", multi_coil=multi, shift=False)
                shift = _kspace_needs_shift(raw)
            power = frame_power(block, domain="kspace", multi_coil=multi, shift=bool(shift))
            mean = power.mean(axis=(1, 2), keepdims=True)
        else:
            power = frame_power(block, domain="image", multi_coil=multi, workers=workers)
            mean = power.mean(axis=(1, 2), keepdims=True)
        if sum_p is None:
            sum_p = np.zeros(power.shape[1:], dtype=np.float64)
            sum_log = np.zeros(power.shape[1:], dtype=np.float64)
        sum_p += power.sum(axis=0, dtype=np.float64)
        hit = np.nonzero(idx == rep)[0]
        if len(hit):
            map_power = power[int(hit[0])].copy()
        floor = np.float32(1e-12) * mean.astype(np.float32) + np.float32(1e-30)
        power += floor
        sum_log += np.log10(power, out=power).sum(axis=0, dtype=np.float64)
        if col_buf is not None:
            col_buf[pos:pos + len(idx)] = block[..., col_sel]
        pos += len(idx)
        n_frames += len(idx)
    if n_frames == 0:
        raise ValueError("the volume has no frames to analyse")
    mean_power = sum_p / n_frames
    mean_log = sum_log * (10.0 / n_frames)
    if half:
        mean_power = sfft.fftshift(expand_half(mean_power, cols))
        mean_log = sfft.fftshift(expand_half(mean_log, cols))
        map_power = sfft.fftshift(expand_half(map_power, cols))
    profiles = {"rows": mean_power.mean(axis=1), "cols": mean_power.mean(axis=0)}
    log_profiles = {"rows": mean_log.mean(axis=1), "cols": mean_log.mean(axis=0)}
    if col_buf is not None:
        spec = sfft.fft(col_buf, axis=0, workers=workers)
        p = spec.real.astype(np.float64) ** 2 + spec.imag.astype(np.float64) ** 2
        if multi:
            p = p.sum(axis=1)
        profiles["slices"] = sfft.fftshift(p.mean(axis=(1, 2)))
        floor = 1e-12 * p.mean() + 1e-30
        log_profiles["slices"] = sfft.fftshift((10.0 * np.log10(p + floor)).mean(axis=(1, 2)))
    return Spectrum(
        noise_floor_db={ax: noise_floor_db(p) for ax, p in profiles.items()},
        shape=(rows, cols),
        n_frames=n_frames,
        profiles=profiles,
        log_profiles=log_profiles,
        mean_power=mean_power,
        mean_log=mean_log,
        map_power=map_power,
        map_index=rep,
        domain=volume.domain,
        complex_input=complex_input and volume.domain == "image",
        kspace_shifted=shift,
        notes=notes,
    )


def noise_floor_db(profile: Any, fraction: float = 1 / 16) -> float:
    """Level (dB) of a centred power profile at the edge of k-space.

    The median of the outermost ``fraction`` of samples on both sides: for raw data
    the white noise floor; for zero-filled data the level outside the support.

    References
    ----------
    .. [1] Bracewell, R. N. *The Fourier Transform and Its Applications*, 2000.
    """
    db = to_db(profile)
    m = max(1, int(round(len(db) * fraction / 2)))
    return float(np.median(np.r_[db[:m], db[len(db) - m:]]))


def spectrum_step(volume: Volume, scope: Any, notes: Any) -> Spectrum:
    """The shared step: the Volume's :class:`Spectrum` over the analysed frames.

    Parameters
    ----------
    volume : Volume
    scope : Scope
        Supplies ``frames``, ``batch`` and ``workers``.
    notes : Notes
        Receives the spectrum's own notes (stated subsampling, skipped axes).

    Raises
    ------
    StepUnavailableError
        When the frames are too small for a spectral analysis.

    References
    ----------
    .. [1] Bracewell, R. N. *The Fourier Transform and Its Applications*, 2000.
    """
    from app.traces.base import StepUnavailableError

    small = too_small(volume)
    if small:
        raise StepUnavailableError(small)
    spec = compute_spectrum(volume, frame_indices=scope.frames, batch=scope.batch,
                            workers=scope.workers)
    for note in spec.notes:
        notes.add(note)
    return spec


# ----- evidence helpers -------------------------------------------------------------------
def downsample_mean(values: Any, max_len: int = 1024) -> np.ndarray:
    """Average consecutive samples so that at most ``max_len`` remain."""
    v = np.asarray(values, dtype=np.float64)
    if len(v) <= max_len:
        return v
    step = int(np.ceil(len(v) / max_len))
    n = (len(v) // step) * step
    head = v[:n].reshape(-1, step).mean(axis=1)
    return np.concatenate([head, [v[n:].mean()]]) if n < len(v) else head


def profile_db_evidence(spec: Spectrum) -> dict[str, list]:
    """The ``profiles_db`` evidence: per-axis profiles in dB, at most 1024 long."""
    return {
        ax: round_sig(to_db(downsample_mean(p)))
        for ax, p in spec.profiles.items()
        if ax in ("rows", "cols", "slices")
    }


def block_average(image: Any, max_side: int = 128) -> tuple[np.ndarray, list[int]]:
    """Block-average a 2D map to at most ``max_side`` per side; return it and the steps."""
    a = np.asarray(image, dtype=np.float64)
    steps = [int(np.ceil(s / max_side)) for s in a.shape]
    r = (a.shape[0] // steps[0]) * steps[0]
    c = (a.shape[1] // steps[1]) * steps[1]
    out = a[:r, :c].reshape(r // steps[0], steps[0], c // steps[1], steps[1]).mean(axis=(1, 3))
    return out, steps


def map_evidence(spec: Spectrum) -> dict[str, Any]:
    """``spectrum_map_db``, ``spectrum_map_step`` and ``spectrum_slice`` evidence."""
    m, steps = block_average(spec.map_power, 128)
    return {
        "spectrum_map_db": round_sig(to_db(m)),
        "spectrum_map_step": steps,
        "spectrum_slice": int(spec.map_index),
    }


# ----- profile analysis ---------------------------------------------------------------------
def fold_sides(profile: Any) -> tuple[np.ndarray, np.ndarray]:
    """Split a centred profile into its outward sides from DC.

    Returns ``(positive, negative)``: ``positive[d]`` is the sample ``d`` above DC
    (index ``n // 2 + d``), ``negative[d]`` the one ``d`` below (index ``n // 2 - d``).
    """
    p = np.asarray(profile)
    c = len(p) // 2
    return p[c:], p[c::-1]


def step_scores(side_db: np.ndarray, window: int, gap: int = 1) -> np.ndarray:
    """Size of a downward step after each sample of an outward profile side, in dB.

    A straight line is fitted to the ``window`` samples ending at ``d`` and another to
    the ``window`` samples starting at ``d + 1 + gap``; the score is the gap between
    the two lines extrapolated to the middle of the skipped samples. A smooth decay
    (power law, window roll-off) scores near 0; the edge of zero-filled k-space scores
    the level drop. Skipping one sample (``gap=1``) lets an edge that falls over two
    samples (the half-level sample of an even-sized acquisition seen through a
    magnitude image) count in full.

    Parameters
    ----------
    side_db : ndarray
        ``(n,)`` or ``(n, m)``: outward samples along axis 0 (``m`` independent columns).
    window : int
        Samples per fitted line.
    gap : int
        Samples skipped between the two windows.

    Returns
    -------
    ndarray
        The same shape as ``side_db``; positions without two full windows are NaN.

    References
    ----------
    .. [1] Canny, J. "A computational approach to edge detection", IEEE Trans. PAMI
       8(6), 1986 (a step detected against a local model, here linear in dB).
    """
    a = np.asarray(side_db, dtype=np.float64)
    one_d = a.ndim == 1
    if one_d:
        a = a[:, None]
    n = a.shape[0]
    out = np.full(a.shape, np.nan)
    w = int(window)
    g = int(gap)
    if n >= 2 * w + g + 1:
        win = np.lib.stride_tricks.sliding_window_view(a, w, axis=0)  # (n - w + 1, m, w)
        xc = np.arange(w) - (w - 1) / 2.0
        slope = win @ xc / float((xc**2).sum())
        mean = win.mean(axis=-1)
        half = (w - 1) / 2.0 + 0.5 + g / 2.0
        end_val = mean + slope * half  # extrapolated to the middle of the gap after it
        start_val = mean - slope * half  # extrapolated to the middle of the gap before it
        # the window starting at k covers [k, k + w - 1]; the inside one ends at d
        d = np.arange(w - 1, n - w - g)
        out[d] = end_val[d - w + 1] - start_val[d + 1 + g]
    return out[:, 0] if one_d else out


#: Smallest image side on which a k-space profile has an edge to find.
MIN_SIDE = 8


def too_small(volume: Volume) -> str | None:
    """Why the spectral analysers cannot work on this volume's images, or None.

    An image with a side under :data:`MIN_SIDE` samples has too few k-space
    samples per axis for a support edge, a window roll-off or a periodicity
    peak to be told from noise.
    """
    rows, cols = volume.image_shape
    if min(rows, cols) < MIN_SIDE:
        return (f"The images are {rows} x {cols} samples, smaller than "
                f"{MIN_SIDE} x {MIN_SIDE}: too few k-space samples to measure.")
    return None



# ----- apodization windows ------------------------------------------------------------------
#: Fermi roll-off width (in half-widths) assumed when only the radius is fitted
FERMI_WIDTH = 0.05


def window_curve(family: str, param: float | None, u: Any) -> np.ndarray:
    """Amplitude of an apodization window at normalised frequencies ``u = k / W`` (0 outside).

    ``W`` is the half-width of the acquired support; ``|u| <= 1`` is inside it. On the
    symmetric grid ``u_j = (j - (M - 1) / 2) / ((M - 1) / 2)`` the Harris families equal
    ``scipy.signal.windows.<family>(M, sym=True)``. Families: ``box`` (no window),
    ``hann``, ``hamming``, ``blackman`` (Harris 1978), ``tukey`` (taper fraction
    ``param``), ``fermi`` (``1 / (1 + exp((|u| - param) / FERMI_WIDTH))``, radius
    ``param``) and ``gaussian`` (standard deviation ``param`` half-widths).

    References
    ----------
    .. [1] Harris, F. J. "On the use of windows for harmonic analysis with the discrete
       Fourier transform", Proc. IEEE 66(1):51-83, 1978.
    """
    a = np.abs(np.asarray(u, dtype=np.float64))
    inside = a <= 1.0 + 1e-12
    ac = np.minimum(a, 1.0)
    if family == "box":
        w = np.ones_like(a)
    elif family == "hann":
        w = 0.5 * (1 + np.cos(np.pi * ac))
    elif family == "hamming":
        w = 0.54 + 0.46 * np.cos(np.pi * ac)
    elif family == "blackman":
        w = 0.42 + 0.5 * np.cos(np.pi * ac) + 0.08 * np.cos(2 * np.pi * ac)
    elif family == "tukey":
        t = float(param)
        flat = 1.0 - t
        w = np.where(ac <= flat, 1.0,
                     0.5 * (1 + np.cos(np.pi * (ac - flat) / max(t, 1e-9))))
    elif family == "fermi":
        w = 1.0 / (1.0 + np.exp((a - float(param)) / FERMI_WIDTH))
    elif family == "gaussian":
        w = np.exp(-(a**2) / (2.0 * float(param) ** 2))
    else:
        raise ValueError(f"unknown window family {family!r}")
    return np.where(inside, w, 0.0)


#: window families and parameters the support-and-window fit tries (``box``: none)
WINDOW_CANDIDATES: tuple[tuple[str, float | None], ...] = (
    (("box", None), ("hann", None), ("hamming", None), ("blackman", None))
    + tuple(("tukey", t) for t in (0.2, 0.35, 0.5, 0.65, 0.8))
    + tuple(("fermi", r) for r in (0.6, 0.7, 0.75, 0.8, 0.85, 0.9))
    + tuple(("gaussian", s) for s in (0.25, 0.3, 0.35, 0.4, 0.5, 0.6, 0.75))
)


def support_window(n: int, width: int, family: str, param: float | None) -> np.ndarray:
    """A window of ``width`` samples placed on a centred axis of ``n`` samples (0 outside).

    The acquired samples are ``n // 2 - width // 2`` ... ``+ width - 1`` (centred
    order), where zero-filling puts them; the window is the symmetric one over them.

    References
    ----------
    .. [1] Harris, Proc. IEEE 66(1):51-83, 1978.
    """
    out = np.zeros(n)
    width = int(min(max(width, 1), n))
    if width == 1:
        u = np.zeros(1)
    else:
        u = (np.arange(width) - (width - 1) / 2.0) / ((width - 1) / 2.0)
    start = n // 2 - width // 2
    out[start:start + width] = window_curve(family, param, u)
    return out
