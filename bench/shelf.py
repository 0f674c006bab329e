"""The real shelf: MRI files shipped inside installed packages, with their provenance.

    python -m bench.shelf            # list the shelf: file, provenance, header facts, truth

Nothing is copied into the repository: every file is located through its package
(``pydicom.data.get_testdata_file``, the ``data_store`` module of pydicom-data,
``nibabel/tests/data``, ``dipy/data/files``). Each entry carries a provenance
sentence taken from the package's documentation or the file's own header, the
header facts read with pydicom or nibabel that back it, and the truth it implies
in the :class:`bench.validate.Case` format. Every trace the provenance does not
settle is ``unknown``; a real scanner image is never claimed raw-like.

If a header fact an entry relies on is not what the provenance says, every
trace of that entry is downgraded to ``unknown`` and the reason printed. Files a
package does not have installed are skipped with a printed reason.
"""

from __future__ import annotations

import functools
import importlib
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from bench.cases import Case, make_truth

# Facts of the trade used below (common practice, no source):
# - MR images stored by a scanner are magnitude reconstructions unless the header
#   says PHASE / REAL / IMAGINARY (DICOM ImageType value 3 or 4, or the Enhanced
#   MR ComplexImageComponent attribute).
# - Diffusion-weighted series are delivered as magnitude images.
# - A multi-coil magnitude is usually coil-combined, but the combination is left
#   unknown unless a package documents the noise law.


@dataclass
class ShelfEntry:
    """One shelf file (or DICOM series folder) and what its provenance settles."""

    name: str
    package: str
    relpath: str
    route: str
    provenance: str
    traces: dict[str, str]
    checks: dict[str, Callable[[dict], bool]] = field(default_factory=dict)
    params: dict[str, Any] = field(default_factory=dict)
    quick: bool = False


# --------------------------------------------------------------------------- locating

def _package_root(package: str) -> Path | None:
    try:
        mod = importlib.import_module(package)
    except ImportError:
        return None
    return Path(mod.__file__).resolve().parent


def locate(package: str, relpath: str) -> tuple[Path | None, str]:
    """Path of a file (or folder) shipped inside an installed package, or a reason."""
    if package == "pydicom-data":
        try:
            from pydicom.data import get_testdata_file
        except ImportError:
            return None, "pydicom is not installed"
        try:
            found = get_testdata_file(relpath, download=False)
        except TypeError:  # older pydicom without the keyword
            found = get_testdata_file(relpath)
        except Exception as exc:  # noqa: BLE001 - any lookup failure means "not here"
            return None, f"pydicom.data could not find {relpath}: {exc}"
        if found is None:
            return None, f"{relpath} not installed (pip install pydicom-data)"
        return Path(found), ""
    module = {"pydicom": "pydicom", "nibabel": "nibabel", "dipy": "dipy"}[package]
    root = _package_root(module)
    if root is None:
        return None, f"{module} is not installed"
    sub = {"pydicom": "data/test_files", "nibabel": "tests/data", "dipy": "data/files"}[package]
    path = root / sub / relpath
    if not path.exists():
        return None, f"{module} has no {sub}/{relpath} in this version"
    return path, ""


# --------------------------------------------------------------------------- headers

def header_facts(path: Path) -> dict[str, Any]:
    """The provenance fields of a DICOM file (first file of a folder) or a NIfTI file."""
    if path.is_dir():
        first = sorted(p for p in path.iterdir() if p.is_file())
        return header_facts(first[0]) if first else {}
    if path.suffix in (".nii", ".gz"):
        import nibabel as nib

        hdr = nib.load(str(path)).header
        return {"format": "nifti", "descrip": hdr["descrip"].tobytes().rstrip(b"\0").decode(
                    "latin-1"),
                "sform_code": int(hdr["sform_code"]), "qform_code": int(hdr["qform_code"]),
                "datatype": str(hdr.get_data_dtype()), "shape": tuple(hdr.get_data_shape())}
    import pydicom

    ds = pydicom.dcmread(str(path), stop_before_pixels=True, force=True)
    tsyntax = ds.file_meta.get("TransferSyntaxUID") if hasattr(ds, "file_meta") else None
    return {
        "format": "dicom",
        "transfer_syntax": getattr(tsyntax, "name", str(tsyntax)),
        "transfer_syntax_lossy": bool(getattr(tsyntax, "is_lossy", False)),
        "image_type": [str(v) for v in (ds.get("ImageType") or [])],
        "lossy_image_compression": ds.get("LossyImageCompression"),
        "derivation": ds.get("DerivationDescription"),
        "complex_component": ds.get("ComplexImageComponent"),
        "manufacturer": ds.get("Manufacturer"),
        "modality": ds.get("Modality"),
        "rows": ds.get("Rows"), "cols": ds.get("Columns"),
        "acquisition_matrix": list(ds.get("AcquisitionMatrix") or []) or None,
        "image_comments": ds.get("ImageComments"),
    }


