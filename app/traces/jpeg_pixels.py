"""The JPEG finding in the stored grey levels (a shared step).

A decoded JPEG is recognised from its pixels by its quantised 8 x 8 DCT
coefficients (:mod:`app.traces.jpeg_grid`), even after a crop, a lossless re-save
or a linear rescale; the estimated quantisation table is matched to the IJG
quality scale (:mod:`app.traces.jpeg_tables`). Computed once per dataset by the
analysis plan: the ``lossy_compression`` analyser reports it, and ``resampling``
sets the block grid's periodic peaks aside when it is present.

References
----------
Z. Fan and R. L. de Queiroz, "Identification of bitmap compression history: JPEG
detection and quantizer estimation", IEEE Trans. Image Processing 12(2):230-235,
2003.
ITU-T Recommendation T.81 (1992) | ISO/IEC 10918-1, Annex K.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from app.io.volume import Volume
from app.traces import jpeg_grid
from app.traces.context import Notes, Scope, evenly_spaced
from app.traces.jpeg_tables import match_quality, scaled_table

#: Frames analysed at most (evenly spaced); the grid statistics pool their blocks.
MAX_FRAMES = 8
#: Frequencies with a measured step above 1 needed to call JPEG from the pixels.
MIN_MEASURED = 3
#: ... of which at least this many among the low frequencies (u + v <= 4), unless at
#: least MIN_MEASURED_ANY frequencies show one. Uncompressed interpolated images
#: showed lattice-like coincidences at up to 2 high frequencies (bench/accuracy_jpeg.py
#: and its null runs); small high-quality JPEGs have too few large low-frequency
#: coefficients to prove steps of 2 there.
MIN_MEASURED_LOW = 2
MIN_MEASURED_ANY = 6
#: Usable blocks needed for any call from the pixels.
MIN_BLOCKS = 16
#: Largest root-mean-square relative table error still reported as an IJG quality.
MAX_FIT_ERROR = 0.15
#: A wavelet subband whose 9/7 detail coefficient density on [1, 4) grey levels is
#: below this share of its density on [4, 16) shows a JPEG 2000 deadzone.
#: Uncompressed MR (pydicom's files, the synthetic kinds of bench/accuracy_jpeg.py at
#: 8 and 12 bits) showed at least 0.9; Pillow's JPEG 2000 encoder at 10:1 about
#: 0.01, pydicom-data's MR2_J2KI.dcm (18:1) 0.02 over the whole image and 0.13 over
#: its central 512 x 512 (prototype runs, 2026-12-01).
MAX_GAP_RATIO = 0.25
#: Frames and central region side scanned for the deadzone.
DEADZONE_FRAMES = 4
DEADZONE_SIZE = 1024


@dataclass
class PixelFinding:
    """What the pixels say about block-DCT (JPEG) compression.

    Attributes
    ----------
    status : {"present", "absent", "inconclusive"}
    reason : str
        One sentence behind the status.
    grid : GridEstimate or None
    quality : int or None
        Matched IJG quality (None when the table is not an Annex K scaling).
    matched_quality : int or None
        Nearest IJG quality regardless of the fit.
    fit_error : float or None
        Root-mean-square relative difference to the matched table.
    lattice : Lattice or None
    bits : int or None
        8 or 12: the sample precision the grey-level span fits.
    frames : list of int
        Flat frame indices analysed.
    """

    status: str
    reason: str
    grid: jpeg_grid.GridEstimate | None = None
    quality: int | None = None
    matched_quality: int | None = None
    fit_error: float | None = None
    lattice: jpeg_grid.Lattice | None = None
    bits: int | None = None
    frames: list[int] = field(default_factory=list)
    deadzone: jpeg_grid.DeadzoneEvidence | None = None



def trimmed_match(table: np.ndarray, *, baseline: bool = True) -> tuple[int, float]:
    """IJG quality of an estimated table, robust to a few wrong entries.

    A first :func:`~app.traces.jpeg_tables.match_quality` over all measured
    entries; entries more than 50 % away from that match (a divisor of the true
    step taken where few coefficients were non-zero) are set aside and the match
    is repeated. The error returned is over the entries kept.

    References
    ----------
    ITU-T T.81 Annex K with libjpeg's quality scaling.
    """
    t = np.asarray(table, dtype=float).reshape(8, 8)
    q, err, _ = match_quality(t, baseline=baseline)
    ref = scaled_table(q, baseline=baseline).astype(float)
    with np.errstate(invalid="ignore"):
        keep = np.isfinite(t) & (np.abs(t - ref) <= 0.5 * ref)
    if keep.sum() >= 3 and keep.sum() < np.isfinite(t).sum():
        q, err, _ = match_quality(np.where(keep, t, np.nan), baseline=baseline)
    return int(q), float(err)


def _frames(volume: Volume, scope: Scope, notes: Notes) -> np.ndarray:
    idx = np.asarray(scope.frames, dtype=int)
    if len(idx) > MAX_FRAMES:
        idx = evenly_spaced(idx, MAX_FRAMES)
        note = (f"lossy_compression: block-DCT statistics from {len(idx)} of "
                f"{volume.n_slices} frames, evenly spaced")
        notes.add(note)
    return idx


_COMPLEX_REASON = ("The values are complex: a JPEG decoder returns real grey levels, so "
                   "these did not come from one.")


def pixel_finding(images: np.ndarray, *, workers: int = 1) -> PixelFinding:
    """Look for JPEG block-DCT quantisation in stored grey levels.

    Parameters
    ----------
    images : ndarray
        ``(frames, rows, cols)`` stored values (any real dtype).
    workers : int
        ``scipy.fft`` workers.

    Returns
    -------
    PixelFinding

    References
    ----------
    Fan and de Queiroz (2003); ITU-T T.81 Annex K.
    """
    x = np.asarray(images)
    if np.iscomplexobj(x):
        return PixelFinding("absent", _COMPLEX_REASON)
    if x.ndim == 2:
        x = x[None]
    if x.shape[-1] < 16 or x.shape[-2] < 16:
        return PixelFinding("inconclusive", "The images are smaller than 16 x 16 pixels, too "
                            "small to find an 8 x 8 block grid.")
    x = x.astype(np.float64, copy=False)
    finite = np.isfinite(x)
    lat = jpeg_grid.find_lattice(x[finite])
    if lat.n_levels < 2:
        return PixelFinding("inconclusive", "The image is constant: there is no block "
                            "structure to measure.", lattice=lat)
    if not lat.found:
        if lat.n_levels > min(4096, 0.5 * finite.sum()):
            return PixelFinding(
                "absent", f"The grey levels are continuous ({lat.n_levels} distinct values, "
                "on no regular lattice), so no 8- or 12-bit decoded stage survives in them.",
                lattice=lat)
        return PixelFinding(
            "inconclusive", f"The {lat.n_levels} distinct grey levels lie on no affine lattice "
            "(a nonlinear intensity map?), so the DCT coefficients cannot be put back on "
            "a JPEG decoder's integer scale.", lattice=lat)
    if lat.span > 4095:
        return PixelFinding(
            "absent", f"The grey levels span {lat.span + 1} lattice steps, more than a 12-bit "
            "JPEG can hold, so the values are not a decoded (and linearly rescaled) JPEG.",
            lattice=lat)
    levels = jpeg_grid.lattice_levels(np.where(finite, x, lat.b), lat)
    bits = 8 if lat.span <= 255 else 12
    lo, hi = float(levels.min()), float(levels.max())
    grid = jpeg_grid.analyse_grid(levels, low=lo, high=hi, workers=workers,
                                  max_step=255 if bits == 8 else 1023)
    if grid.n_blocks < MIN_BLOCKS:
        return PixelFinding(
            "inconclusive", f"Only {grid.n_blocks} 8 x 8 blocks are neither flat nor touch the "
            "clipping levels; too few to measure a quantiser.", grid=grid, lattice=lat, bits=bits)
    if grid.n_measured < MIN_MEASURED or (grid.n_measured_low < MIN_MEASURED_LOW
                                          and grid.n_measured < MIN_MEASURED_ANY):
        dz = jpeg_grid.wavelet_deadzone(
            jpeg_grid.central_region(levels[:DEADZONE_FRAMES], DEADZONE_SIZE))
        if dz.min_gap_ratio is not None and dz.min_gap_ratio <= MAX_GAP_RATIO:
            worst = min(dz.bands, key=lambda b: b["gap_ratio"])
            return PixelFinding(
                "inconclusive", "No 8 x 8 JPEG grid, but a wavelet deadzone: in the level "
                f"{worst['level']} {worst['band']} subband the 9/7 detail coefficients "
                "between 1 and 4 grey levels are "
                f"{worst['gap_ratio']:.2f} times as dense as those between 4 and 16, as "
                "JPEG 2000 quantisation leaves; the pixels alone cannot confirm it.",
                grid=grid, lattice=lat, bits=bits, deadzone=dz)
        return PixelFinding(
            "absent", f"No JPEG quantiser in the DCT coefficients of {grid.n_blocks} blocks on "
            f"any 8 x 8 grid ({grid.n_measured} of 64 frequencies show a step above 1, "
            f"{grid.n_measured_low} of them low ones; JPEG needs {MIN_MEASURED} with "
            f"{MIN_MEASURED_LOW} low ones, or {MIN_MEASURED_ANY}), and no JPEG 2000 "
            "deadzone in the wavelet subbands.",
            grid=grid, lattice=lat, bits=bits, deadzone=dz)
    q, err = trimmed_match(grid.steps, baseline=bits == 8)
    quality = q if err <= MAX_FIT_ERROR else None
    return PixelFinding(
        "present", f"{grid.n_measured} of 64 DCT frequencies on the 8 x 8 grid at "
        f"[{grid.origin[0]}, {grid.origin[1]}] are quantised.", grid=grid, quality=quality,
        matched_quality=q, fit_error=err, lattice=lat, bits=bits)


def jpeg_pixels_step(volume: Volume, scope: Scope, notes: Notes) -> PixelFinding:
    """The shared step: the JPEG finding in the stored grey levels of the analysed frames."""
    if volume.domain == "kspace":
        return PixelFinding("absent", "The data are k-space samples, not decoded grey levels: "
                            "no JPEG stage sits between the scanner and these values.")
    if volume.value_type == "complex":
        return PixelFinding("absent", _COMPLEX_REASON)
    idx = _frames(volume, scope, notes)
    try:
        parts = []
        for _, block in volume.iter_slices(scope.batch, scaled=False, indices=idx):
            b = np.asarray(block)
            parts.append(b.reshape(-1, *b.shape[-2:]))
        images = np.concatenate(parts, axis=0)
    except Exception as exc:  # noqa: BLE001 - undecodable pixels leave the header to speak
        said = " ".join(str(exc).split())[:300]
        return PixelFinding("inconclusive", f"The pixels could not be read ({said}).")
    pix = pixel_finding(images, workers=scope.workers)
    pix.frames = [int(i) for i in idx]
    return pix
