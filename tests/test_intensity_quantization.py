"""intensity_quantization: grey levels, comb-shaped histograms and clipping.

Sources:
- Widrow and Kollar, Quantization Noise, Cambridge University Press, 2008:
  rounding to a lattice; an integer rescale by g uses every g-th value, so a
  share 1 - 1/g of the range is empty.
- Stamm and Liu, IEEE Trans. Information Forensics and Security 5:492-506,
  2010 (volume and pages recalled from memory): a non-integer contrast
  rescale leaves periodic empty histogram bins; for a factor f > 1 a share
  1 - 1/f of the output levels stays empty (every input level maps to one
  output level).
- NEMA PS3.3 C.7.6.3 (DICOM BitsStored), read by pydicom from its bundled
  emri_small.dcm (BitsStored 12; 425 distinct stored values from 0 to 467,
  an ORIGINAL image: not squeezed) and MR_small.dcm (BitsStored 16, 1128
  distinct values).
- Synthetic acquisitions from demo_data/synth.py with a set truth.
"""

from __future__ import annotations

import numpy as np
import pytest

from app.io.volume import Header, Volume
from app.traces import intensity_quantization as iq
from app.traces.plan import trace_of
from demo_data import synth


def _rss(seed: int, sigma: float = 0.01, slices: int = 2) -> np.ndarray:
    return synth.rss(synth.acquire((128, 128), n_coils=8, n_slices=slices, sigma=sigma,
                                   seed=seed), axis=1)


def _run(arr: np.ndarray, bits: int | None = None, **kw) -> iq.Trace:
    header = Header(fields={"bits_stored": bits} if bits else {})
    vol = Volume.from_array(arr, header=header, **kw)
    return trace_of("intensity_quantization", vol)


def test_raw_12_bit_is_absent() -> None:
    """RSS rounded to 12 bits (0..4095): thousands of levels, no comb, no clipping: absent."""
    mag = _rss(1)
    u = np.round(mag / mag.max() * 4095).astype(np.uint16)
    t = _run(u, 12)
    assert t.status == "absent"
    assert t.estimates["distinct_levels"] > 1000
    assert t.estimates["clipped_fraction"] == 0.0
    assert t.evidence["comb_score"] < 0.02
    assert t.evidence["stated_bits"] == 12


def test_8_bit_export_is_present() -> None:
    """uint8 export: at most 256 levels, effective bits <= 8: present."""
    mag = _rss(2, sigma=0.02)
    u = np.round(mag / mag.max() * 255).astype(np.uint8)
    t = _run(u)
    assert t.status == "present"
    assert t.estimates["distinct_levels"] <= 256
    assert t.estimates["effective_bits"] <= 8.0
    assert t.evidence["stated_bits"] == 8


def test_8_bit_times_16_is_a_comb() -> None:
    """8-bit values x 16 in uint16: every 16th value used; comb score 1 - 1/16 within 0.01.

    Truth: g = 16 (Widrow and Kollar 2008); stated BitsStored 12.
    """
    mag = _rss(3, sigma=0.02)
    u = (np.round(mag / mag.max() * 255).astype(np.uint16) * 16)
    t = _run(u, 12)
    assert t.status == "present"
    assert t.evidence["integer_factor"] == 16
    assert t.evidence["comb_score"] == pytest.approx(1 - 1 / 16, abs=0.01)
    assert "every 16th value" in t.summary


@pytest.mark.parametrize("factor", [1.5, 2.6])
def test_non_integer_rescale_leaves_periodic_gaps(factor: float) -> None:
    """10-bit values x a non-integer factor, rounded: share 1 - 1/f of levels empty (within 0.06).

    Truth: every input level maps to one output level, so 1/f of the output
    range is used (Stamm and Liu 2010). Dense input levels are needed for the
    gaps to show, so 8 slices are used.
    """
    mag = _rss(4, sigma=0.02, slices=8)
    u = np.round(np.round(mag / mag.max() * 1000) * factor).astype(np.uint16)
    t = _run(u, 12)
    assert t.status == "present"
    assert t.evidence["comb_score"] == pytest.approx(1 - 1 / factor, abs=0.06)


def test_clipping_at_the_top() -> None:
    """The top 3% of values saturated at 4095: clipped fraction 0.03 within 0.005."""
    mag = _rss(5)
    top = float(np.quantile(mag, 0.97))
    u = np.round(np.clip(mag / top * 4095, 0, 4095)).astype(np.uint16)
    t = _run(u, 12)
    truth = float(np.mean(u == 4095))
    assert truth == pytest.approx(0.03, abs=0.002)
    assert t.status == "present"
    assert t.estimates["clipped_fraction"] == pytest.approx(truth, abs=0.005)
    assert t.evidence["clipped_high_fraction"] == pytest.approx(truth, abs=0.005)


