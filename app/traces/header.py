"""Header provenance: what file headers declare about processing.

Reads the normalised fields a reader put in ``volume.header.fields`` (keys in
:class:`app.io.volume.Header`) and states what they declare: derived or
secondary images, lossy compression (by attribute, by transfer syntax, by the
stored JPEG quantisation tables and their IJG-equivalent quality), an acquisition
matrix smaller than the pixel grid (interpolation in the scanner), bit depth
used against bit depth declared, and NIfTI grids aligned to another image or a
template. Nothing here looks at pixel values except through the stored-value
range the reader recorded.

References
----------
NEMA PS3.3, C.7.6.1.1.2 (Image Type), C.7.6.1.1.5 (Lossy Image Compression),
C.8.3.1 (MR Image Module: Acquisition Matrix, In-plane Phase Encoding Direction,
Percent Phase Field of View, Percent Sampling, Scan Options), C.8.13 (Enhanced MR
Image: MR Image Frame Type, MR Modifier and MR FOV/Geometry macros; section
numbers recalled from memory). NEMA PS3.5 Section 8.2 and
PS3.6 Annex A (transfer syntax UIDs). NIfTI-1 ``nifti1.h`` (NIFTI_XFORM_*
codes). ITU-T T.81 Annex K with libjpeg's quality scaling
(:mod:`app.traces.jpeg_tables`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from app.io.volume import Volume
from app.traces.jpeg_tables import match_quality

#: Transfer syntaxes that are always lossy (PS3.5 8.2.1, 8.2.3, 8.2.5-8.2.7).
LOSSY_TS = {
    "1.2.840.10008.1.2.4.50": "JPEG baseline (process 1)",
    "1.2.840.10008.1.2.4.51": "JPEG extended (processes 2 and 4)",
    "1.2.840.10008.1.2.4.81": "JPEG-LS near-lossless",
    "1.2.840.10008.1.2.4.100": "MPEG2 main profile / main level",
    "1.2.840.10008.1.2.4.101": "MPEG2 main profile / high level",
    "1.2.840.10008.1.2.4.102": "MPEG-4 AVC/H.264 high profile",
    "1.2.840.10008.1.2.4.103": "MPEG-4 AVC/H.264 BD-compatible",
    "1.2.840.10008.1.2.4.112": "JPEG XL JPEG recompression",
}
#: Transfer syntaxes that may carry either reversible or irreversible coding.
MAYBE_LOSSY_TS = {
    "1.2.840.10008.1.2.4.91": "JPEG 2000",
    "1.2.840.10008.1.2.4.93": "JPEG 2000 Part 2 multi-component",
    "1.2.840.10008.1.2.4.110": "JPEG XL",
    "1.2.840.10008.1.2.4.203": "High-Throughput JPEG 2000",
}
#: Lossless-only transfer syntaxes (uncompressed, deflate, RLE, lossless JPEG/-LS/2000).
LOSSLESS_TS = {
    "1.2.840.10008.1.2", "1.2.840.10008.1.2.1", "1.2.840.10008.1.2.1.99",
    "1.2.840.10008.1.2.2", "1.2.840.10008.1.2.4.57", "1.2.840.10008.1.2.4.70",
    "1.2.840.10008.1.2.4.80", "1.2.840.10008.1.2.4.90", "1.2.840.10008.1.2.4.92",
    "1.2.840.10008.1.2.4.111", "1.2.840.10008.1.2.4.201", "1.2.840.10008.1.2.4.202",
    "1.2.840.10008.1.2.5",
}
#: NIfTI xform codes (nifti1.h): what the sform/qform maps voxel indices to.
XFORM_TARGET = {2: "image", 3: "template", 4: "template", 5: "template"}
XFORM_NAME = {0: "unknown", 1: "scanner", 2: "aligned to another image", 3: "Talairach",
              4: "MNI 152", 5: "another template"}
#: ImageType values (beyond the first two) that name a reformatted or computed image.
#: (PS3.3 C.7.6.1.1.2 and C.8.16.1.1 defined terms; DIS2D/DIS3D are distortion
#: corrections, which resample the grid; MOSAIC is a tiling, not a reformat).
_REFORMAT_WORDS = {"MPR", "CSA MPR", "REFORMATTED", "RESAMPLED", "MIP", "MINIP", "PROJECTION",
                   "PROJECTION IMAGE", "CSA MIP", "CURVED", "CSA RESAMPLED", "SUBTRACTION",
                   "DIS2D", "DIS3D"}
#: ImageType values naming which component of the complex image the pixels hold
#: (MR Image Module, PS3.3 C.8.3.1.1.1: M magnitude, P phase, R real, I imaginary;
#: Enhanced MR ComplexImageComponent, C.8.13.3.1.1 from memory).
_COMPONENT_WORDS = {"M": "magnitude", "MAGNITUDE": "magnitude", "P": "phase", "PHASE": "phase",
                    "R": "real", "REAL": "real", "I": "imaginary", "IMAGINARY": "imaginary"}
#: NIfTI ``descrip`` words that common writers put there after a resampling step
#: (SPM writes "spm - 3D normalized", "spm - realigned"; common practice, no source).
_NIFTI_RESAMPLE_WORDS = ("normali", "realign", "reslic", "resampl", "regist", "warp",
                         "coregist", "mni", "talairach")
_INTERP_TOLERANCE = 0.05


@dataclass(frozen=True)
class HeaderFacts:
    """What the file headers declare (the shared ``header`` step).

    Attributes
    ----------
    declared : dict
        Flat JSON-able facts (see :func:`provenance`).
    notes : list of str
        Plain-English sentences for the report's header section.
    error : str or None
        Why the header could not be interpreted, when it could not.
    """

    declared: dict[str, Any] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    error: str | None = None


def header_step(volume: Volume) -> HeaderFacts:
    """The shared step: interpret the Volume's header once per dataset.

    A header that cannot be interpreted is not fatal: the facts are empty and the
    reason is kept.

    References
    ----------
    NEMA PS3.3 C.7.6.1.1.2, C.7.6.1.1.5, C.8.3.1; NIfTI-1 ``nifti1.h``.
    """
    try:
        declared, notes = provenance(volume)
    except Exception as exc:  # noqa: BLE001 - a header we cannot interpret is not fatal
        return HeaderFacts({"lossy_compression": None},
                           [f"header could not be interpreted: {exc}"], str(exc))
    return HeaderFacts(declared, notes)


def provenance(volume: Volume) -> tuple[dict[str, Any], list[str]]:
    """Interpret a Volume's normalised header fields.

    Parameters
    ----------
    volume : Volume

    Returns
    -------
    declared : dict
        Flat JSON-able facts the header states. Always has ``lossy_compression``
        (bool or None). Other keys when known: ``image_type``, ``original``,
        ``derived``, ``primary``, ``secondary``, ``image_type_values``,
        ``reformatted``, ``lossy_ratio``, ``lossy_method``, ``transfer_syntax``,
        ``transfer_syntax_name``, ``stored_jpeg_quality``,
        ``stored_jpeg_quality_exact``, ``stored_jpeg_table`` (8 x 8, natural
        order), ``acquisition_matrix``, ``acquired`` and ``interpolation_factor``
        (``{"rows": n, "cols": n}``), ``percent_sampling``, ``percent_phase_fov``,
        ``derivation_description``, ``bits_stored``, ``bits_used``,
        ``sform_code``, ``qform_code``, ``grid_aligned_to`` (``"image"``,
        ``"template"`` or ``"scanner"``), ``template_space``, ``descrip``,
        ``bit_depth`` (bits per stored sample of PNG, JPEG, TIFF and NIfTI files),
        ``image_kind`` (``magnitude``, ``phase``, ``real``, ``imaginary`` or
        ``mixed``), ``mosaic`` and ``mosaic_images``, ``scan_options``,
        ``partial_fourier`` (bool) and ``partial_fourier_direction``,
        ``ismrmrd_encoding_limits``, ``partial_fourier_fraction`` and
        ``parallel_acceleration`` (ISMRMRD raw files),
        ``kspace_filtering`` (the Enhanced MR defined term), ``aux_file`` and
        ``descrip_resampling_words`` (NIfTI). :mod:`app.traces.declared` turns
        these into per-trace declarations.
    notes : list of str
        Plain-English sentences for the report.

    References
    ----------
    NEMA PS3.3 C.7.6.1.1.2, C.7.6.1.1.5, C.8.3.1; PS3.6 Annex A; NIfTI-1
    ``nifti1.h``; ITU-T T.81 Annex K with libjpeg quality scaling.
    """
    f = dict(volume.header.fields)
    declared: dict[str, Any] = {}
    notes: list[str] = []
    _image_type(f, declared, notes)
    _compression(f, volume.format, declared, notes)
    _jpeg_tables(f, declared, notes)
    _component(f, declared, notes)
    _mr_modifiers(f, declared, notes)
    _ismrmrd(f, declared, notes)
    _acquisition(f, declared, notes)
    _bits(f, declared, notes)
    _nifti(f, declared, notes)
    if f.get("bit_depth") is not None and volume.format in ("png", "jpeg", "tiff", "nifti"):
        declared["bit_depth"] = int(f["bit_depth"])
    declared.setdefault("lossy_compression", None)
    return declared, notes


def _image_type(f: dict[str, Any], d: dict[str, Any], notes: list[str]) -> None:
    it = f.get("image_type")
    if not it:
        return
    vals = [str(v).strip().upper() for v in it]
    d["image_type"] = list(it)
    if vals and vals[0] in ("ORIGINAL", "DERIVED"):
        d["original"] = vals[0] == "ORIGINAL"
        d["derived"] = vals[0] == "DERIVED"
    if len(vals) > 1 and vals[1] in ("PRIMARY", "SECONDARY"):
        d["primary"] = vals[1] == "PRIMARY"
        d["secondary"] = vals[1] == "SECONDARY"
    further = [v for v in vals[2:] if v]
    if further:
        d["image_type_values"] = further
    reformat = sorted(set(further) & _REFORMAT_WORDS)
    if reformat:
        d["reformatted"] = True
    desc = f.get("derivation_description")
    if desc:
        d["derivation_description"] = desc
        if any(w in desc.upper() for w in ("RESAMPL", "REFORMAT", "INTERPOL", "MPR")):
            d["reformatted"] = True
    if d.get("derived"):
        extra = f" ({', '.join(further)})" if further else ""
        notes.append("The header declares the pixels DERIVED: they were computed from other "
                     f"images, not reconstructed directly from the acquisition{extra}.")
    if d.get("secondary"):
        notes.append("The header declares a SECONDARY image: created after the examination "
                     "(post-processing, reformatting or capture), not by the scanner's "
                     "primary reconstruction.")
    if reformat:
        notes.append(f"ImageType names a reformatted or projected image ({', '.join(reformat)}):"
                     " the grid was resampled.")
    if desc:
        notes.append(f"Derivation description: \"{desc}\".")


def _component(f: dict[str, Any], d: dict[str, Any], notes: list[str]) -> None:
    """Which component of the complex image the pixels hold, and MOSAIC tiling.

    PS3.3 C.8.3.1.1.1 (MR ImageType value 3: M, P, R, I, ...) and the Enhanced MR
    ComplexImageComponent (MAGNITUDE, PHASE, REAL, IMAGINARY, MIXED).
    """
    vals = [str(v).strip().upper() for v in (f.get("image_type") or [])]
    vals += [str(v).strip().upper() for v in (f.get("frame_type") or [])]
    kinds = {_COMPONENT_WORDS[v] for v in vals[2:] if v in _COMPONENT_WORDS}
    cic = f.get("complex_image_component")
    if cic in _COMPONENT_WORDS:
        kinds.add(_COMPONENT_WORDS[cic])
    if len(kinds) == 1:
        kind = kinds.pop()
        d["image_kind"] = kind
        source = "ComplexImageComponent" if cic in _COMPONENT_WORDS else "ImageType"
        notes.append(f"The header declares {kind} images ({source}).")
    elif len(kinds) > 1:
        d["image_kind"] = "mixed"
        notes.append(f"The header names several image components ({', '.join(sorted(kinds))}).")
    if "MOSAIC" in vals:
        d["mosaic"] = True
        if f.get("mosaic_grid"):
            notes.append(f"A Siemens MOSAIC of {f.get('mosaic_images')} images (CSA header) was "
                         f"cut from its {f['mosaic_grid'][0]} x {f['mosaic_grid'][1]} tiling into "
                         "slices before analysis.")
        else:
            notes.append("ImageType names a Siemens MOSAIC, but its tiles could not be split "
                         "(no readable image count in the CSA header): the pixel findings see "
                         "the tiling.")
    if f.get("mosaic_images"):
        d["mosaic_images"] = int(f["mosaic_images"])


def _mr_modifiers(f: dict[str, Any], d: dict[str, Any], notes: list[str]) -> None:
    """Partial Fourier and k-space filtering declared by MR attributes.

    PS3.3 C.8.3.1 MR Image Module ScanOptions (PFP: phase partial Fourier, PFF:
    frequency partial Fourier); Enhanced MR (C.8.13, MR Modifier macro)
    PartialFourier (YES/NO), PartialFourierDirection (PHASE, FREQUENCY,
    SLICE_SELECT, COMBINATION) and KSpaceFiltering (NONE, COSINE, COSINE_SQUARED,
    FERMI, GAUSSIAN, HAMMING, HANNING, LORENTZIAN, LRNTZ_GSS_TRNSFM, RIESZ, TUKEY,
    USER_DEFINED; list recalled from memory).
    """
    opts = [str(v).upper() for v in (f.get("scan_options") or [])]
    if opts:
        d["scan_options"] = opts
    pf_dirs = [{"PFP": "PHASE", "PFF": "FREQUENCY"}[o] for o in opts if o in ("PFP", "PFF")]
    if f.get("partial_fourier") in ("YES", "NO"):
        d["partial_fourier"] = f["partial_fourier"] == "YES"
        if d["partial_fourier"] and f.get("partial_fourier_direction"):
            pf_dirs.append(str(f["partial_fourier_direction"]))
    elif pf_dirs:
        d["partial_fourier"] = True
    if pf_dirs:
        d["partial_fourier_direction"] = sorted(set(pf_dirs))
    if d.get("partial_fourier") is True:
        how = ", ".join(d.get("partial_fourier_direction") or ["direction not given"])
        notes.append(f"The header declares a partial-Fourier acquisition ({how}).")
    elif d.get("partial_fourier") is False:
        notes.append("The header declares no partial-Fourier acquisition (PartialFourier NO).")
    kf = f.get("kspace_filtering")
    if kf:
        d["kspace_filtering"] = kf
        if kf != "NONE":
            notes.append(f"The header declares a k-space filter: KSpaceFiltering {kf}.")
        else:
            notes.append("The header declares no k-space filter (KSpaceFiltering NONE).")


def _ismrmrd(f: dict[str, Any], d: dict[str, Any], notes: list[str]) -> None:
    """What a raw k-space file's ISMRMRD header declares about its acquisition.

    The encoding limits of ``kspace_encoding_step_1`` (the phase-encode lines)
    against their centre give the acquired share of the symmetric extent: below
    one, a partial-Fourier acquisition (an acquisition property); lines of the
    encoded matrix outside the limits were padded by the file's writer; the
    encoded over the reconstructed readout field of view is the readout
    oversampling, kept in the file as acquired (Inati et al., MRM 77:411-421,
    2017, the ISMRMRD header schema).
    """
    frac = f.get("partial_fourier_fraction")
    if frac is None or d.get("partial_fourier") is not None:
        return
    d["ismrmrd_encoding_limits"] = f.get("ismrmrd_step1_limits")
    if float(frac) < 0.99:
        d["partial_fourier"] = True
        d["partial_fourier_direction"] = ["PHASE"]
        d["partial_fourier_fraction"] = float(frac)
        notes.append(f"The ISMRMRD header's encoding limits declare a partial-Fourier "
                     f"acquisition: {100 * float(frac):.1f} % of the symmetric phase-encode "
                     "extent acquired.")
    else:
        d["partial_fourier"] = False
        notes.append("The ISMRMRD header's encoding limits are symmetric about the k-space "
                     "centre: no partial-Fourier acquisition.")
    if f.get("padded_lines"):
        notes.append(f"{int(f['padded_lines'])} encoded phase-encode lines lie outside the "
                     "acquired limits: the file's writer padded them with zeros.")
    if f.get("readout_oversampling") and float(f["readout_oversampling"]) > 1.01:
        notes.append(f"The readout is oversampled {float(f['readout_oversampling']):g}x "
                     "(encoded over reconstructed field of view) and kept as acquired.")
    if f.get("parallel_acceleration") and float(f["parallel_acceleration"]) > 1:
        d["parallel_acceleration"] = float(f["parallel_acceleration"])
        notes.append(f"The ISMRMRD header declares parallel imaging at acceleration "
                     f"{float(f['parallel_acceleration']):g} along the phase-encode lines.")


def _compression(f: dict[str, Any], fmt: str, d: dict[str, Any], notes: list[str]) -> None:
    ts = f.get("transfer_syntax")
    attr = f.get("lossy_compression")
    if ts:
        d["transfer_syntax"] = ts
        d["transfer_syntax_name"] = f.get("transfer_syntax_name", ts)
    for key in ("lossy_ratio", "lossy_method"):
        if f.get(key) is not None:
            d[key] = f[key]
    lossy: bool | None = None
    if attr is True:
        lossy = True
        ratio = f" at a ratio of {f['lossy_ratio']:g}:1" if f.get("lossy_ratio") else ""
        method = f" ({f['lossy_method']})" if f.get("lossy_method") else ""
        notes.append(f"The header declares lossy compression{ratio}{method} at some point in "
                     "the image's history (LossyImageCompression = 01).")
    if ts in LOSSY_TS:
        lossy = True
        notes.append(f"The pixel data are stored with a lossy transfer syntax: {LOSSY_TS[ts]} "
                     f"({ts}).")
    elif ts in MAYBE_LOSSY_TS:
        if attr is True:
            notes.append(f"The pixel data are stored as {MAYBE_LOSSY_TS[ts]} ({ts}), "
                         "declared irreversible by LossyImageCompression.")
        else:
            notes.append(f"The pixel data are stored as {MAYBE_LOSSY_TS[ts]} ({ts}), which may "
                         "be reversible or irreversible; the header does not say it was lossy.")
    if lossy is None and attr is False:
        lossy = False
        if ts in LOSSLESS_TS or ts is None:
            notes.append("The header declares no lossy compression (LossyImageCompression = "
                         "00) and the transfer syntax is lossless.")
    if fmt == "jpeg":
        lossy = True
        d.setdefault("lossy_method", "ISO_10918_1")
        notes.append("The file is a JPEG (ISO/IEC 10918-1) image: its pixels went through "
                     "lossy DCT compression.")
    if lossy is True and fmt == "dicom" and "lossy_method" not in d and ts in (
            "1.2.840.10008.1.2.4.50", "1.2.840.10008.1.2.4.51"):
        d["lossy_method"] = "ISO_10918_1"
    if lossy is True and "lossy_method" not in d and ts in (
            "1.2.840.10008.1.2.4.91", "1.2.840.10008.1.2.4.93"):
        d["lossy_method"] = "ISO_15444_1"
    d["lossy_compression"] = lossy


def _jpeg_tables(f: dict[str, Any], d: dict[str, Any], notes: list[str]) -> None:
    tables = f.get("jpeg_quant_tables")
    if not tables:
        return
    lum = np.asarray(tables[0], dtype=float).reshape(8, 8)
    q, err, exact = match_quality(lum)
    d["stored_jpeg_quality"] = int(q)
    d["stored_jpeg_quality_exact"] = bool(exact)
    d["stored_jpeg_quality_error"] = round(float(err), 4)
    d["stored_jpeg_table"] = lum.astype(int).tolist()
    d["stored_jpeg_tables_n"] = len(tables)
    how = "exactly" if exact else f"most closely (relative difference {err:.1%})"
    notes.append(f"The stored JPEG quantisation table matches the IJG quality {q} table {how}.")
    if f.get("jpeg_quant_tables_vary"):
        d["stored_jpeg_tables_vary"] = True
        notes.append("The stack's files hold different quantisation tables; the first file's "
                     "table is reported.")


def _acquired(am: list[int], direction: str | None) -> tuple[int, int, str] | None:
    """Acquired samples along (rows axis, cols axis) from AcquisitionMatrix.

    AcquisitionMatrix is ``[frequency rows, frequency columns, phase rows, phase
    columns]`` (PS3.3 C.8.3.1.1); with phase encoding in the column direction
    (``COL``, vertical) the frequency samples run along the rows (horizontal).
    """
    f_rows, f_cols, p_rows, p_cols = (int(v) for v in am)
    freq = max(f_rows, f_cols)
    phase = max(p_rows, p_cols)
    if freq <= 0 or phase <= 0:
        return None
    if direction is None:
        if f_rows and p_cols and not (f_cols or p_rows):
            direction = "COL"
        elif f_cols and p_rows and not (f_rows or p_cols):
            direction = "ROW"
        else:
            return None
    if direction == "COL":
        return phase, freq, direction  # vertical (rows axis) is the phase direction
    return freq, phase, direction


def _acquisition(f: dict[str, Any], d: dict[str, Any], notes: list[str]) -> None:
    for key in ("percent_sampling", "percent_phase_fov"):
        if f.get(key) is not None:
            d[key] = float(f[key])
    am = f.get("acquisition_matrix")
    rows, cols = f.get("rows"), f.get("columns")
    if not am or not rows or not cols:
        return
    d["acquisition_matrix"] = [int(v) for v in am]
    direction = f.get("phase_encoding_direction")
    direction = direction.upper() if isinstance(direction, str) else None
    got = _acquired(am, direction if direction in ("ROW", "COL") else None)
    if got is None:
        notes.append(f"AcquisitionMatrix {list(am)} could not be interpreted.")
        return
    acq_rows, acq_cols, direction = got
    d["acquired"] = {"rows": acq_rows, "cols": acq_cols}
    d["phase_encoding_direction"] = direction
    ps = f.get("pixel_spacing") or [1.0, 1.0]
    pct = float(f.get("percent_phase_fov") or 100.0) / 100.0
    if direction == "COL":
        # frequency along cols: the image spans the frequency field of view
        fac_cols = cols / acq_cols
        fov_phase = pct * cols * float(ps[1])
        fac_rows = fov_phase / acq_rows / float(ps[0]) if pct != 1.0 else rows / acq_rows
    else:
        fac_rows = rows / acq_rows
        fov_phase = pct * rows * float(ps[0])
        fac_cols = fov_phase / acq_cols / float(ps[1]) if pct != 1.0 else cols / acq_cols
    d["interpolation_factor"] = {"rows": round(fac_rows, 4), "cols": round(fac_cols, 4)}
    fov = f" (phase field of view {pct:.0%} of the frequency field of view)" if pct != 1 else ""
    if max(fac_rows, fac_cols) > 1 + _INTERP_TOLERANCE:
        notes.append(f"The header declares {acq_rows} x {acq_cols} acquired samples (rows x "
                     f"cols, phase encoding {direction}){fov} shown on {rows} x {cols} pixels: "
                     f"the grid was interpolated by about {fac_rows:.2f} x {fac_cols:.2f} "
                     "(zero-filling or resampling).")
    elif min(fac_rows, fac_cols) < 1 - _INTERP_TOLERANCE:
        notes.append(f"The header declares {acq_rows} x {acq_cols} acquired samples but only "
                     f"{rows} x {cols} pixels: the grid was reduced (cropped or downsampled).")
    else:
        notes.append(f"The acquisition matrix ({acq_rows} x {acq_cols}) matches the pixel grid "
                     f"({rows} x {cols}).")
    if d.get("percent_sampling") is not None and d["percent_sampling"] < 100:
        notes.append(f"PercentSampling is {d['percent_sampling']:g}%: fewer phase-encoding "
                     "lines than frequency samples were acquired (lower phase resolution).")


def _bits(f: dict[str, Any], d: dict[str, Any], notes: list[str]) -> None:
    stored = f.get("bits_stored")
    rng = f.get("stored_value_range")
    if stored is None or not rng or len(rng) != 2:
        return
    d["bits_stored"] = int(stored)
    lo, hi = float(rng[0]), float(rng[1])
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return
    span = hi - lo
    used = int(math.ceil(math.log2(span + 1))) if span >= 0 else 0
    d["bits_used"] = used
    d["stored_value_range"] = [lo, hi]
    signed = f.get("pixel_representation") == 1
    top = 2 ** (stored - 1) - 1 if signed else 2**stored - 1
    bottom = -(2 ** (stored - 1)) if signed else 0
    if hi > top or lo < bottom:
        notes.append(f"Stored values {lo:g}..{hi:g} exceed what BitsStored = {stored} allows: "
                     "the header does not describe the pixels.")
    elif 0 < used <= 8 < stored:
        notes.append(f"The stored values span {used} bits ({lo:g}..{hi:g}) of the declared "
                     f"{stored}: the data may have passed through an 8-bit step.")


def _nifti(f: dict[str, Any], d: dict[str, Any], notes: list[str]) -> None:
    """NIfTI xform codes and the free-text fields.

    Code 2 (NIFTI_XFORM_ALIGNED_ANAT) is what nibabel writes by default for any
    image made from an array and an affine (``Nifti1Image(data, affine)`` sets the
    sform code to 2; recalled from nibabel's documentation), so code 2 alone is no
    evidence of registration. Codes 3-5 (Talairach, MNI 152, another template) put
    the grid in a template space, which a scanner does not produce.
    """
    if "sform_code" not in f and "qform_code" not in f:
        return
    s, q = int(f.get("sform_code", 0)), int(f.get("qform_code", 0))
    d["sform_code"], d["qform_code"] = s, q
    code = s if s in XFORM_TARGET else (q if q in XFORM_TARGET else None)
    desc = f.get("descrip") or ""
    aux = f.get("aux_file") or ""
    said = [w for w in _NIFTI_RESAMPLE_WORDS if w in f"{desc} {aux}".lower()]
    if code is not None:
        d["grid_aligned_to"] = XFORM_TARGET[code]
        if code in (3, 4, 5):
            d["template_space"] = {3: "talairach", 4: "mni", 5: "template"}[code]
            notes.append(f"The NIfTI {'sform' if code == s else 'qform'} code is {code} "
                         f"({XFORM_NAME[code]}): the grid is in a template space, so the "
                         "volume has most likely been resampled.")
        else:
            notes.append(f"The NIfTI {'sform' if code == s else 'qform'} code is 2 (aligned "
                         "to another image). nibabel and other writers set this code by "
                         "default, so on its own it is no evidence of resampling.")
    elif max(s, q) == 1:
        d["grid_aligned_to"] = "scanner"
    if desc:
        d["descrip"] = desc
        notes.append(f"NIfTI description: \"{desc}\".")
    if aux:
        d["aux_file"] = aux
        notes.append(f"NIfTI aux_file: \"{aux}\".")
    if said:
        d["descrip_resampling_words"] = said
        notes.append("The NIfTI description names a step that writes a new grid ("
                     f"{', '.join(said)}): registration or reslicing, a resampling.")
