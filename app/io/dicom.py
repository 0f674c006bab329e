"""DICOM reader: files -> one Volume per series (or per multi-frame file).

The reader in four parts: :mod:`app.io.dicom_dataset` (reading one file safely),
:mod:`app.io.dicom_header` (normalised provenance fields),
:mod:`app.io.dicom_series` (grouping and slice order), :mod:`app.io.dicom_pixels`
(decoding and stacking helpers); :mod:`app.io.dicom_syntax` is the transfer-syntax
table. This module stacks a series into a Volume and keeps the public names.

Each file is read once. Slices are ordered by ImagePositionPatient projected on
the slice normal (the cross product of the two ImageOrientationPatient
direction cosines), else by InstanceNumber, and stacked into one preallocated
array of *stored* values; RescaleSlope/RescaleIntercept go to ``Volume.scale``
and ``Volume.offset``. Compressed transfer syntaxes are decoded by pydicom's
pixel handlers (pylibjpeg plugins for JPEG, JPEG-LS, JPEG 2000 and RLE).

References
----------
NEMA PS3.3 (DICOM Information Object Definitions), C.7.6.2 Image Plane Module
(ImagePositionPatient, ImageOrientationPatient), C.7.6.1 General Image Module
(ImageType, LossyImageCompression), C.8.3.1 MR Image Module (AcquisitionMatrix,
InPlanePhaseEncodingDirection, PercentPhaseFieldOfView, PercentSampling).
NEMA PS3.5, Section 8.2 and Annex A.4 (encapsulated transfer syntaxes).
"""

from __future__ import annotations

from collections import defaultdict
from pathlib import Path

import numpy as np

from app.errors import InputError
from app.io.dicom_dataset import damaged_file, read_dataset
from app.io.dicom_header import float_or_none, header_fields, read_header_only
from app.io.dicom_pixels import (
    UndecodablePixelsError,
    copy_native,
    decode_pixels,
    fix_unused_bits,
    luminance,
    native_dtype,
    stored_range,
    unmosaic,
)
from app.io.dicom_series import (
    DicomItem,
    affine_of,
    file_meta,
    frame_order,
    order_slices,
    series_name,
)
from app.io.formats import is_dicom_file
from app.io.options import ReadOptions, check_array_bytes
from app.io.volume import Volume

__all__ = ["UndecodablePixelsError", "header_fields", "is_dicom_file", "read_dicom",
           "read_header_only"]