def test_masked_zeros_are_not_clipping() -> None:
    """Zeros of a masked background pile up at the bottom, but are explained by masking."""
    mag = _rss(6)
    u = np.round(mag / mag.max() * 4095).astype(np.uint16)
    u[u < 200] = 0
    t = _run(u, 12)
    assert t.evidence["low_pile_up"] is True
    assert t.evidence["low_explained_by_masking"] is True
    assert t.estimates["clipped_fraction"] == 0.0
    assert t.status == "absent"


def test_float_on_256_levels_is_caught() -> None:
    """float32 quantised to 256 levels, then scaled by 1000/255: a lattice of 256 levels."""
    mag = _rss(7, sigma=0.02)
    f = (np.round(mag / mag.max() * 255) * np.float32(1000 / 255)).astype(np.float32)
    t = _run(f)
    assert t.status == "present"
    assert t.estimates["distinct_levels"] <= 256
    assert t.evidence["lattice_step"] == pytest.approx(1000 / 255, rel=1e-4)


def test_continuous_float_is_absent() -> None:
    """Float32 RSS: no lattice, as many levels as samples nearly: absent."""
    t = _run(_rss(8))
    assert t.status == "absent"
    assert t.evidence["lattice_step"] is None
    assert t.estimates["effective_bits"] > 14


def test_histogram_evidence_shape() -> None:
    """At most 1024 bins; counts add up to the samples examined."""
    mag = _rss(9)
    u = np.round(mag / mag.max() * 4095).astype(np.uint16)
    ev = _run(u, 12).evidence
    h = ev["histogram"]
    assert len(h["counts"]) <= 1024 and len(h["edges"]) == len(h["counts"]) + 1
    assert sum(h["counts"]) == ev["n_samples"]


@pytest.mark.parametrize(("name", "levels"), [("emri_small.dcm", 425), ("MR_small.dcm", 1128)])
def test_pydicom_mr_images(name: str, levels: int) -> None:
    """pydicom's MR files with their BitsStored: the distinct stored values, absent."""
    pydicom = pytest.importorskip("pydicom")
    from pydicom.data import get_testdata_file

    ds = pydicom.dcmread(get_testdata_file(name))
    a = ds.pixel_array
    assert len(np.unique(a)) == levels
    t = _run(a, int(ds.BitsStored))
    assert t.estimates["distinct_levels"] == levels
    assert t.evidence["stated_bits"] == int(ds.BitsStored)
    assert t.status == "absent"


def test_kspace_made_from_8_bit_images_shows_256_levels() -> None:
    """The FFT of uint8 images posing as k-space: the images behind it hold <= 256 levels.

    Truth: 8-bit levels 0..255 (from a root-sum-of-squares image); the inverse
    FFT brings them back up to float32 round-off, far below one level.
    """
    mag = _rss(10, sigma=0.02)
    u = np.round(mag / mag.max() * 255)
    k = synth.to_kspace(u.astype(np.complex64)).astype(np.complex64)
    vol = Volume.from_array(k, domain="kspace")
    t = trace_of("intensity_quantization", vol)
    assert t.status == "present"
    assert t.estimates["distinct_levels"] == len(np.unique(u))
    assert t.evidence["lattice_step"] == pytest.approx(1.0, rel=1e-3)


def test_measured_kspace_is_continuous() -> None:
    """Measured complex k-space: no lattice, absent."""
    k = synth.to_kspace(synth.acquire((96, 96), n_coils=2, sigma=0.01, seed=11))
    vol = Volume.from_array(k, domain="kspace", coil_axis=1)
    t = trace_of("intensity_quantization", vol)
    assert t.status == "absent"
    assert t.evidence["lattice_step"] is None


def test_scattered_bottom_clipping_counts() -> None:
    """Air clipped from below at its 20th percentile: a scattered pile, counted as clipping.

    Truth: the clipped share is measured on the array itself (every sample at
    the clip level); the estimate must match it within 0.005.
    """
    mag = _rss(12)
    u = np.round(mag / mag.max() * 4095).astype(np.uint16)
    air = u[u < np.percentile(u, 25)]
    floor = np.percentile(air, 20)
    u = np.maximum(u, floor).astype(np.uint16)
    truth = float(np.mean(u == floor))
    t = _run(u, 12)
    assert t.status == "present"
    assert t.evidence["low_pile_solid_share"] < 0.3
    assert t.estimates["clipped_fraction"] == pytest.approx(truth, abs=0.005)


def test_zeros_outside_the_field_of_view_are_not_clipping() -> None:
    """Zeros outside a resampled field of view (top 10 rows): a solid pile, not clipping."""
    mag = _rss(13)
    u = np.round(mag / mag.max() * 4095).astype(np.uint16)
    u[:, :10, :] = 0
    t = _run(u, 12)
    assert t.evidence["low_pile_up"] is True
    assert t.evidence["low_pile_solid_share"] > 0.9
    assert t.estimates["clipped_fraction"] == 0.0
    assert t.status == "absent"
