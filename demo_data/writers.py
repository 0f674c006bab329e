"""Write generated arrays in the formats candidate datasets arrive in.

DICOM series (pydicom, explicit VR little endian, MR Image Storage), NIfTI
(nibabel), NumPy npz / npy with a JSON sidecar, PNG and JPEG stacks (Pillow).
Only the demo generator uses these.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

MR_IMAGE_STORAGE = "1.2.840.10008.5.1.4.1.1.4"


def write_dicom_series(folder: Path, stack: np.ndarray, *, series_description: str,
                       pixel_spacing: tuple[float, float] = (1.0, 1.0),
                       slice_thickness: float = 3.0, image_type: tuple[str, ...] = (
                           "ORIGINAL", "PRIMARY", "M", "ND"),
                       seed: int = 0, extra: dict | None = None) -> list[Path]:
    """Write a ``(slices, rows, cols)`` uint16 stack as one DICOM file per slice."""
    from pydicom.dataset import FileDataset, FileMetaDataset
    from pydicom.uid import ExplicitVRLittleEndian, generate_uid

    folder.mkdir(parents=True, exist_ok=True)
    stack = np.asarray(stack)
    if stack.dtype != np.uint16:
        raise ValueError("write_dicom_series expects uint16")
    prefix = "1.2.826.0.1.3680043.8.498."  # pydicom's example root, for generated UIDs
    study = generate_uid(prefix, entropy_srcs=[f"study-{seed}"])
    series = generate_uid(prefix, entropy_srcs=[f"series-{seed}-{series_description}"])
    frame_of_ref = generate_uid(prefix, entropy_srcs=[f"for-{seed}"])
    paths = []
    bits = max(12, int(np.ceil(np.log2(int(stack.max()) + 1)))) if stack.size else 16
    for i, img in enumerate(stack):
        meta = FileMetaDataset()
        meta.MediaStorageSOPClassUID = MR_IMAGE_STORAGE
        sop = generate_uid(prefix, entropy_srcs=[f"sop-{seed}-{series_description}-{i}"])
        meta.MediaStorageSOPInstanceUID = sop
        meta.TransferSyntaxUID = ExplicitVRLittleEndian
        path = folder / f"IM{i + 1:04d}.dcm"
        ds = FileDataset(str(path), {}, file_meta=meta, preamble=b"\0" * 128)
        ds.SOPClassUID = MR_IMAGE_STORAGE
        ds.SOPInstanceUID = sop
        ds.StudyInstanceUID = study
        ds.SeriesInstanceUID = series
        ds.FrameOfReferenceUID = frame_of_ref
        ds.Modality = "MR"
        ds.Manufacturer = "Generated (rawproof demo)"
        ds.PatientName = "Phantom^Demo"
        ds.PatientID = f"DEMO{seed:04d}"
        ds.SeriesDescription = series_description
        ds.SeriesNumber = 1
        ds.InstanceNumber = i + 1
        ds.ImageType = list(image_type)
        ds.ImagePositionPatient = [0.0, 0.0, float(i * slice_thickness)]
        ds.ImageOrientationPatient = [1.0, 0.0, 0.0, 0.0, 1.0, 0.0]
        ds.PixelSpacing = [float(pixel_spacing[0]), float(pixel_spacing[1])]
        ds.SliceThickness = float(slice_thickness)
        ds.SamplesPerPixel = 1
        ds.PhotometricInterpretation = "MONOCHROME2"
        ds.Rows, ds.Columns = int(img.shape[0]), int(img.shape[1])
        ds.BitsAllocated = 16
        ds.BitsStored = bits
        ds.HighBit = bits - 1
        ds.PixelRepresentation = 0
        for key, value in (extra or {}).items():
            setattr(ds, key, value)
        ds.PixelData = np.ascontiguousarray(img, dtype="<u2").tobytes()
        ds.save_as(path, enforce_file_format=True)
        paths.append(path)
    return paths


def write_nifti(path: Path, volume: np.ndarray, *, spacing: tuple[float, float, float],
                description: str = "") -> Path:
    """Write a ``(slices, rows, cols)`` array as NIfTI-1 (x = cols, y = rows, z = slices)."""
    import nibabel as nib

    path.parent.mkdir(parents=True, exist_ok=True)
    data = np.transpose(np.asarray(volume), (2, 1, 0))
    affine = np.diag([spacing[2], spacing[1], spacing[0], 1.0])
    img = nib.Nifti1Image(data, affine)
    img.header["descrip"] = description.encode("ascii", "replace")[:79]
    img.set_sform(affine, code=1)
    img.set_qform(affine, code=1)
    nib.save(img, str(path))
    return path


def write_npz(path: Path, sidecar: dict | None = None, **arrays: np.ndarray) -> list[Path]:
    """Write an npz (compressed) and, optionally, a JSON sidecar with the same stem."""
    path.parent.mkdir(parents=True, exist_ok=True)
    np.savez_compressed(path, **arrays)
    out = [path]
    if sidecar is not None:
        side = path.with_suffix(".json")
        side.write_text(json.dumps(sidecar), encoding="utf-8")
        out.append(side)
    return out


def write_npy(path: Path, array: np.ndarray, sidecar: dict | None = None) -> list[Path]:
    """Write an npy and, optionally, a JSON sidecar with the same stem."""
    path.parent.mkdir(parents=True, exist_ok=True)
    np.save(path, array)
    out = [path]
    if sidecar is not None:
        side = path.with_suffix(".json")
        side.write_text(json.dumps(sidecar), encoding="utf-8")
        out.append(side)
    return out


def write_raster_stack(folder: Path, stack: np.ndarray, *, fmt: str, quality: int = 90,
                       stem: str = "slice") -> list[Path]:
    """Write each slice as PNG (uint8 or uint16) or baseline JPEG (uint8) with Pillow."""
    from PIL import Image

    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i, img in enumerate(np.asarray(stack)):
        if fmt == "jpeg":
            p = folder / f"{stem}{i + 1:03d}.jpg"
            Image.fromarray(img.astype(np.uint8), mode="L").save(
                p, format="JPEG", quality=quality, subsampling=0, optimize=False)
        elif fmt == "png":
            p = folder / f"{stem}{i + 1:03d}.png"
            if img.dtype == np.uint16:
                Image.fromarray(img.astype(np.uint16)).save(p, format="PNG")
            else:
                Image.fromarray(img.astype(np.uint8), mode="L").save(p, format="PNG")
        else:
            raise ValueError(f"unknown raster format {fmt!r}")
        paths.append(p)
    return paths
