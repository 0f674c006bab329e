"""background_masking: the air replaced by one constant instead of noise.

Sources:
- Gudbjartsson and Patz, Magnetic Resonance in Medicine 34:910-914, 1995: the
  air of a measured magnitude image holds Rayleigh noise (continuous, never
  one repeated value); rounded to integers, the share at each level follows
  the Rayleigh CDF.
- Smith, Human Brain Mapping 17:143-155, 2002: skull stripping sets the voxels
  outside the brain mask to zero.
- nibabel's bundled example4d.nii.gz (FSL 3.3 output): 61% of its voxels are
  exact zeros outside the head, a masked background.
- pydicom's bundled MR2_J2KI.dcm (DERIVED image, JPEG 2000 lossless): its air is
  stored as exact zeros.
- pydicom's bundled emri_small.dcm (ORIGINAL/PRIMARY): noisy air, not masked.
- Synthetic acquisitions from demo_data/synth.py with a set truth.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from app.io.volume import Header, Volume
from app.traces import background_masking as bm
from app.traces.plan import execute, trace_of
from demo_data import synth


def _run(arr: np.ndarray, **kw) -> bm.Trace:
    vol = Volume.from_array(arr, **kw)
    return trace_of("background_masking", vol)


def _rss(seed: int, n_coils: int = 4, sigma: float = 0.01) -> np.ndarray:
    return synth.rss(synth.acquire((128, 128), n_coils=n_coils, n_slices=2, sigma=sigma,
                                   seed=seed), axis=1)


def test_raw_noise_is_absent() -> None:
    """Float RSS air: no repeated value, absent, zero_background_fraction below 0.001."""
    t = _run(_rss(1))
    assert t.status == "absent"
    assert t.estimates["zero_background_fraction"] < 0.001


def test_mask_outside_object_is_present() -> None:
    """Zeros outside a dilated object mask (Smith 2002 style): present, fraction 1, one part.

    Truth: every background pixel set to 0; the constant region is the one
    connected air region around the head, touching the border.
    """
    mag = _rss(2)
    for f in mag:
        obj = ndimage.binary_fill_holes(ndimage.gaussian_filter(f, 2) > 0.15)
        f[~ndimage.binary_dilation(obj, iterations=2)] = 0
    t = _run(mag)
    assert t.status == "present"
    assert t.estimates["zero_background_fraction"] == pytest.approx(1.0)
    assert t.evidence["constant_value"] == 0.0
    assert t.evidence["mask"]["n_regions"] == 1
    assert t.evidence["mask"]["touches_border"] is True
    assert 0.2 < t.evidence["mask"]["fraction_of_image"] < 0.7


def test_threshold_leaving_surviving_noise_is_present() -> None:
    """Values below 2.5 x the noise mean set to 0: most air zero, some noise survives.

    Truth: for chi with 2L = 8 degrees of freedom and sigma 0.01, P(x < 2.5 * mean)
    is above 0.99, so at least 0.9 of the air is zero.
    """
    mag = _rss(3)
    mean = 0.01 * np.sqrt(2) * 1.9386  # sigma*sqrt(2)*Gamma(4.5)/Gamma(4) (Constantinides 1997)
    mag[mag < 2.5 * mean] = 0
    t = _run(mag)
    assert t.status == "present"
    assert t.estimates["zero_background_fraction"] >= 0.9


def test_constant_offset_mask_is_present() -> None:
    """A background set to a non-zero constant (100) in uint16: present, constant 100."""
    mag = _rss(4)
    u = np.round(mag / mag.max() * 4000).astype(np.uint16)
    for f in u:
        obj = ndimage.binary_fill_holes(ndimage.gaussian_filter(f.astype(float), 2) > 500)
        f[~ndimage.binary_dilation(obj, iterations=2)] = 100
    t = _run(u, header=Header(fields={"bits_stored": 12}))
    assert t.status == "present"
    assert t.evidence["constant_value"] == 100.0


def test_integer_noise_of_small_sigma_is_absent() -> None:
    """Rayleigh air of sigma 1 step, rounded: 12% zeros but busy neighbours, absent.

    Truth: P(round(x) = 0) = 1 - exp(-0.125) = 0.118 (Gudbjartsson and Patz 1995);
    the most common level is 1 with P = exp(-0.125) - exp(-1.125) = 0.558.
    """
    mag = _rss(5, n_coils=1)
    u = np.round(mag / 0.01).astype(np.uint16)
    t = _run(u)
    assert t.status == "absent"
    assert t.estimates["zero_background_fraction"] == pytest.approx(0.558, abs=0.04)


def test_kspace_is_judged_by_its_images() -> None:
    """Raw multi-coil k-space: its images hold noise, absent. K-space made from a masked
    magnitude image (the FFT of zeros outside the head): present.

    Truth: the masked image had every pixel outside a dilated object mask set to 0.
    """
    raw = synth.acquire((96, 96), n_coils=2, sigma=0.01, seed=6)
    t = _run(synth.to_kspace(raw), domain="kspace", coil_axis=1)
    assert t.status == "absent"
    mag = _rss(7)
    for f in mag:
        obj = ndimage.binary_fill_holes(ndimage.gaussian_filter(f, 2) > 0.15)
        f[~ndimage.binary_dilation(obj, iterations=2)] = 0
    fake = synth.to_kspace(mag.astype(np.complex64))
    t = _run(fake, domain="kspace")
    assert t.status == "present"
    assert t.estimates["zero_background_fraction"] >= 0.95
    assert t.evidence["constant_value"] == pytest.approx(0.0, abs=1e-4)


def test_nibabel_example4d_is_masked(example4d_frames) -> None:
    """example4d.nii.gz (nibabel test data): zeros outside the head, present."""
    t = _run(example4d_frames)
    assert t.status == "present"
    assert t.evidence["constant_value"] == 0.0
    assert t.estimates["zero_background_fraction"] > 0.95


def test_pydicom_j2k_is_masked() -> None:
    """MR2_J2KI.dcm (pydicom test file): air stored as exact zeros, present."""
    pydicom = pytest.importorskip("pydicom")
    from pydicom.data import get_testdata_file

    ds = pydicom.dcmread(get_testdata_file("MR2_J2KI.dcm"))
    t = _run(ds.pixel_array)
    assert t.status == "present"
    assert t.evidence["constant_value"] == 0.0


def test_pydicom_emri_small_is_not_masked() -> None:
    """emri_small.dcm (pydicom test file, ORIGINAL/PRIMARY): noisy air, absent."""
    pydicom = pytest.importorskip("pydicom")
    from pydicom.data import get_testdata_file

    ds = pydicom.dcmread(get_testdata_file("emri_small.dcm"))
    t = _run(ds.pixel_array)
    assert t.status == "absent"
    assert t.estimates["zero_background_fraction"] < 0.1


def test_jpeg_flattened_air_is_not_called_a_mask() -> None:
    """8-bit RSS air compressed by Pillow's JPEG encoder (quality 50): flattened, not masked.

    Pillow (libjpeg) quantises the air's 8 x 8 blocks onto one level with a few
    values below it; that is not how a mask or threshold leaves air (they set
    it to its lowest value), so the trace is inconclusive, and the noise law is
    not measured.
    """
    import io

    from PIL import Image


    mag = synth.rss(synth.acquire((192, 192), n_coils=4, n_slices=2, sigma=0.01, seed=3), axis=1)
    u = np.round(mag / mag.max() * 255).astype(np.uint8)
    frames = []
    for f in u:
        buf = io.BytesIO()
        Image.fromarray(f).save(buf, format="JPEG", quality=50)
        frames.append(np.asarray(Image.open(buf)))
    vol = Volume.from_array(np.stack(frames))
    res = execute(vol, only=["background_masking", "coil_combination"])
    t = res.traces["background_masking"]
    assert t.status == "inconclusive"
    assert t.estimates["zero_background_fraction"] > 0.9
    assert res.traces["coil_combination"].status == "inconclusive"
