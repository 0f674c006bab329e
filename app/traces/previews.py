"""Small preview images of a Volume for the web page's slice viewer.

For up to 12 evenly spaced frames: the magnitude image (root-sum-of-squares
over receive channels when the volume is multi-coil) and its centred log-power
spectrum, both as uint8 arrays of at most 256 x 256. Pure: arrays in, dict out.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.fft as sfft

from app.io.volume import Volume
from app.traces.context import evenly_spaced

MAX_FRAMES = 12
MAX_SIDE = 256


def preview_indices(n_frames: int, max_frames: int = MAX_FRAMES) -> np.ndarray:
    """Evenly spaced flat frame indices, at most ``max_frames`` of them, first and last included."""
    return evenly_spaced(np.arange(max(0, n_frames)), max_frames)


def _block_mean(a: np.ndarray, max_side: int) -> np.ndarray:
    """Average non-overlapping blocks so that each side is at most ``max_side``."""
    fy = int(np.ceil(a.shape[0] / max_side))
    fx = int(np.ceil(a.shape[1] / max_side))
    if fy == 1 and fx == 1:
        return a
    ny, nx = (a.shape[0] // fy) * fy, (a.shape[1] // fx) * fx
    a = a[:ny, :nx]
    return a.reshape(ny // fy, fy, nx // fx, fx).mean(axis=(1, 3))


def _to_uint8(a: np.ndarray, lo: float, hi: float) -> np.ndarray:
    if not np.isfinite(hi) or not np.isfinite(lo) or hi <= lo:
        return np.zeros(a.shape, dtype=np.uint8)
    return np.clip(np.round((a - lo) / (hi - lo) * 255.0), 0, 255).astype(np.uint8)


def _frame_planes(frame: np.ndarray, domain: str, multi: bool, workers: int
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Magnitude image and centred power spectrum of one frame (coils first if multi)."""
    frame = np.nan_to_num(np.asarray(frame))
    axes = (-2, -1)
    if domain == "kspace":
        k = frame
        img = sfft.fftshift(sfft.ifft2(sfft.ifftshift(k, axes=axes), axes=axes,
                                       workers=workers), axes=axes)
    else:
        img = frame
        k = sfft.fftshift(sfft.fft2(sfft.ifftshift(img.astype(np.complex64, copy=False),
                                                   axes=axes), axes=axes, workers=workers),
                          axes=axes)
    power = np.abs(k) ** 2
    if multi:
        mag = np.sqrt((np.abs(img) ** 2).sum(axis=0))
        power = power.sum(axis=0)
    else:
        mag = np.abs(img)
    return mag.astype(np.float64), power.astype(np.float64)


def make_previews(volume: Volume, *, max_frames: int = MAX_FRAMES, max_side: int = MAX_SIDE,
                  workers: int = 1) -> dict[str, Any]:
    """Preview images and log-power spectra for the slice viewer.

    Parameters
    ----------
    volume : Volume
        Any domain; k-space volumes are shown as their inverse transform.
    max_frames : int
        At most this many evenly spaced frames.
    max_side : int
        Each preview is block-averaged to at most this many pixels per side
        (spectra are averaged in power before the logarithm, so the edge of an
        empty band stays where it is).
    workers : int
        ``scipy.fft`` workers.

    Returns
    -------
    dict
        ``indices`` (list of int, flat frame indices), ``images`` and ``spectra``
        (lists of 2D uint8 arrays). Images map 0 to the 99.5th percentile of
        the magnitude onto 0-255; spectra map ``10 log10`` power from 80 dB
        below the peak (or the lowest finite level, if higher) to the peak.

    References
    ----------
    Roemer P.B. et al. (1990), "The NMR phased array", Magn. Reson. Med. 16:192-225
    (root-sum-of-squares combination used for the multi-coil magnitude).
    """
    idx = preview_indices(volume.n_slices, max_frames)
    multi = volume.coil_axis is not None
    images: list[np.ndarray] = []
    spectra: list[np.ndarray] = []
    for _, block in volume.iter_slices(4, indices=idx):
        for frame in block:
            mag, power = _frame_planes(frame, volume.domain, multi, workers)
            mag = _block_mean(mag, max_side)
            power = _block_mean(power, max_side)
            hi = float(np.percentile(mag, 99.5)) if mag.size else 0.0
            images.append(_to_uint8(mag, 0.0, hi if hi > 0 else float(mag.max())))
            with np.errstate(divide="ignore"):
                db = 10.0 * np.log10(power)
            finite = db[np.isfinite(db)]
            if finite.size:
                top = float(finite.max())
                bottom = max(top - 80.0, float(finite.min()))
                db = np.where(np.isfinite(db), db, bottom)
                spectra.append(_to_uint8(db, bottom, top))
            else:
                spectra.append(np.zeros(db.shape, dtype=np.uint8))
    return {"indices": [int(i) for i in idx[: len(images)]], "images": images,
            "spectra": spectra}
