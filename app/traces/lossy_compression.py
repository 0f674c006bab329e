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

from dataclasses import dataclass
from typing import Any

import numpy as np

from app.io.dicom_syntax import JPEG_DCT_SYNTAXES, LOSSY_SYNTAXES, WAVELET_SYNTAXES, syntax_of
from app.io.volume import Volume
from app.traces.base import Trace, register
from app.traces.header import HeaderFacts
from app.traces.jpeg_pixels import MAX_FIT_ERROR, MIN_MEASURED, PixelFinding, trimmed_match
from app.traces.jpeg_tables import scaled_table
from app.traces.rounding import round_sig

TRACE_ID = "lossy_compression"
DEFAULTS = {"method": None, "quality": None, "block_origin": None}

#: Pixel and stored qualities further apart than this disagree.
QUALITY_TOLERANCE = 5

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
        return self.stored_table is not None or self.transfer_syntax in JPEG_DCT_SYNTAXES


def _table_list(t: np.ndarray | None) -> list[list[float | int | None]] | None:
    if t is None:
        return None
    a = np.asarray(t, dtype=float).reshape(8, 8)
    return [[int(v) if np.isfinite(v) and v == int(v) else round_sig(v) for v in row] for row in a]


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
    entry = syntax_of(ts)
    if method is None and entry is not None and entry.compression != "lossless":
        method = entry.name
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
        wavelet=ts in WAVELET_SYNTAXES)


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
            "rows": [round_sig(v) for v in g.signature_rows] if g else None,
            "cols": [round_sig(v) for v in g.signature_cols] if g else None,
        },
        "estimated_table": _table_list(g.steps) if g and pix.status == "present" else None,
        "matched_table": _matched_table(pix, head),
        "fit_error": round_sig(pix.fit_error),
        "block_origin": list(g.origin) if g and pix.status == "present" else None,
        "header": {
            "declared": bool(head.lossy),
            "lossy_flag": head.lossy,
            "method": head.method,
            "transfer_syntax": head.transfer_syntax,
            "stored_quality": head.stored_quality,
            "stored_table": _table_list(head.stored_table),
            "stored_fit_error": round_sig(head.stored_fit_error),
        },
        "pixels": {"status": pix.status, "reason": pix.reason, "frames": pix.frames},
    }
    if g is not None:
        evidence["pixels"].update(
            n_blocks=g.n_blocks, n_measured=g.n_measured,
            support=g.support.astype(int).tolist(),
            origin_scores=[[round_sig(v) for v in row] for row in g.origin_scores],
            matched_quality=pix.matched_quality)
    if pix.deadzone is not None:
        evidence["pixels"]["wavelet_deadzone"] = {
            "min_gap_ratio": round_sig(pix.deadzone.min_gap_ratio),
            "bands": [{k: (round_sig(v) if isinstance(v, float) else v) for k, v in b.items()}
                      for b in pix.deadzone.bands]}
    if pix.lattice is not None and pix.lattice.found:
        evidence["pixels"]["lattice"] = {
            "a": round_sig(pix.lattice.a), "b": round_sig(pix.lattice.b),
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
    evidence["decision"] = decision_statistic(pix, head)
    return Trace(TRACE_ID, status, conf, summary, estimates, evidence)


#: A declaration of lossy coding outranks any count of quantised frequencies (64 at most).
DECLARED_VALUE = 65.0


def decision_statistic(pix: PixelFinding, head: HeaderFinding) -> dict[str, Any]:
    """The number the call rests on, for calibration: DCT frequencies that show a JPEG
    quantiser step on the best 8 x 8 grid (0-64), or 65 when the header declares lossy
    coding (a declaration is the stronger evidence; DICOM PS3.3 C.7.6.1.1.5). Values the
    pixels rule out without a grid (complex values, k-space, continuous grey levels on no
    lattice) count as 0 quantised frequencies."""
    if pix.grid is not None:
        measured: float | None = float(pix.grid.n_measured)
    else:
        measured = 0.0 if pix.status == "absent" else None
    value = DECLARED_VALUE if head.lossy else measured
    return {"statistic": "quantised_dct_frequencies", "value": value,
            "threshold": float(MIN_MEASURED), "false_alarm_rate": None, "p_value": None}


@register(TRACE_ID, version="1", order=50, default_estimates=DEFAULTS)
def analyse_lossy_compression(volume: Volume, *, header: HeaderFacts,
                              jpeg_pixels: PixelFinding) -> Trace:
    """JPEG traces in the pixels and lossy compression declared by the header.

    Parameters
    ----------
    volume : Volume
    header : HeaderFacts
        The shared header step (what the file headers declare).
    jpeg_pixels : PixelFinding
        The shared JPEG finding in the stored grey levels.

    Returns
    -------
    Trace
        ``estimates``: ``method`` (``jpeg_dct``, ``declared`` or None), ``quality``
        (IJG 1-100 or None), ``block_origin`` (``[row, col]`` or None).

    References
    ----------
    Fan and de Queiroz (2003); ITU-T T.81 Annex K; DICOM PS3.5 section 10.
    """
    head = header_finding(volume, header.declared)
    return combine(jpeg_pixels, head)
