"""The ``lossy_compression`` analyser: JPEG traces in the pixels and declared compression.

From the pixels, a decoded JPEG is recognised by its quantised 8 x 8 DCT
coefficients (:mod:`app.traces.jpeg_grid`), even after a crop, a lossless re-save
(PNG, uncompressed DICOM) or a linear rescale to 12 or 16 bits; the estimated
quantisation table is matched to the IJG quality scale
(:mod:`app.traces.jpeg_tables`). From the header, the transfer syntax, the DICOM
lossy-compression flag and a JPEG stream's stored tables declare compression.
Both are reported, and a disagreement between them is flagged.

References
----------
Z. Fan and R. L. de Queiroz, "Identification of bitmap compression history: JPEG
detection and quantizer estimation", IEEE Trans. Image Processing 12(2):230-235,
2003.
ITU-T Recommendation T.81 (1992) | ISO/IEC 10918-1, Annex K.
DICOM PS3.5 section 10 (transfer syntaxes) and PS3.3 C.7.6.1.1.5 (Lossy Image
Compression, "00" / "01").
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from app.io.volume import Volume
from app.traces import jpeg_grid
from app.traces.base import Trace, register
from app.traces.context import AnalysisContext, evenly_spaced
from app.traces.jpeg_tables import match_quality, scaled_table

TRACE_ID = "lossy_compression"
DEFAULTS = {"method": None, "quality": None, "block_origin": None}

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
#: Pixel and stored qualities further apart than this disagree.
QUALITY_TOLERANCE = 5

#: DICOM transfer syntaxes (PS3.5 section 10 and Annex A) that are lossy by definition.
LOSSY_SYNTAXES = {
    "1.2.840.10008.1.2.4.50": "JPEG baseline (process 1)",
    "1.2.840.10008.1.2.4.51": "JPEG extended (processes 2 and 4)",
    "1.2.840.10008.1.2.4.81": "JPEG-LS near-lossless",
}
#: Transfer syntaxes that may carry lossy data, decided by Lossy Image Compression.
MAYBE_LOSSY_SYNTAXES = {
    "1.2.840.10008.1.2.4.91": "JPEG 2000",
    "1.2.840.10008.1.2.4.93": "JPEG 2000 Part 2 multi-component",
    "1.2.840.10008.1.2.4.203": "High-Throughput JPEG 2000",
}
_JPEG_DCT_SYNTAXES = {"1.2.840.10008.1.2.4.50", "1.2.840.10008.1.2.4.51"}
_WAVELET_SYNTAXES = {"1.2.840.10008.1.2.4.90", "1.2.840.10008.1.2.4.91",
                     "1.2.840.10008.1.2.4.92", "1.2.840.10008.1.2.4.93",
                     "1.2.840.10008.1.2.4.201", "1.2.840.10008.1.2.4.202",
                     "1.2.840.10008.1.2.4.203"}


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


@dataclass
class HeaderFinding:
    """What the header declares about lossy compression.

    Attributes
    ----------
    lossy : bool or None
        True when declared lossy, False when declared lossless, None when silent.
    method : str or None
        Lossy method or transfer syntax name the header gives.
    transfer_syntax : str or None
    stored_table : ndarray or None
        8 x 8 luminance quantisation table of the stored JPEG stream (natural order).
    stored_quality : int or None
        IJG quality matched to the stored table (or declared).
    stored_fit_error : float or None
    wavelet : bool
        The transfer syntax is a JPEG 2000 family one (no 8 x 8 grid to find).
    """

    lossy: bool | None = None
    method: str | None = None
    transfer_syntax: str | None = None
    stored_table: np.ndarray | None = None
    stored_quality: int | None = None
    stored_fit_error: float | None = None
    wavelet: bool = False

    @property
    def jpeg_dct(self) -> bool:
        """The header names a DCT-based JPEG process (stored table or JPEG syntax)."""
        return self.stored_table is not None or self.transfer_syntax in _JPEG_DCT_SYNTAXES


def _sig4(x: float | None) -> float | None:
    if x is None or not np.isfinite(x):
        return None
    return float(f"{float(x):.4g}")


def _table_list(t: np.ndarray | None) -> list[list[float | int | None]] | None:
    if t is None:
        return None
    a = np.asarray(t, dtype=float).reshape(8, 8)
    return [[int(v) if np.isfinite(v) and v == int(v) else _sig4(v) for v in row] for row in a]


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


def _frames(volume: Volume, ctx: AnalysisContext) -> np.ndarray:
    idx = np.asarray(ctx.frame_indices(), dtype=int)
    if len(idx) > MAX_FRAMES:
        idx = evenly_spaced(idx, MAX_FRAMES)
        note = (f"lossy_compression: block-DCT statistics from {len(idx)} of "
                f"{volume.n_slices} frames, evenly spaced")
        ctx.note(note)
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


def header_finding(volume: Volume, declared: dict[str, Any] | None) -> HeaderFinding:
    """What the header (normalised by the reader and the header module) declares.

    Parameters
    ----------
    volume : Volume
        Its ``header.fields`` (``lossy_compression``, ``lossy_method``,
        ``transfer_syntax``, ``jpeg_quant_tables``) are the fallback.
    declared : dict or None
        :func:`app.traces.header.provenance`'s ``declared`` dict (keys
        ``lossy_compression``, ``lossy_method``, ``transfer_syntax``,
        ``stored_jpeg_quality``, ``stored_jpeg_table``).

    Returns
    -------
    HeaderFinding

    References
    ----------
    DICOM PS3.5 section 10 (transfer syntaxes), PS3.3 C.7.6.1.1.5 (Lossy Image
    Compression); ITU-T T.81 B.2.4.1 (DQT) and Annex K.
    """
    d = dict(declared or {})
    f = volume.header.fields

    def pick(*keys: str) -> Any:
        for src in (d, f):
            for k in keys:
                if src.get(k) is not None:
                    return src[k]
        return None

    ts = pick("transfer_syntax")
    ts = str(ts) if ts is not None else None
    lossy = pick("lossy_compression")
    method = pick("lossy_method")
    table = pick("stored_jpeg_table")
    if table is None and f.get("jpeg_quant_tables"):
        table = f["jpeg_quant_tables"][0]
    stored = None
    if table is not None:
        try:
            stored = np.asarray(table, dtype=float).reshape(8, 8)
        except ValueError:
            stored = None
    if lossy is None and ts in LOSSY_SYNTAXES:
        lossy = True
    if method is None and ts is not None:
        method = LOSSY_SYNTAXES.get(ts) or MAYBE_LOSSY_SYNTAXES.get(ts)
    quality = pick("stored_jpeg_quality")
    fit = None
    if stored is not None and np.all(np.isfinite(stored)) and stored.min() >= 1:
        q, fit = trimmed_match(stored, baseline=bool(stored.max() <= 255))
        if quality is None and fit <= MAX_FIT_ERROR:
            quality = q
    return HeaderFinding(
        lossy=None if lossy is None else bool(lossy),
        method=None if method is None else str(method), transfer_syntax=ts, stored_table=stored,
        stored_quality=None if quality is None else int(quality), stored_fit_error=fit,
        wavelet=ts in _WAVELET_SYNTAXES)


def _matched_table(pix: PixelFinding, head: HeaderFinding) -> list | None:
    """Annex K scaled to the pixels' matched quality, else to the stored table's."""
    if pix.status == "present" and pix.matched_quality is not None:
        return _table_list(scaled_table(pix.matched_quality, baseline=pix.bits == 8))
    if head.stored_quality is not None:
        baseline = head.stored_table is None or bool(head.stored_table.max() <= 255)
        return _table_list(scaled_table(head.stored_quality, baseline=baseline))
    return None


def combine(pix: PixelFinding, head: HeaderFinding) -> Trace:
    """One trace from the pixel and header findings, flagging where they disagree.

    Pixels that carry JPEG traces give ``method: jpeg_dct`` (whatever the header
    says); a header that declares lossy compression the pixels do not show gives
    ``method: declared``.

    References
    ----------
    The report contract (shared/REPORT_CONTRACT.md), ``lossy_compression``.
    """
    g = pix.grid
    disagreement: str | None = None
    evidence: dict[str, Any] = {
        "blocking_signature": {
            "rows": [_sig4(v) for v in g.signature_rows] if g else None,
            "cols": [_sig4(v) for v in g.signature_cols] if g else None,
        },
        "estimated_table": _table_list(g.steps) if g and pix.status == "present" else None,
        "matched_table": _matched_table(pix, head),
        "fit_error": _sig4(pix.fit_error),
        "block_origin": list(g.origin) if g and pix.status == "present" else None,
        "header": {
            "declared": bool(head.lossy),
            "lossy_flag": head.lossy,
            "method": head.method,
            "transfer_syntax": head.transfer_syntax,
            "stored_quality": head.stored_quality,
            "stored_table": _table_list(head.stored_table),
            "stored_fit_error": _sig4(head.stored_fit_error),
        },
        "pixels": {"status": pix.status, "reason": pix.reason, "frames": pix.frames},
    }
    if g is not None:
        evidence["pixels"].update(
            n_blocks=g.n_blocks, n_measured=g.n_measured,
            support=g.support.astype(int).tolist(),
            origin_scores=[[_sig4(v) for v in row] for row in g.origin_scores],
            matched_quality=pix.matched_quality)
    if pix.deadzone is not None:
        evidence["pixels"]["wavelet_deadzone"] = {
            "min_gap_ratio": _sig4(pix.deadzone.min_gap_ratio),
            "bands": [{k: (_sig4(v) if isinstance(v, float) else v) for k, v in b.items()}
                      for b in pix.deadzone.bands]}
    if pix.lattice is not None and pix.lattice.found:
        evidence["pixels"]["lattice"] = {
            "a": _sig4(pix.lattice.a), "b": _sig4(pix.lattice.b),
            "span": pix.lattice.span, "bits": pix.bits}

    if pix.status == "present":
        q = pix.quality
        qtext = (f"IJG quality about {q}" if q is not None else
                 f"a table that is no IJG scaling of Annex K (nearest quality "
                 f"{pix.matched_quality}, error {pix.fit_error:.2f})")
        if head.lossy is False:
            disagreement = ("The header declares no lossy compression, but the pixels carry "
                            "JPEG block-DCT quantisation.")
        elif (head.stored_quality is not None and q is not None
              and abs(head.stored_quality - q) > QUALITY_TOLERANCE):
            disagreement = (f"The stored JPEG table matches quality {head.stored_quality}, the "
                            f"pixels quality {q}: the data were compressed more than once or "
                            "rescaled.")
        summary = (f"The pixels went through JPEG compression ({qtext}; 8 x 8 grid starting at "
                   f"row {g.origin[0]}, column {g.origin[1]}).")
        if disagreement:
            summary += " " + disagreement
        conf = min(0.99, 0.6 + 0.4 * min(1.0, g.n_measured / 12))
        estimates = {"method": "jpeg_dct", "quality": q, "block_origin": list(g.origin)}
        status = "present"
    elif head.lossy:
        name = head.method or head.transfer_syntax or "lossy compression"
        q = head.stored_quality
        summary = f"The header declares lossy compression ({name})"
        summary += f", stored table at IJG quality about {q}." if q is not None else "."
        if pix.status == "absent" and head.jpeg_dct and pix.grid is not None:
            disagreement = ("The header declares JPEG compression, but the pixels show no "
                            "block-DCT quantisation (re-processed after decoding?).")
            summary += " " + disagreement
        elif head.wavelet:
            summary += " JPEG 2000 leaves no 8 x 8 block grid to measure in the pixels."
        else:
            summary += f" From the pixels: {pix.reason[0].lower()}{pix.reason[1:]}"
        estimates = {"method": "declared", "quality": q, "block_origin": None}
        status, conf = "present", 0.9
    else:
        status = pix.status
        summary = pix.reason
        if status == "absent":
            summary = "No JPEG traces: " + pix.reason[0].lower() + pix.reason[1:]
            if head.lossy is False:
                summary += " The header declares no lossy compression either."
            conf = 0.85 if g is not None and g.n_blocks >= 256 else 0.6
        else:
            conf = 0.3
        if head.wavelet and head.lossy is None:
            status = "inconclusive"
            summary += (" The transfer syntax is JPEG 2000 and the header does not say whether "
                        "it is lossy; JPEG 2000 leaves no 8 x 8 grid.")
            conf = 0.3
        estimates = dict(DEFAULTS)
    evidence["disagreement"] = disagreement
    return Trace(TRACE_ID, status, conf, summary, estimates, evidence)


def _find_in_pixels(volume: Volume, ctx: AnalysisContext) -> PixelFinding:
    if volume.domain == "kspace":
        return PixelFinding("absent", "The data are k-space samples, not decoded grey levels: "
                            "no JPEG stage sits between the scanner and these values.")
    if volume.value_type == "complex":
        return PixelFinding("absent", _COMPLEX_REASON)
    idx = _frames(volume, ctx)
    try:
        parts = []
        for _, block in volume.iter_slices(ctx.batch, scaled=False, indices=idx):
            b = np.asarray(block)
            parts.append(b.reshape(-1, *b.shape[-2:]))
        images = np.concatenate(parts, axis=0)
    except Exception as exc:  # noqa: BLE001 - undecodable pixels leave the header to speak
        said = " ".join(str(exc).split())[:300]
        return PixelFinding("inconclusive", f"The pixels could not be read ({said}).")
    pix = pixel_finding(images, workers=ctx.workers)
    pix.frames = [int(i) for i in idx]
    return pix


def jpeg_pixels_of(volume: Volume, ctx: AnalysisContext) -> PixelFinding:
    """The JPEG finding in the stored grey levels, computed once per analysis context.

    Shared: the resampling test discounts the 8 x 8 block grid's peaks when it
    is present, whichever analyser asks first.
    """
    return ctx.cached("jpeg_pixel_finding", lambda: _find_in_pixels(volume, ctx))


@register(TRACE_ID, version="1", order=50, default_estimates=DEFAULTS)
def analyse_lossy_compression(volume: Volume, ctx: AnalysisContext) -> Trace:
    """JPEG traces in the pixels and lossy compression declared by the header.

    Parameters
    ----------
    volume : Volume
    ctx : AnalysisContext
        ``ctx.options["header_declared"]`` holds the header module's declared dict.

    Returns
    -------
    Trace
        ``estimates``: ``method`` (``jpeg_dct``, ``declared`` or None), ``quality``
        (IJG 1-100 or None), ``block_origin`` (``[row, col]`` or None).

    References
    ----------
    Fan and de Queiroz (2003); ITU-T T.81 Annex K; DICOM PS3.5 section 10.
    """
    head = header_finding(volume, ctx.options.get("header_declared"))
    pix = jpeg_pixels_of(volume, ctx)
    return combine(pix, head)