def _not_phase(h: dict) -> bool:
    bad = {"P", "PHASE", "R", "REAL", "I", "IMAGINARY"}
    return not (set(h.get("image_type") or []) & bad) and h.get("complex_component") in (
        None, "MAGNITUDE")


def _lossy_declared(h: dict) -> bool:
    return h.get("lossy_image_compression") == "01" or h.get("transfer_syntax_lossy", False)


def _not_lossy(h: dict) -> bool:
    return h.get("lossy_image_compression") in (None, "00") and not h.get(
        "transfer_syntax_lossy", False)


def _mr(h: dict) -> bool:
    return h.get("modality") == "MR"


# --------------------------------------------------------------------------- the entries

_MR_SMALL = ("pydicom's test_files/README.txt: 'MR image ... Downsized to 64x64 from "
             "MR1_UNC' (NEMA WG04 uncompressed set); the other files are the same dataset "
             "in another encoding. Header: ImageType DERIVED\\SECONDARY, ImageComments "
             "'Uncompressed', no lossy flag.")
_MR_SMALL_TRUTH = {"magnitude_only": "present", "resampling": "present",
                   "lossy_compression": "absent"}
_MR_SMALL_CHECKS = {"MR modality": _mr, "not phase": _not_phase, "no lossy flag": _not_lossy}

_MR2 = ("pydicom's README: 'MR2_*.dcm: JPEG2000, JPEG2000Lossless and uncompressed "
        "versions ... From ftp://medical.nema.org/MEDICAL/Dicom/DataSets/WG04'; a Philips "
        "T1W spin-echo magnitude (ImageType ...\\M\\SE) at 1024 x 1024.")

_DIRDIR = ("pydicom's README, DICOMDIR tests: files from www.pcir.org 'downsized to 16x16 "
           "images to keep them very small'; Philips MR series.")


