"""Generated benchmark inputs: uint16 magnitude volumes as DICOM series and NIfTI.

An invented "bench phantom" acquisition: 4 coils at half the matrix, zero-filled
2x and combined by root-sum-of-squares, so every analyser has real work to do.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from demo_data import synth


def magnitude_volume(rows: int, cols: int, slices: int, *, seed: int = 0) -> np.ndarray:
    """``(slices, rows, cols)`` uint16 magnitude volume (zero-filled 2x, 4-coil RSS).

    Eight distinct phantoms are cycled through the slices with fresh noise per
    slice, which keeps generation cheap for 512 slices.
    """
    rng = np.random.default_rng(seed)
    acq = (rows // 2, cols // 2)
    maps = synth.coil_maps(acq, 4, seed=rng)
    objs = [synth.phantom(acq, seed=rng) for _ in range(8)]
    out = np.empty((slices, rows, cols), dtype=np.uint16)
    for s in range(slices):
        coil = maps * objs[s % 8][None] + synth.complex_noise((4,) + acq, 0.01, rng)
        k = synth.to_kspace(coil)
        mag = synth.rss(synth.to_image(synth.zero_fill(k, (rows, cols))), axis=0)
        out[s] = np.clip(np.round(mag * 6000), 0, 65535).astype(np.uint16)
    return out


def write_nifti(volume: np.ndarray, path: Path) -> Path:
    """Write ``(slices, rows, cols)`` as a NIfTI-1 file with axes (x=cols, y=rows, z=slices)."""
    import nibabel as nib

    img = nib.Nifti1Image(np.ascontiguousarray(volume.T), np.diag([1.0, 1.0, 2.0, 1.0]))
    img.header.set_data_dtype(np.uint16)
    nib.save(img, str(path))
    return path


def write_dicom_series(
    volume: np.ndarray, folder: Path, *, series_uid: str | None = None
) -> list[Path]:
    """Write one uncompressed MR Image Storage file per slice."""
    from pydicom.dataset import Dataset, FileMetaDataset
    from pydicom.uid import ExplicitVRLittleEndian, MRImageStorage, generate_uid

    folder.mkdir(parents=True, exist_ok=True)
    series_uid = series_uid or generate_uid()
    study_uid = generate_uid()
    paths = []
    for i, sl in enumerate(volume):
        meta = FileMetaDataset()
        meta.MediaStorageSOPClassUID = MRImageStorage
        meta.MediaStorageSOPInstanceUID = generate_uid()
        meta.TransferSyntaxUID = ExplicitVRLittleEndian
        ds = Dataset()
        ds.file_meta = meta
        ds.SOPClassUID = MRImageStorage
        ds.SOPInstanceUID = meta.MediaStorageSOPInstanceUID
        ds.StudyInstanceUID = study_uid
        ds.SeriesInstanceUID = series_uid
        ds.Modality = "MR"
        ds.PatientName = "Bench^Phantom"
        ds.SeriesDescription = "bench phantom"
        ds.InstanceNumber = i + 1
        ds.ImagePositionPatient = [0.0, 0.0, 2.0 * i]
        ds.ImageOrientationPatient = [1.0, 0.0, 0.0, 0.0, 1.0, 0.0]
        ds.PixelSpacing = [1.0, 1.0]
        ds.SliceThickness = 2.0
        ds.ImageType = ["ORIGINAL", "PRIMARY", "M"]
        ds.Rows, ds.Columns = sl.shape
        ds.SamplesPerPixel = 1
        ds.PhotometricInterpretation = "MONOCHROME2"
        ds.BitsAllocated = 16
        ds.BitsStored = 16
        ds.HighBit = 15
        ds.PixelRepresentation = 0
        ds.PixelData = np.ascontiguousarray(sl).tobytes()
        p = folder / f"slice_{i:04d}.dcm"
        ds.save_as(p, enforce_file_format=True)
        paths.append(p)
    return paths
