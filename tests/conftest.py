"""Fixtures shared by several test modules."""

from __future__ import annotations

import os

import numpy as np
import pytest


@pytest.fixture(scope="session")
def example4d_frames() -> np.ndarray:
    """nibabel's bundled example4d.nii.gz (FSL output, zeros outside the head) as
    ``(frames, rows, cols)``: volumes and slices flattened into frames."""
    import nibabel as nib

    img = nib.load(os.path.join(os.path.dirname(nib.__file__), "tests", "data",
                                "example4d.nii.gz"))
    a = np.asanyarray(img.dataobj)
    return np.ascontiguousarray(np.moveaxis(a, [3, 2], [0, 1]).reshape(-1, a.shape[0],
                                                                       a.shape[1]))
