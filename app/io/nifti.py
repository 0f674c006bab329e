"""NIfTI-1 / NIfTI-2 reader (``.nii``, ``.nii.gz``) via nibabel.

The stored (unscaled) data are used through nibabel's array proxy, memory-mapped
for uncompressed files, and transposed to ``(time, slices, rows, cols)``: nibabel
arrays are ``(x, y, z, t)`` in Fortran order, so ``.T`` is a C-ordered view whose
last two axes are y (rows) and x (cols), without a copy. ``scl_slope`` and
``scl_inter`` become ``Volume.scale`` / ``Volume.offset``.

References
----------
NIfTI-1 data format, Data Format Working Group (2004), ``nifti1.h`` field
descriptions (dim, pixdim, scl_slope, scl_inter, qform_code, sform_code,
vox_offset, descrip); NIfTI-2 (2011) with 64-bit fields.
"""

from __future__ import annotations

import gzip
from pathlib import Path
from typing import Any

import numpy as np

from app.errors import InputError
from app.io.options import ReadOptions, check_array_bytes, declared_bytes, one_line
from app.io.volume import Header, Volume

#: NIfTI xform codes (nifti1.h, NIFTI_XFORM_*).
XFORM_CODES = {0: "unknown", 1: "scanner", 2: "aligned", 3: "talairach", 4: "mni", 5: "template"}


def _load(path: Path) -> Any:
    import nibabel as nib

    try:
        img = nib.load(str(path), mmap=True)
    except Exception as exc:  # noqa: BLE001 - nibabel raises many types on bad headers
        raise InputError("unreadable", f"{path.name} could not be read as NIfTI: {one_line(exc)}",
                         str(path)) from exc
    if not isinstance(img, nib.Nifti1Image | nib.Nifti2Image):
        raise InputError("unsupported_format", f"{path.name} is a {type(img).__name__}, not "
                         "NIfTI-1 or NIfTI-2.", str(path))
    return img


def _check_file_size(path: Path, hdr: Any, nbytes: int) -> None:
    """A header whose dims need more bytes than the file holds is refused."""
    offset = int(hdr.get_data_offset())
    if path.name.lower().endswith(".gz"):
        # ISIZE, the last 4 bytes of a gzip member: uncompressed size modulo 2**32 (RFC 1952)
        with open(path, "rb") as fh:
            fh.seek(-4, 2)
            isize = int.from_bytes(fh.read(4), "little")
        if nbytes + offset < 2**32 and isize < nbytes + offset:
            try:
                with gzip.open(path, "rb") as gz:
                    gz.seek(nbytes + offset - 1)
                    ok = len(gz.read(1)) == 1
            except (OSError, EOFError):
                ok = False
            if not ok:
                raise InputError("truncated", f"{path.name}: the header declares "
                                 f"{nbytes} bytes of voxels, more than the compressed file "
                                 "holds (header and data disagree, or the file is cut short).",
                                 str(path))
        return
    have = path.stat().st_size - offset
    if have < nbytes:
        raise InputError("truncated", f"{path.name}: the header declares shape "
                         f"{list(hdr.get_data_shape())} ({nbytes} bytes) but the file holds only "
                         f"{max(have, 0)} bytes after the header offset {offset}.", str(path))


def read_nifti(path: Path, opts: ReadOptions) -> list[Volume]:
    """Read a 2D, 3D or 4D NIfTI image as a Volume of stored values.

    Parameters
    ----------
    path : Path
    opts : ReadOptions

    Returns
    -------
    list of Volume
        One Volume; ``affine`` is nibabel's best affine (sform, else qform).

    Raises
    ------
    InputError
        Unreadable headers, dims that need more bytes than the file holds,
        more than four non-singleton dimensions, or sizes above the limits.

    References
    ----------
    NIfTI-1 ``nifti1.h``; nibabel ``ArrayProxy.get_unscaled``.
    """
    img = _load(path)
    hdr = img.header
    shape = tuple(int(s) for s in hdr.get_data_shape())
    dtype = np.dtype(hdr.get_data_dtype())
    if dtype.fields is not None or dtype.kind not in "biufc":
        raise InputError("unsupported_dtype", f"{path.name} stores {dtype} voxels (RGB or "
                         "structured); rawproof reads scalar or complex voxels.", str(path))
    if any(n <= 0 for n in shape):
        raise InputError("bad_header", f"{path.name}: the header declares shape {list(shape)}; "
                         "every dimension must be at least 1.", str(path))
    nbytes = declared_bytes(shape, dtype.itemsize)
    check_array_bytes(nbytes, opts.limits, str(path), path.name)
    _check_file_size(path, hdr, nbytes)
    while len(shape) > 2 and shape[-1] == 1:
        shape = shape[:-1]
    if len(shape) < 2:
        raise InputError("not_an_image", f"{path.name} has shape {list(shape)}; an image needs "
                         "at least two dimensions.", str(path))
    if len(shape) > 4:
        raise InputError("unsupported_shape", f"{path.name} has {len(shape)} dimensions "
                         f"{list(shape)}; rawproof reads up to four (x, y, z, t).", str(path))
    try:
        raw = img.dataobj.get_unscaled()
    except Exception as exc:  # noqa: BLE001
        raise InputError("truncated", f"{path.name}: the voxel data could not be read: "
                         f"{one_line(exc)}", str(path)) from exc
    raw = np.reshape(raw, shape, order="F") if raw.shape != shape else raw
    data = raw.T
    names = {2: ("rows", "cols"), 3: ("slices", "rows", "cols"),
             4: ("time", "slices", "rows", "cols")}[len(shape)]
    zooms = [float(z) for z in hdr.get_zooms()[: len(shape)]]
    if len(zooms) == 4:
        zooms[3] = float("nan")  # the fourth zoom is a repetition time, not a length
    spacing = tuple(reversed(zooms))
    slope, inter = img.dataobj.slope, img.dataobj.inter
    scale = 1.0 if slope is None or not np.isfinite(slope) or slope == 0 else float(slope)
    offset = 0.0 if inter is None or not np.isfinite(inter) else float(inter)
    fields: dict[str, Any] = {
        "nifti_version": 2 if hdr.sizeof_hdr == 540 else 1,
        "sform_code": int(hdr["sform_code"]),
        "qform_code": int(hdr["qform_code"]),
        "descrip": _decode(hdr["descrip"]),
        "bit_depth": dtype.itemsize * 8,
        "datatype": str(dtype),
        "intent_code": int(hdr["intent_code"]),
    }
    if scale != 1.0 or offset != 0.0:
        fields["rescale_slope"], fields["rescale_intercept"] = scale, offset
    aux = _decode(hdr["aux_file"])
    if aux:
        fields["aux_file"] = aux
    raw_summary = {}
    for key in hdr.keys():
        try:
            val = hdr[key]
            raw_summary[key] = _decode(val) if getattr(val, "dtype", None) is not None and \
                val.dtype.kind == "S" else str(np.asarray(val).tolist())[:200]
        except Exception:  # noqa: BLE001
            continue
    vol = Volume(
        data=data,
        domain=opts.domain or "image",
        axes=names,
        spacing=spacing,
        source_files=[str(path)],
        format="nifti",
        header=Header(fields=fields, raw=raw_summary),
        scale=scale,
        offset=offset,
        name=path.name.split(".")[0],
        affine=np.asarray(img.affine, dtype=float),
    )
    return [vol]


def _decode(value: Any) -> str:
    b = np.asarray(value).tobytes() if not isinstance(value, bytes) else value
    return b.split(b"\x00", 1)[0].decode("latin-1", "replace").strip()