def _volume_of(items: list[DicomItem], opts: ReadOptions) -> Volume:
    """Stack one series (single-frame files) or wrap one multi-frame file."""
    spacing_mm: float | None = None
    reps = 1
    if len(items) > 1:
        items, spacing_mm, reps = order_slices(items)
    first = items[0]
    ds0 = first.ds
    m0 = first.meta
    hdr = header_fields(ds0)
    photometric = str(ds0.get("PhotometricInterpretation", "MONOCHROME2"))
    frames = m0.frames
    slopes = {(it.meta.slope, it.meta.intercept) for it in items}
    one_scale = len(slopes) == 1
    native = native_dtype(m0)
    if len(items) == 1:
        arr = decode_pixels(first)
        if frames > 1 and arr.ndim >= 3 and arr.shape[0] == frames:
            order = frame_order(ds0, frames)
            if order is not None:
                arr = arr[order]
                hdr.fields["frames_reordered"] = True
        if m0.spp > 1:
            arr = luminance(arr, photometric)
            opts.warnings.append(f"{first.path.name}: colour ({photometric}) pixels were "
                                 "converted to luminance.")
        data = arr
    else:
        rows, cols = m0.rows, m0.cols
        data = None
        fast = native is not None and one_scale
        if fast:
            data = np.empty((len(items), rows, cols), dtype=native.newbyteorder("="))
        for k, it in enumerate(items):
            if (it.meta.rows, it.meta.cols) != (rows, cols):
                raise InputError("inconsistent_series",
                                 f"{it.path.name} has {(it.meta.rows, it.meta.cols)} pixels "
                                 f"where the series has {(rows, cols)}.", str(it.path))
            if fast and native_dtype(it.meta) == native:
                copy_native(it, data[k], native)
            else:
                arr = decode_pixels(it)
                if m0.spp > 1:
                    arr = luminance(arr, photometric)
                if data is None:
                    data = np.empty((len(items), rows, cols),
                                    dtype=arr.dtype if one_scale else np.float32)
                if one_scale:
                    data[k] = arr
                else:
                    data[k] = arr.astype(np.float32) * it.meta.slope + it.meta.intercept
            if k:
                it.ds = None  # free each dataset once its pixels are copied
        if fast:
            fix_unused_bits(data, m0)
        if m0.spp > 1:
            opts.warnings.append(f"{series_name(ds0, first.path)}: colour ({photometric}) "
                                 "pixels were converted to luminance.")
    assert data is not None
    data = unmosaic(data, hdr.fields)  # Siemens MOSAIC tiles become slices
    if one_scale:
        scale, offset = next(iter(slopes))
    else:
        scale, offset = 1.0, 0.0
        opts.warnings.append(f"{series_name(ds0, first.path)}: RescaleSlope/Intercept differ "
                             "between slices; physical values were computed per slice.")
    ps = hdr.fields.get("pixel_spacing")
    if data.ndim == 3 and spacing_mm is None and len(items) == 1 and frames > 1:
        spacing_mm = float_or_none(ds0.get("SpacingBetweenSlices")) or float_or_none(
            ds0.get("SliceThickness"))
    elif data.ndim == 3 and spacing_mm is None:
        spacing_mm = float_or_none(ds0.get("SpacingBetweenSlices"))
    spacing = None
    if ps is not None:
        spacing = (spacing_mm or float("nan"),) * (data.ndim - 2) + (ps[0], ps[1])
        spacing = tuple(float(s) for s in spacing)
    if reps > 1:
        data = data.reshape((reps, len(items) // reps) + data.shape[1:])
        spacing = (float("nan"),) + spacing if spacing is not None else None
        hdr.fields["repetitions_per_position"] = reps
    hdr.fields["stored_value_range"] = stored_range(data)
    hdr.fields["n_files"] = len(items)
    domain = opts.domain or "image"
    return Volume.from_array(
        data,
        domain=domain,
        format="dicom",
        source_files=[str(it.path) for it in items],
        header=hdr,
        scale=float(scale),
        offset=float(offset),
        name=series_name(ds0, first.path),
        spacing=spacing,
        affine=affine_of(ds0, spacing_mm),
    )


def read_dicom(paths: list[Path], opts: ReadOptions) -> list[Volume]:
    """Read DICOM files into one Volume per series (each multi-frame file its own).

    Parameters
    ----------
    paths : list of Path
        Files of one or several series, in any order.
    opts : ReadOptions

    Returns
    -------
    list of Volume

    Raises
    ------
    InputError
        Damaged or truncated files, undecodable pixel data
        (:class:`UndecodablePixelsError`, which carries the header evidence),
        or more declared pixel data than ``opts.limits`` allows.

    References
    ----------
    NEMA PS3.3 C.7.6.2 (slice ordering by position along the normal).
    """
    groups: dict[tuple, list[DicomItem]] = defaultdict(list)
    singles: list[list[DicomItem]] = []
    total = 0
    errors: list[InputError] = []
    for p in paths:
        try:
            with damaged_file(p):
                ds = read_dataset(p)
                meta = file_meta(ds)
        except InputError as exc:
            if len(paths) == 1:
                raise
            errors.append(exc)
            continue
        total += meta.declared_bytes
        check_array_bytes(total, opts.limits, str(p), "This DICOM input")
        item = DicomItem(p, ds, meta)
        if meta.frames > 1:
            singles.append([item])
        else:
            groups[meta.group_key].append(item)
    out: list[Volume] = []
    for items in [*groups.values(), *singles]:
        try:
            with damaged_file(items[0].path):
                out.append(_volume_of(items, opts))
        except InputError as exc:
            if len(groups) + len(singles) == 1 and not errors:
                raise
            errors.append(exc)
    for exc in errors:
        opts.warnings.append(f"skipped: {exc.message}")
    if not out:
        raise errors[0]
    names: dict[str, int] = {}
    for v in out:
        names[v.name] = names.get(v.name, 0) + 1
    seen: dict[str, int] = {}
    for v in out:
        if names[v.name] > 1:
            seen[v.name] = seen.get(v.name, 0) + 1
            v.name = f"{v.name} #{seen[v.name]}"
    return out
