"""File writers: DICOM series, NIfTI, NumPy (with sidecar), HDF5, PNG/JPEG.

References
----------
DICOM PS3.3 C.7.6.1 General Image Module (ImageType), C.8.3.1 MR Image Module
(AcquisitionMatrix, InPlanePhaseEncodingDirection); NIfTI-1 (2004); NEP 1
(``.npy``); HDF5 via h5py.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np


def write_dicom_series(folder: Path, vol: np.ndarray, *, voxel_mm: tuple[float, float, float],
                       acquisition_matrix: tuple[int, int] | None, derived: bool,
                       description: str, seed: int, max_value: int = 4095) -> Path:
    """Write ``(Z, ny, nx)`` non-negative magnitudes as an MR DICOM series of uint16 slices.

    Values are scaled so the volume's maximum is ``max_value`` (12 bits stored).
    ``acquisition_matrix`` is (phase rows, frequency cols) as acquired, written as
    AcquisitionMatrix ``[0, cols, rows, 0]`` (frequency along the row direction).
    ImageType is ORIGINAL\\PRIMARY for a scanner reconstruction, DERIVED\\SECONDARY
    after offline processing.
    """
    import pydicom
    from pydicom.dataset import Dataset, FileMetaDataset
    from pydicom.uid import ExplicitVRLittleEndian, MRImageStorage, generate_uid

    folder.mkdir(parents=True, exist_ok=True)
    scale = max_value / max(float(vol.max()), 1e-12)
    data = np.clip(np.round(vol * scale), 0, max_value).astype(np.uint16)
    prefix = "2.25."
    study, series, frame = (generate_uid(prefix, [f"{seed}-{k}"]) for k in ("st", "se", "fr"))
    for z, sl in enumerate(data):
        meta = FileMetaDataset()
        meta.MediaStorageSOPClassUID = MRImageStorage
        meta.MediaStorageSOPInstanceUID = generate_uid(prefix, [f"{seed}-{z}"])
        meta.TransferSyntaxUID = ExplicitVRLittleEndian
        ds = Dataset()
        ds.file_meta = meta
        ds.SOPClassUID = MRImageStorage
        ds.SOPInstanceUID = meta.MediaStorageSOPInstanceUID
        ds.StudyInstanceUID, ds.SeriesInstanceUID, ds.FrameOfReferenceUID = study, series, frame
        ds.Modality = "MR"
        ds.PatientName = "Simulated^Object"
        ds.PatientID = f"SIM2-{seed}"
        ds.SeriesDescription = description
        ds.ImageType = ["DERIVED", "SECONDARY"] if derived else ["ORIGINAL", "PRIMARY", "M", "ND"]
        ds.InstanceNumber = z + 1
        ds.SliceThickness = f"{voxel_mm[0]:.3f}"
        ds.PixelSpacing = [f"{voxel_mm[1]:.4f}", f"{voxel_mm[2]:.4f}"]
        ds.ImageOrientationPatient = [1, 0, 0, 0, 1, 0]
        ds.ImagePositionPatient = [0.0, 0.0, round(z * voxel_mm[0], 3)]
        ds.SliceLocation = round(z * voxel_mm[0], 3)
        if acquisition_matrix is not None:
            ds.AcquisitionMatrix = [0, int(acquisition_matrix[1]), int(acquisition_matrix[0]), 0]
            ds.InPlanePhaseEncodingDirection = "COL"
        ds.Rows, ds.Columns = sl.shape
        ds.SamplesPerPixel = 1
        ds.PhotometricInterpretation = "MONOCHROME2"
        ds.BitsAllocated, ds.BitsStored, ds.HighBit = 16, 12, 11
        ds.PixelRepresentation = 0
        ds.PixelData = sl.tobytes()
        pydicom.dcmwrite(folder / f"IM{z + 1:04d}.dcm", ds, enforce_file_format=True)
    return folder


def write_nifti(path: Path, vol: np.ndarray, voxel_mm: tuple[float, float, float]) -> Path:
    """Write ``(Z, ny, nx)`` (stored as NIfTI x, y, z = cols, rows, slices)."""
    import nibabel as nib

    affine = np.diag([voxel_mm[2], voxel_mm[1], voxel_mm[0], 1.0])
    img = nib.Nifti1Image(np.asarray(vol).T, affine)
    img.header.set_xyzt_units("mm")
    nib.save(img, str(path))
    return path


def write_npy(path: Path, arr: np.ndarray, sidecar: dict | None) -> Path:
    """Write an ``.npy`` file and, if given, its JSON sidecar with the same stem."""
    np.save(path, arr)
    if sidecar is not None:
        path.with_suffix(".json").write_text(json.dumps(sidecar))
    return path


def write_npz(path: Path, key: str, arr: np.ndarray, sidecar: dict | None = None) -> Path:
    """Write an ``.npz`` archive holding ``arr`` under ``key`` (and a sidecar if given)."""
    np.savez(path, **{key: arr})
    if sidecar is not None:
        path.with_suffix(".json").write_text(json.dumps(sidecar))
    return path


def write_h5(path: Path, arr: np.ndarray, coil_axis: int | None) -> Path:
    """Write HDF5 with a ``kspace`` dataset (``coil_axis`` as an attribute)."""
    import h5py

    with h5py.File(path, "w") as fh:
        ds = fh.create_dataset("kspace", data=arr)
        if coil_axis is not None:
            ds.attrs["coil_axis"] = coil_axis
    return path
