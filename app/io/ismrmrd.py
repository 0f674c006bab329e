"""Raw k-space files: ISMRMRD datasets, and HDF5 ``kspace`` arrays with an ISMRMRD header.

Two layouts are read:

- an ISMRMRD file (HDF5 with a group, ``dataset`` by default, holding the
  ``xml`` header and the ``data`` acquisitions), read through the ``ismrmrd``
  package's :class:`ismrmrd.Dataset`: every imaging acquisition is placed at
  its ``kspace_encode_step_1`` line (and ``slice``) of a
  ``(slices, coils, lines, readout)`` array; noise-measurement acquisitions
  are kept apart and summarised (their per-channel variance) in the header;
  navigator, phase-correction and other non-imaging acquisitions are skipped;
- an HDF5 file with a ``kspace`` dataset and an ``ismrmrd_header`` dataset
  holding the ISMRMRD XML header as a string beside it (read by
  :mod:`app.io.hdf5`, which asks :func:`header_fields` for the header's facts).

The header's encoding facts become ``Volume.header.fields`` (keys listed in
:class:`app.io.volume.Header`): encoded and reconstructed matrix and field of
view, the encoding limits of the phase-encode steps, the readout oversampling
factor (encoded over reconstructed readout field of view), the acquired
partial-Fourier fraction (from the limits' minimum, centre and maximum), lines
padded beyond the acquired range, and the declared parallel-imaging
acceleration. Lines never acquired stay zero: they are properties of the
acquisition, which the traces report with ``origin: acquisition``.

References
----------
.. [1] S. J. Inati, J. D. Naegele, N. R. Zwart, V. Roopchansingh, M. J. Lizak, D. C.
   Hansen, C.-Y. Liu, D. Atkinson, P. Kellman, S. Kozerke, H. Xue, A. E. Campbell-
   Washburn, T. S. Soerensen and M. S. Hansen, "ISMRM Raw data format: a proposed
   standard for MRI raw datasets", Magnetic Resonance in Medicine 77(1):411-421, 2017.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

import numpy as np

from app.errors import InputError
from app.io.options import ReadOptions, check_array_bytes, declared_bytes, one_line
from app.io.volume import Header, Volume

#: Acquisition flags (bit numbers, 1-based as in the ISMRMRD standard) that mark
#: non-imaging acquisitions; noise measurements are handled apart.
_SKIP_FLAGS = ("ACQ_IS_NAVIGATION_DATA", "ACQ_IS_PHASECORR_DATA", "ACQ_IS_DUMMYSCAN_DATA",
               "ACQ_IS_RTFEEDBACK_DATA", "ACQ_IS_HPFEEDBACK_DATA",
               "ACQ_IS_SURFACECOILCORRECTIONSCAN_DATA", "ACQ_IS_PHASE_STABILIZATION",
               "ACQ_IS_PHASE_STABILIZATION_REFERENCE")
MAX_XML = 1_000_000


def _strip(tag: str) -> str:
    return tag.rsplit("}", 1)[-1]


def _find(node: ET.Element | None, *path: str) -> ET.Element | None:
    for name in path:
        if node is None:
            return None
        node = next((c for c in node if _strip(c.tag) == name), None)
    return node


def _num(node: ET.Element | None, *path: str) -> float | None:
    el = _find(node, *path)
    if el is None or el.text is None:
        return None
    try:
        return float(el.text.strip())
    except ValueError:
        return None


def _int(node: ET.Element | None, *path: str) -> int | None:
    v = _num(node, *path)
    return None if v is None else int(round(v))


def header_fields(xml: str | bytes) -> dict[str, Any]:
    """Normalised encoding facts from an ISMRMRD XML header.

    Parameters
    ----------
    xml : str or bytes
        The header document.

    Returns
    -------
    dict
        Keys (each only when the header holds it): ``ismrmrd_encoded_matrix``,
        ``ismrmrd_recon_matrix`` (``[x, y, z]``), ``ismrmrd_encoded_fov_mm``,
        ``ismrmrd_recon_fov_mm``, ``ismrmrd_step1_limits`` and
        ``ismrmrd_step2_limits`` (``{"minimum", "maximum", "center"}``),
        ``readout_oversampling`` (encoded over reconstructed readout FOV),
        ``partial_fourier_fraction`` (acquired share of the symmetric extent of
        encoding step 1), ``padded_lines`` (encoded lines outside the acquired
        range), ``parallel_acceleration`` (step 1 acceleration factor),
        ``trajectory``, ``receiver_channels``, ``manufacturer``, ``field_strength_t``.

    Raises
    ------
    ValueError
        When the document is not XML.

    References
    ----------
    Inati et al., MRM 2017 (the ISMRMRD header schema).
    """
    text = xml.decode("utf-8", "replace") if isinstance(xml, bytes) else str(xml)
    if len(text) > MAX_XML:
        raise ValueError("the ISMRMRD header is larger than 1 MB")
    try:
        root = ET.fromstring(text)
    except ET.ParseError as exc:
        raise ValueError(f"the ISMRMRD header is not XML: {exc}") from exc
    out: dict[str, Any] = {}
    enc = _find(root, "encoding")
    if enc is not None:
        for key, space in (("encoded", "encodedSpace"), ("recon", "reconSpace")):
            m = [_int(enc, space, "matrixSize", a) for a in ("x", "y", "z")]
            f = [_num(enc, space, "fieldOfView_mm", a) for a in ("x", "y", "z")]
            if all(v is not None for v in m):
                out[f"ismrmrd_{key}_matrix"] = m
            if all(v is not None for v in f):
                out[f"ismrmrd_{key}_fov_mm"] = f
        for step in ("kspace_encoding_step_1", "kspace_encoding_step_2"):
            lim = {k: _int(enc, "encodingLimits", step, k) for k in ("minimum", "maximum",
                                                                   "center")}
            if all(v is not None for v in lim.values()):
                out[f"ismrmrd_step{step[-1]}_limits"] = lim
        ef, rf = out.get("ismrmrd_encoded_fov_mm"), out.get("ismrmrd_recon_fov_mm")
        if ef and rf and rf[0]:
            out["readout_oversampling"] = round(ef[0] / rf[0], 4)
        lim = out.get("ismrmrd_step1_limits")
        if lim:
            lo, hi, c = lim["minimum"], lim["maximum"], lim["center"]
            half = max(c - lo, hi + 1 - c)
            if half > 0:
                out["partial_fourier_fraction"] = round(min(1.0, (hi - lo + 1) / (2 * half)), 4)
            em = out.get("ismrmrd_encoded_matrix")
            if em:
                out["padded_lines"] = max(0, int(em[1]) - (hi - lo + 1))
        acc = _num(enc, "parallelImaging", "accelerationFactor", "kspace_encoding_step_1")
        if acc is not None:
            out["parallel_acceleration"] = acc
        traj = _find(enc, "trajectory")
        if traj is not None and traj.text:
            out["trajectory"] = traj.text.strip()
    ch = _int(root, "acquisitionSystemInformation", "receiverChannels")
    if ch is not None:
        out["receiver_channels"] = ch
    vendor = _find(root, "acquisitionSystemInformation", "systemVendor")
    if vendor is not None and vendor.text:
        out["manufacturer"] = vendor.text.strip()[:100]
    b0 = _num(root, "acquisitionSystemInformation", "systemFieldStrength_T")
    if b0 is not None:
        out["field_strength_t"] = b0
    return out


def is_ismrmrd_file(h5file: Any) -> str | None:
    """The name of an ISMRMRD dataset group in an open h5py File, or None."""
    try:
        for name in h5file:
            grp = h5file[name]
            if hasattr(grp, "keys") and "xml" in grp and "data" in grp:
                return str(name)
    except (OSError, RuntimeError, ValueError, KeyError, TypeError):
        return None
    return None


def read_ismrmrd(path: Path, opts: ReadOptions, *, group: str = "dataset") -> list[Volume]:
    """Read an ISMRMRD file's imaging acquisitions into one k-space Volume.

    Raises
    ------
    InputError
        The file cannot be opened, holds no imaging acquisition, or its
        acquisitions disagree in channels or samples.

    References
    ----------
    Inati et al., MRM 2017.
    """
    import ismrmrd

    try:
        ds = ismrmrd.Dataset(str(path), group, mode="r")
    except (OSError, ValueError, KeyError) as exc:
        raise InputError("unreadable", f"{path.name} is not a readable ISMRMRD file: "
                         f"{one_line(exc)}", str(path)) from exc
    opts.stack.callback(ds.close)
    try:
        xml = ds.read_xml_header()
        fields = header_fields(xml)
    except (ValueError, ET.ParseError, KeyError, OSError) as exc:
        opts.warnings.append(f"{path.name}: the ISMRMRD header could not be read: "
                             f"{one_line(exc)}")
        xml, fields = b"", {}
    try:
        n = ds.number_of_acquisitions()
    except (LookupError, OSError, KeyError) as exc:
        raise InputError("empty", f"{path.name} holds no ISMRMRD acquisitions.",
                         str(path)) from exc
    skip_bits = [getattr(ismrmrd, f) for f in _SKIP_FLAGS if hasattr(ismrmrd, f)]
    noise_bit = ismrmrd.ACQ_IS_NOISE_MEASUREMENT
    heads, noise = [], []
    for i in range(n):
        acq = ds.read_acquisition(i)
        if acq.is_flag_set(noise_bit):
            noise.append(np.asarray(acq.data))
            continue
        if any(acq.is_flag_set(b) for b in skip_bits):
            continue
        heads.append((int(acq.idx.slice), int(acq.idx.kspace_encode_step_1),
                      int(acq.idx.kspace_encode_step_2), np.asarray(acq.data)))
    if not heads:
        raise InputError("empty", f"{path.name} holds no imaging acquisition (only noise or "
                         "navigator data).", str(path))
    shapes = {h[3].shape for h in heads}
    if len(shapes) != 1:
        raise InputError("bad_axes", f"{path.name}: the acquisitions differ in channels or "
                         f"samples ({sorted(shapes)[:4]}); rawproof reads Cartesian data of "
                         "one shape.", str(path))
    coils, samples = shapes.pop()
    em = fields.get("ismrmrd_encoded_matrix")
    n_lines = max(max(h[1] for h in heads) + 1, int(em[1]) if em else 0)
    n_part = max(h[2] for h in heads) + 1
    n_slices = max(h[0] for h in heads) + 1
    frames = n_slices * n_part
    check_array_bytes(declared_bytes((frames, coils, n_lines, samples), 8), opts.limits,
                      str(path), path.name)
    k = np.zeros((frames, coils, n_lines, samples), dtype=np.complex64)
    filled = np.zeros((frames, n_lines), dtype=np.int32)
    for sl, e1, e2, data in heads:
        f = sl * n_part + e2
        k[f, :, e1, :] += data
        filled[f, e1] += 1
    if np.any(filled > 1):
        opts.warnings.append(f"{path.name}: some lines were acquired more than once (averages "
                             "or repetitions); their sum was analysed.")
    fields.update({
        "acquisitions": len(heads),
        "acquired_lines": int(np.count_nonzero(filled.any(axis=0))),
        "noise_acquisitions": len(noise),
    })
    if noise:
        nz = np.concatenate([a.reshape(a.shape[0], -1) for a in noise], axis=1)
        if nz.shape[0] == coils:
            fields["noise_variance_per_channel"] = [float(v) for v in
                                                    np.mean(np.abs(nz) ** 2, axis=1)]
    raw = {"ismrmrd_group": group, "ismrmrd_xml": (xml.decode("utf-8", "replace")
                                                   if isinstance(xml, bytes) else str(xml))[:4000]}
    if "readout_oversampling" in fields and em and fields["readout_oversampling"] > 1.01:
        opts.warnings.append(f"{path.name}: the readout is oversampled "
                             f"{fields['readout_oversampling']:g}x (kept as acquired).")
    vol = Volume(data=k, domain="kspace", axes=("slices", "coils", "rows", "cols"),
                 format="hdf5", source_files=[str(path)], name=f"{path.stem}:ismrmrd",
                 header=Header(fields=fields, raw=raw))
    return [vol]