def _entries() -> list[ShelfEntry]:
    e: list[ShelfEntry] = []
    for fname, syntax in (("MR_small.dcm", "explicit VR little endian"),
                          ("MR_small_bigendian.dcm", "explicit VR big endian"),
                          ("MR_small_RLE.dcm", "RLE lossless"),
                          ("MR_small_jpeg_ls_lossless.dcm", "JPEG-LS lossless"),
                          ("MR_small_jp2klossless.dcm", "JPEG 2000 lossless")):
        e.append(ShelfEntry(fname, "pydicom", fname, "dicom", f"{_MR_SMALL} Encoding: {syntax}.",
                            dict(_MR_SMALL_TRUTH), dict(_MR_SMALL_CHECKS),
                            quick=fname == "MR_small.dcm"))
    for series, what in (("MR1", "FAST LOCALIZER, ImageType ORIGINAL\\PRIMARY"),
                         ("MR2", "T/S/C RF FAST PILOT, ImageType ORIGINAL\\PRIMARY"),
                         ("MR700", "ANGIO projection images, ImageType "
                                   "DERIVED\\SECONDARY\\PROJECTION IMAGE")):
        e.append(ShelfEntry(f"dicomdirtests/{series}", "pydicom",
                            f"dicomdirtests/98892003/{series}", "dicom-folder",
                            f"{_DIRDIR} Series {series}: {what}.",
                            {"magnitude_only": "present", "resampling": "present"},
                            {"MR modality": _mr, "not phase": _not_phase}))
    e += [
        ShelfEntry("MR2_UNCR.dcm", "pydicom-data", "MR2_UNCR.dcm", "dicom",
                   _MR2 + " UNCR: the uncompressed original (ImageType ORIGINAL\\PRIMARY, "
                   "ImageComments 'Uncompressed', no lossy flag).",
                   {"magnitude_only": "present", "lossy_compression": "absent"},
                   {"MR modality": _mr, "not phase": _not_phase, "no lossy flag": _not_lossy}),
        ShelfEntry("MR2_UNCI.dcm", "pydicom-data", "MR2_UNCI.dcm", "dicom",
                   _MR2 + " UNCI: decompressed from irreversible JPEG 2000 (header: "
                   "LossyImageCompression 01, DerivationDescription 'JPEG 2000 irreversible "
                   "(lossy) 18:1').",
                   {"magnitude_only": "present", "lossy_compression": "present"},
                   {"MR modality": _mr, "not phase": _not_phase, "lossy flag": _lossy_declared},
                   quick=False),
        ShelfEntry("MR2_J2KR.dcm", "pydicom-data", "MR2_J2KR.dcm", "dicom",
                   _MR2 + " J2KR: reversible JPEG 2000 (transfer syntax lossless only, "
                   "LossyImageCompression 00).",
                   {"magnitude_only": "present", "lossy_compression": "absent"},
                   {"MR modality": _mr, "not phase": _not_phase, "no lossy flag": _not_lossy}),
        ShelfEntry("MR2_J2KI.dcm", "pydicom-data", "MR2_J2KI.dcm", "dicom",
                   _MR2 + " J2KI: irreversible JPEG 2000 transfer syntax, LossyImageCompression "
                   "01, 18:1.",
                   {"magnitude_only": "present", "lossy_compression": "present"},
                   {"MR modality": _mr, "not phase": _not_phase, "lossy flag": _lossy_declared},
                   quick=True),
        ShelfEntry("MR-SIEMENS-DICOM-WithOverlays.dcm", "pydicom-data",
                   "MR-SIEMENS-DICOM-WithOverlays.dcm", "dicom",
                   "pydicom's README: 'MR-SIEMENS-DICOM-WithOverlays.dcm (from GDCM)'; header: "
                   "Siemens syngo MR, ImageType DERIVED\\SECONDARY\\MPR\\CSA MPR\\...\\M, "
                   "DerivationDescription 'MEDCOM RESAMPLED', 484 x 484 displayed from an "
                   "AcquisitionMatrix of 256 x 134: a multiplanar reformat.",
                   {"magnitude_only": "present", "resampling": "present"},
                   {"MR modality": _mr, "not phase": _not_phase,
                    "MPR": lambda h: "MPR" in (h.get("image_type") or [])},
                   quick=True),
    ]
    for fname, syntax in (("emri_small.dcm", "explicit VR little endian"),
                          ("emri_small_big_endian.dcm", "explicit VR big endian"),
                          ("emri_small_RLE.dcm", "RLE lossless"),
                          ("emri_small_jpeg_ls_lossless.dcm", "JPEG-LS lossless"),
                          ("emri_small_jpeg_2k_lossless.dcm", "JPEG 2000 lossless")):
        e.append(ShelfEntry(
            fname, "pydicom-data", fname, "dicom",
            "pydicom-data Enhanced MR test file, 10 frames of 64 x 64; header: ImageType "
            "ORIGINAL\\PRIMARY\\T1, ComplexImageComponent MAGNITUDE, LossyImageCompression "
            f"00. Encoding: {syntax}.",
            {"magnitude_only": "present", "lossy_compression": "absent"},
            {"MR modality": _mr, "magnitude": lambda h: h.get("complex_component") == "MAGNITUDE",
             "no lossy flag": _not_lossy}))
    e += [
        ShelfEntry("anatomical.nii", "nibabel", "anatomical.nii", "nifti",
                   "nibabel tests/data; header descrip 'spm - 3D normalized' (written by SPM "
                   "after spatial normalisation to a template grid), sform code 2.",
                   {"resampling": "present"},
                   {"SPM normalised": lambda h: "normalized" in h.get("descrip", "")}),
        ShelfEntry("functional.nii", "nibabel", "functional.nii", "nifti",
                   "nibabel tests/data; header descrip 'spm - 3D normalized', 20 volumes.",
                   {"resampling": "present"},
                   {"SPM normalised": lambda h: "normalized" in h.get("descrip", "")}),
        ShelfEntry("resampled_anat_moved.nii", "nibabel", "resampled_anat_moved.nii", "nifti",
                   "nibabel tests/data make_moved_anat.py + resample_using_spm.m: anatomical.nii "
                   "given a rotated affine, then resliced by SPM's spm_reslice onto "
                   "functional.nii's 4 x 4 x 8 mm grid with trilinear interpolation (interp 1), "
                   "NaN outside the field of view; descrip 'spm - realigned'.",
                   {"resampling": "present"},
                   {"SPM realigned": lambda h: "realigned" in h.get("descrip", "")},
                   quick=True),
        ShelfEntry("reoriented_anat_moved.nii", "nibabel", "reoriented_anat_moved.nii", "nifti",
                   "nibabel tests/data resample_using_spm.m: the moved anatomical reoriented to "
                   "the canonical orientation at 4 mm by to_canonical.m with interpolation.",
                   {"resampling": "present"},
                   {"SPM written": lambda h: h.get("descrip", "").startswith("spm")}),
        ShelfEntry("example4d.nii.gz", "nibabel", "example4d.nii.gz", "nifti",
                   "nibabel tests/data; header descrip 'FSL3.3 v2.25 NIfTI-1 Single file "
                   "format', 2 volumes; no documented processing history (all unknown).",
                   {}, {"FSL written": lambda h: "FSL" in h.get("descrip", "")}),
        ShelfEntry("test_piesno.nii.gz", "dipy", "test_piesno.nii.gz", "nifti",
                   "dipy.data.get_fnames docstring: 'test_piesno' slice of N=8, K=14 diffusion "
                   "data; dipy's PIESNO test estimates its noise with N=8 channels (a "
                   "non-central chi law of 8 channels: sum-of-squares combination).",
                   {"magnitude_only": "present", "coil_combination": "present"}, {},
                   quick=True),
        ShelfEntry("S0_10slices.nii.gz", "dipy", "S0_10slices.nii.gz", "nifti",
                   "dipy data/files 'S0_10' (used by dipy's mask tests): 10 slices of a b=0 "
                   "diffusion volume, uint16 up to 4095; magnitude (common practice, no "
                   "source), nothing else documented.",
                   {"magnitude_only": "present"},
                   {"uint16": lambda h: h.get("datatype") == "uint16"}),
        ShelfEntry("small_64D.nii", "dipy", "small_64D.nii", "nifti",
                   "dipy.data.get_fnames docstring: 'small region of interest nifti, bvecs, "
                   "bvals 64 directions' (a 10 x 10 x 10 crop); diffusion magnitude (common "
                   "practice, no source).",
                   {"magnitude_only": "present"}, {}),
        ShelfEntry("small_25.nii.gz", "dipy", "small_25.nii.gz", "nifti",
                   "dipy.data.get_fnames docstring: 'small ROI (10x8x2) DTI data (b value 2000, "
                   "25 directions)'; header datatype uint8 with values up to 255: rescaled to "
                   "8 bits (scanners store 12-16 bit DWI; common practice, no source).",
                   {"magnitude_only": "present", "intensity_quantization": "present"},
                   {"uint8": lambda h: h.get("datatype") == "uint8"}),
    ]
    return e


SKIPPED = {
    "MR_small_implicit.dcm, MR_small_expb.dcm, MR_small_padded.dcm":
        "the same pixels as MR_small.dcm in another container; five encodings suffice",
    "MR_truncated.dcm": "a deliberately truncated file (a reader test, not an image)",
    "nibabel Philips PAR/REC phantoms": "app/io has no PAR/REC reader",
    "nibabel standard.nii.gz": "generated by gen_standard.py, not an MR image",
    "dipy aniso_vox.nii.gz": "documented only as 'volume with anisotropic voxel size': "
                             "settles no trace",
    "dipy ascm_out_test.nii.gz": "a denoised output; no contract trace describes denoising",
    "dipy t1_coronal_slice.npy": "a 0-1 normalised slice with no documented history",
}


# --------------------------------------------------------------------------- cases

def _installed(path: str, kwargs: dict, folder: Path) -> tuple[str, dict]:
    """Shelf files are analysed where the package installed them (never copied)."""
    return path, dict(kwargs)


def _checked(entry: ShelfEntry, path: Path) -> tuple[dict[str, str], list[str], dict]:
    try:
        facts = header_facts(path)
    except Exception as exc:  # noqa: BLE001 - an unreadable header settles nothing
        return {}, [f"header unreadable: {exc}"], {}
    failed = [label for label, check in entry.checks.items() if not check(facts)]
    if failed:
        return {}, [f"header check failed: {', '.join(failed)}"], facts
    return dict(entry.traces), [], facts


def shelf_entries(*, quick: bool = False, verbose: bool = False
                  ) -> list[tuple[ShelfEntry, Path, dict, dict]]:
    """(entry, path, header facts, truth) for every installed shelf file."""
    out = []
    for entry in _entries():
        if quick and not entry.quick:
            continue
        path, reason = locate(entry.package, entry.relpath)
        if path is None:
            print(f"shelf: skipping {entry.name}: {reason}", file=sys.stderr)
            continue
        traces, problems, facts = _checked(entry, path)
        for p in problems:
            print(f"shelf: {entry.name}: {p}; every trace set to unknown", file=sys.stderr)
        truth = make_truth(traces, params=entry.params)
        out.append((entry, path, facts, truth))
    if verbose:
        for name, why in SKIPPED.items():
            print(f"shelf: not on the shelf: {name}: {why}", file=sys.stderr)
    return out


def cases(*, quick: bool = False) -> list[Case]:
    """The shelf as :class:`bench.validate.Case` objects (split ``shelf``)."""
    return [Case(name=entry.name, split="shelf", route=entry.route, truth=truth,
                 build=functools.partial(_installed, str(path), {}), note=entry.provenance)
            for entry, path, _facts, truth in shelf_entries(quick=quick)]


def main() -> int:
    for entry, path, facts, truth in shelf_entries(verbose=True):
        known = {t: s for t, s in truth["traces"].items() if s != "unknown"}
        print(f"{entry.name}  [{entry.package}]  verdict {truth['verdict']}")
        print(f"  path: {path}")
        print(f"  provenance: {entry.provenance}")
        shown = {k: v for k, v in facts.items() if v not in (None, [], "")}
        print(f"  header: {shown}")
        print(f"  truth: {known or 'all unknown'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
