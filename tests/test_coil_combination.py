"""coil_combination: the background noise law and the effective number of channels.

Sources:
- Constantinides, Atalar and McVeigh, Magnetic Resonance in Medicine 38:852-857,
  1997: root-sum-of-squares of L channels leaves a central chi law with 2L
  degrees of freedom in the air; correlated channels behave as fewer ones.
- Gudbjartsson and Patz, Magnetic Resonance in Medicine 34:910-914, 1995: one
  channel's magnitude is Rayleigh in the air; complex components are Gaussian.
- Aja-Fernandez and Tristan-Vega, Magnetic Resonance in Medicine 67:580-585,
  2012 (from memory): with correlation matrix C (unit diagonal) the effective
  number of channels is about (tr C)^2 / tr(C^2), below L.
- Synthetic acquisitions from demo_data/synth.py with a set truth (L, sigma,
  correlation); pydicom's MR2_J2KI.dcm and nibabel's example4d.nii.gz, whose air
  is stored as exact zeros (masked), and pydicom's emri_small.dcm (64 x 64 frames
  of low signal-to-noise, no clean air).
"""

from __future__ import annotations

import numpy as np
import pytest

from app.io.volume import Header, Volume
from app.traces import coil_combination as cc
from app.traces.plan import trace_of
from demo_data import synth


def _run(arr: np.ndarray, **kw) -> cc.Trace:
    vol = Volume.from_array(arr, **kw)
    return trace_of("coil_combination", vol)


@pytest.mark.parametrize("L", [1, 4, 8, 12, 16])
def test_uncorrelated_channels(L: int) -> None:
    """Root-sum-of-squares of L uncorrelated channels (sigma 0.01 each).

    Truth: L, sigma = 0.01. Tolerances: L within max(1, 0.2 L), sigma within 10%.
    L = 1 must be Rayleigh (absent), L >= 2 non-central chi (present).
    """
    mag = synth.rss(synth.acquire((128, 128), n_coils=L, n_slices=2, sigma=0.01, seed=L), axis=1)
    t = _run(mag)
    est = t.estimates
    if L == 1:
        assert t.status == "absent" and est["noise_model"] == "rayleigh"
    else:
        assert t.status == "present" and est["noise_model"] == "noncentral_chi"
    assert abs(est["effective_channels"] - L) <= max(1.0, 0.2 * L)
    assert est["sigma"] == pytest.approx(0.01, rel=0.10)


def test_correlated_channels_give_fewer_effective_channels() -> None:
    """8 channels with correlation 0.5: effective L well below 8, still present.

    Truth: C = 0.5 + 0.5 I (8 x 8), (tr C)^2 / tr(C^2) = 64 / 22 = 2.9 channels
    (Aja-Fernandez and Tristan-Vega 2012, from memory); the moment estimate must
    lie between 2 and 5.5 (a different moment pair than theirs, hence the band).
    """
    c = np.full((8, 8), 0.5) + 0.5 * np.eye(8)
    mag = synth.rss(synth.acquire((128, 128), n_coils=8, n_slices=2, sigma=0.01, seed=9,
                                  correlation=c), axis=1)
    t = _run(mag)
    assert t.status == "present"
    assert 2.0 <= t.estimates["effective_channels"] <= 5.5


def test_uint16_quantised_rss() -> None:
    """RSS of 8 channels rounded to uint16 (noise sigma about 30 steps): L within 1.6."""
    mag = synth.rss(synth.acquire((128, 128), n_coils=8, n_slices=2, sigma=0.01, seed=3), axis=1)
    u = np.round(mag / mag.max() * 4000).astype(np.uint16)
    t = _run(u, header=Header(fields={"bits_stored": 12}))
    assert t.status == "present"
    assert abs(t.estimates["effective_channels"] - 8) <= 1.6


def test_small_sigma_integer_rss() -> None:
    """RSS of 8 channels stored with a noise sigma of about 1.5 steps: still L within 1.6.

    Moments per sample work for coarse integer data once the rounding variance
    (Sheppard's step^2 / 12) is taken off.
    """
    mag = synth.rss(synth.acquire((128, 128), n_coils=8, n_slices=2, sigma=0.01, seed=4), axis=1)
    u = np.round(mag / 0.01 * 1.5).astype(np.uint16)
    t = _run(u)
    assert t.status == "present"
    assert abs(t.estimates["effective_channels"] - 8) <= 1.6
    assert t.estimates["sigma"] == pytest.approx(1.5, rel=0.1)


def test_zero_filled_rss() -> None:
    """RSS of 8 channels zero-filled 2 x 2 (correlated noise): chi law, L within 1.6.

    Truth: L = 8; orthonormal transforms spread the noise over 4 x the pixels,
    so the per-pixel sigma is 0.01 / 2 = 0.005 (within 15%).
    """
    mag, _ = synth.zero_filled_magnitude((96, 96), (2.0, 2.0), n_coils=8, n_slices=2,
                                         sigma=0.01, seed=3)
    t = _run(mag)
    assert t.status == "present"
    assert abs(t.estimates["effective_channels"] - 8) <= 1.6
    assert t.estimates["sigma"] == pytest.approx(0.005, rel=0.15)


def test_complex_multicoil_is_gaussian() -> None:
    """Complex data with a coil axis: Gaussian, absent; sigma of the components within 5%."""
    img = synth.acquire((96, 96), n_coils=8, n_slices=2, sigma=0.02, seed=5)
    t = _run(img, coil_axis=1)
    assert t.status == "absent" and t.estimates["noise_model"] == "gaussian"
    assert t.estimates["sigma"] == pytest.approx(0.02, rel=0.05)


def test_real_signed_is_gaussian() -> None:
    """Phase-corrected real image: Gaussian air, absent."""
    rng = np.random.default_rng(6)
    obj = synth.phantom((96, 96), seed=rng, smooth_phase=False).real
    real = (obj + synth.complex_noise(obj.shape, 0.01, rng)).real.astype(np.float32)
    t = _run(real)
    assert t.status == "absent" and t.estimates["noise_model"] == "gaussian"
    assert t.estimates["sigma"] == pytest.approx(0.01, rel=0.1)


def test_masked_background_is_inconclusive() -> None:
    """Zeros outside the object: inconclusive with the reason, never a law."""
    mag = synth.rss(synth.acquire((128, 128), n_coils=8, sigma=0.01, seed=7), axis=1)
    mag[mag < 0.15] = 0
    t = _run(mag)
    assert t.status == "inconclusive"
    assert t.estimates["noise_model"] == "unknown" and t.estimates["effective_channels"] is None
    assert "one value" in t.summary


def test_noise_free_is_inconclusive() -> None:
    """A noise-free phantom magnitude: inconclusive, never a confident law."""
    mag = np.abs(synth.phantom((128, 128), seed=8))[None].astype(np.float32)
    t = _run(mag)
    assert t.status == "inconclusive" and t.estimates["noise_model"] == "unknown"


def test_tiny_roundoff_noise_is_inconclusive() -> None:
    """Float round-off (1e-8 of the peak) in the air: noise-free, inconclusive."""
    rng = np.random.default_rng(9)
    mag = np.abs(synth.phantom((128, 128), seed=8)).astype(np.float64)
    mag = np.abs(mag + 1e-8 * rng.standard_normal(mag.shape))[None]
    t = _run(mag)
    assert t.status == "inconclusive"
    assert "noise-free" in t.summary


def test_noise_below_quantisation_step_is_inconclusive() -> None:
    """Rayleigh noise of sigma 0.5 steps stored as integers: below the step, inconclusive."""
    mag = synth.rss(synth.acquire((128, 128), n_coils=1, sigma=0.01, seed=10), axis=1)
    u = np.round(mag / 0.01 * 0.5).astype(np.uint16)
    t = _run(u)
    assert t.status == "inconclusive"


def test_evidence_keys_for_the_page() -> None:
    """The agreed evidence keys: histogram (n+1 edges), densities at density_x, statistics."""
    mag = synth.rss(synth.acquire((96, 96), n_coils=4, sigma=0.01, seed=11), axis=1)
    ev = _run(mag).evidence
    h = ev["histogram"]
    assert len(h["edges"]) == len(h["counts"]) + 1
    widths = np.diff(h["edges"])
    assert float(np.sum(np.asarray(h["counts"]) * widths)) == pytest.approx(1.0, rel=0.02)
    for law in ("gaussian", "rayleigh", "noncentral_chi"):
        assert len(ev["densities"][law]) == len(ev["density_x"])
        assert set(ev["statistics"][law]) == {"statistic", "p_value"}
    assert ev["chosen"] == "noncentral_chi"
    assert ev["n_background"] > 1000


def test_pydicom_j2k_masked_air_is_inconclusive() -> None:
    """MR2_J2KI.dcm (pydicom test file): air stored as exact zeros, so no law is measured."""
    pydicom = pytest.importorskip("pydicom")
    from pydicom.data import get_testdata_file

    ds = pydicom.dcmread(get_testdata_file("MR2_J2KI.dcm"))
    t = _run(ds.pixel_array, header=Header(fields={"bits_stored": int(ds.BitsStored)}))
    assert t.status == "inconclusive"
    assert "one value 0" in t.summary


def test_pydicom_emri_small_is_not_called() -> None:
    """emri_small.dcm (pydicom test file): 64 x 64 low-SNR frames, no clean air: inconclusive."""
    pydicom = pytest.importorskip("pydicom")
    from pydicom.data import get_testdata_file

    ds = pydicom.dcmread(get_testdata_file("emri_small.dcm"))
    t = _run(ds.pixel_array, header=Header(fields={"bits_stored": int(ds.BitsStored)}))
    assert t.status == "inconclusive"


def test_nibabel_example4d_masked_is_inconclusive(example4d_frames) -> None:
    """example4d.nii.gz (nibabel test data, FSL): 61% exact zeros outside the head."""
    t = _run(example4d_frames)
    assert t.status == "inconclusive"
    assert "one value 0" in t.summary


def test_large_frames_segmented_at_reduced_size() -> None:
    """512 x 512 frames (segmented on 2 x 2 block means): L = 4 still within max(1, 0.8).

    Truth: L = 4 uncorrelated channels, sigma 0.01; the noise samples come from
    the full-resolution frame, so the law is unchanged.
    """
    mag = synth.rss(synth.acquire((512, 512), n_coils=4, sigma=0.01, seed=12), axis=1)
    t = _run(mag)
    assert t.status == "present"
    assert abs(t.estimates["effective_channels"] - 4) <= 1.0
    assert t.estimates["sigma"] == pytest.approx(0.01, rel=0.10)


def test_noise_free_complex_names_no_law() -> None:
    """A noise-free complex phantom: absent (complex values are never an RSS), law unknown."""
    img = synth.acquire((96, 96), n_coils=4, sigma=0.0, seed=13)
    t = _run(img, coil_axis=1)
    assert t.status == "absent"
    assert t.estimates["noise_model"] == "unknown" and t.estimates["sigma"] is None
    assert "not measured" in t.summary


def test_complex_kspace_is_gaussian() -> None:
    """Multi-coil complex k-space: Gaussian in the images of it, sigma 0.01 within 5%, absent."""
    k = synth.to_kspace(synth.acquire((64, 64), n_coils=4, sigma=0.01, seed=14))
    t = _run(k, domain="kspace", coil_axis=1)
    assert t.status == "absent" and t.estimates["noise_model"] == "gaussian"
    assert t.estimates["sigma"] == pytest.approx(0.01, rel=0.05)


def test_uncombined_magnitude_channels_are_rayleigh() -> None:
    """Per-channel magnitudes with a coil axis (not combined): Rayleigh per channel, absent.

    Truth: 6 channels, |x| of each (Gudbjartsson and Patz 1995: Rayleigh), sigma 0.01.
    """
    img = np.abs(synth.acquire((96, 96), n_coils=6, n_slices=2, sigma=0.01, seed=15))
    t = _run(img.astype(np.float32), coil_axis=1)
    assert t.status == "absent" and t.estimates["noise_model"] == "rayleigh"
    assert t.estimates["sigma"] == pytest.approx(0.01, rel=0.1)
    assert "6 separate magnitude channels" in t.summary


def test_kspace_made_from_rss_images_shows_the_chi_law() -> None:
    """The FFT of an 8-channel root-sum-of-squares image posing as k-space: chi law, L within 1.6.

    Truth: L = 8, sigma 0.01 (the orthonormal FFT keeps sigma; Constantinides 1997).
    """
    mag = synth.rss(synth.acquire((128, 128), n_coils=8, n_slices=2, sigma=0.01, seed=16), axis=1)
    t = _run(synth.to_kspace(mag.astype(np.complex64)), domain="kspace")
    assert t.status == "present" and t.estimates["noise_model"] == "noncentral_chi"
    assert abs(t.estimates["effective_channels"] - 8) <= 1.6
    assert t.estimates["sigma"] == pytest.approx(0.01, rel=0.1)


@pytest.mark.parametrize("offset", [0.02, 0.05])
def test_offset_floor_is_not_called_a_combination(offset: float) -> None:
    """Rayleigh air (one channel, sigma 0.01) lifted by a constant: no law claimed.

    Truth: one channel; the offset leaves no values near zero, which no pure
    noise floor does (the Rayleigh and chi laws reach 0: Gudbjartsson and Patz
    1995, Constantinides 1997). Without the lower-tail check the moments read
    it as a chi law with 7 to 30 channels.
    """
    mag = synth.rss(synth.acquire((128, 128), n_coils=1, n_slices=2, sigma=0.01, seed=17),
                    axis=1) + offset
    t = _run(mag)
    assert t.status == "inconclusive"
    assert t.evidence["lower_tail_ratio"] > 3
    assert "offset" in t.summary


@pytest.mark.parametrize("channels", [1, 2, 3])
def test_rayleigh_chi_split_pinned_at_two_and_three_channels(channels: int) -> None:
    """Background drawn from scipy.stats.chi(df=2L): L = 1 is Rayleigh, L = 2 and 3 are chi.

    Truth: 20000 samples of the central chi law with 2L degrees of freedom,
    sigma 3 (scipy.stats; Constantinides, Atalar and McVeigh 1997); the split
    sits at L = 1.5, so L = 1 must come out ``rayleigh`` and L = 2, 3
    ``noncentral_chi`` with the estimated L within 0.25 of the truth.
    """
    from scipy import stats as st

    from app.traces.coil_combination import fit_magnitude_background

    x = st.chi(df=2 * channels, scale=3.0).rvs(20000, random_state=channels)
    res = fit_magnitude_background(x)
    expected = "rayleigh" if channels == 1 else "noncentral_chi"
    assert res["chosen"] == expected
    assert abs(res["channels"] - channels) < 0.25


def _varying_sigma_image(rng: np.random.Generator, *, complex_out: bool) -> np.ndarray:
    """A disc object on air whose noise sigma rises 1 -> 2.2 across the rows (linear weights)."""
    ny = nx = 128
    y, x = np.mgrid[:ny, :nx]
    obj = 40.0 * (((y - 64) ** 2 + (x - 64) ** 2) < 30 ** 2)
    sigma = np.linspace(1.0, 2.2, ny)[:, None]
    z = obj + sigma * (rng.standard_normal((ny, nx)) + 1j * rng.standard_normal((ny, nx)))
    return z if complex_out else np.abs(z)


@pytest.mark.parametrize("complex_out", [True, False])
def test_linear_weights_are_named_linear(complex_out: bool) -> None:
    """One image with a noise sigma varying across it: present, combination linear.

    Truth: the noise of a linear (Roemer, adaptive or SENSE) combination varies
    with the weights (Roemer et al. 1990; Walsh et al. 2000; Pruessmann et al.
    1999); built here as sigma rising from 1 to 2.2 across the rows.
    """
    rng = np.random.default_rng(21)
    img = _varying_sigma_image(rng, complex_out=complex_out)
    t = _run(np.stack([img, _varying_sigma_image(rng, complex_out=complex_out)])
             .astype(np.complex64 if complex_out else np.float32))
    assert t.status == "present" and t.estimates["combination"] == "linear"
    d = t.evidence["decision"]
    assert d["value"] > d["threshold"] and 0.5 < t.confidence < 1.0


def test_even_single_channel_is_single_and_separate_channels_absent() -> None:
    """Even Rayleigh noise: absent, single; 4 complex channels side by side: absent.

    Truth: one channel's magnitude with one sigma (Gudbjartsson and Patz 1995);
    separate channels were not combined at all. Confidences come from the
    decision p-value, so they are below 1 and differ between the two.
    """
    rng = np.random.default_rng(22)
    ny = nx = 128
    y, x = np.mgrid[:ny, :nx]
    obj = 40.0 * (((y - 64) ** 2 + (x - 64) ** 2) < 30 ** 2)
    mag = np.stack([np.abs(obj + rng.standard_normal((ny, nx))
                           + 1j * rng.standard_normal((ny, nx))) for _ in range(2)])
    t = _run(mag.astype(np.float32))
    assert t.status == "absent" and t.estimates["combination"] == "single"
    coils = obj[None] * 0.5 + rng.standard_normal((4, ny, nx)) + 1j * rng.standard_normal(
        (4, ny, nx))
    t2 = _run(coils[None].astype(np.complex64), coil_axis=1)
    assert t2.status == "absent" and t2.evidence["separate_channels"]
    assert t.confidence < 1.0


@pytest.mark.parametrize("pad", [2.0, 3.0])
def test_zero_filled_single_channel_is_not_linear(pad: float) -> None:
    """One channel's image zero-filled 2x or 3x in k-space: not called a linear combination.

    Truth: one receive channel (demo_data.synth.acquire, 3 slices of 80 x 80,
    sigma 0.01) has one noise sigma (Gudbjartsson and Patz 1995); zero-filling
    only interpolates it, correlating neighbouring pixels (common practice of MR
    reconstruction, no source). The tile test must take that correlation for
    what it is, not for a sigma that varies across the image.
    """
    img = synth.acquire((80, 80), n_coils=1, n_slices=3, sigma=0.01, seed=31)
    k = synth.zero_fill(synth.to_kspace(img), (int(80 * pad), int(80 * pad)))
    mag = np.abs(synth.to_image(k))[:, 0].astype(np.float32)
    t = _run(mag)
    assert t.estimates["combination"] != "linear"
    assert t.evidence["noise_evenness"]["p_tiles"] > 1e-3
    # the object's truncation ringing runs along its rows and columns: the test
    # took the object-free corners
    assert t.evidence["noise_evenness"]["tiles_from"] == "object-free corners"


def test_varying_sigma_is_still_seen_in_the_corners() -> None:
    """A magnitude image whose noise sigma doubles from one side to the other (a
    linear combination with smoothly varying weights, Roemer et al. 1990), object in
    the middle: the corners alone still show the varying sigma (combination linear).
    Noise: the magnitude of complex Gaussian noise (Gudbjartsson and Patz 1995)."""
    rng = np.random.default_rng(12)
    n = 160
    y, x = np.mgrid[:n, :n]
    obj = 40.0 * ((((y - 80) / 30.0) ** 2 + ((x - 80) / 30.0) ** 2) < 1)
    sigma = 1.0 + x / n
    mag = np.stack([np.abs(obj + sigma * (rng.standard_normal((n, n))
                                          + 1j * rng.standard_normal((n, n))))
                    for _ in range(3)]).astype(np.float32)
    t = _run(mag)
    assert t.evidence["noise_evenness"]["tiles_from"] == "object-free corners"
    assert t.estimates["combination"] == "linear"


def test_separate_channels_rest_on_structure_not_on_the_noise_test() -> None:
    """Separate complex channels delivered side by side: absent because nothing was
    combined (a fact of the data's layout), whatever the noise test says; its decision
    record is not the noise test's statistic, so the calibration map of that statistic
    never sees these absent calls. Truth: 4 complex Gaussian channels (white noise)."""
    rng = np.random.default_rng(5)
    coils = rng.standard_normal((1, 4, 96, 96)) + 1j * rng.standard_normal((1, 4, 96, 96))
    coils[:, :, 24:72, 24:72] += 20.0
    t = _run(coils.astype(np.complex64), coil_axis=1)
    assert t.status == "absent"
    assert t.evidence["decision"]["statistic"] != "minus_log10_p_no_combination"
    assert t.evidence["decision"]["value"] < t.evidence["decision"]["threshold"]
    assert t.evidence["decision"]["separate_channels"] == 4
    assert "noise_evenness" in t.evidence


def _complex_frames(rng: np.random.Generator, *, blob: bool, trend: bool) -> list[np.ndarray]:
    n = 128
    y, x = np.mgrid[:n, :n]
    out = []
    for _ in range(3):
        sig = 0.01 * (1 + np.exp(-((y - 64) ** 2 + (x - 64) ** 2) / (2 * 40 ** 2))) if trend \
            else 0.01
        z = sig * (rng.standard_normal((n, n)) + 1j * rng.standard_normal((n, n)))
        if blob:  # a smooth signal 5 sigma high reaching into the air
            z = z + 0.05 * np.exp(-((y - 20) ** 2 + (x - 100) ** 2) / (2 * 15 ** 2))
        out.append(z)
    return out


def test_linear_test_on_complex_data_ignores_smooth_stray_signal() -> None:
    """Complex Gaussian noise of one sigma (Gudbjartsson and Patz 1995) plus a smooth
    blob of signal in the air: the test of one common sigma must not reject (the pair
    differences cancel the blob); taken on the magnitudes themselves it does. The
    same test rejects a noise sigma that doubles towards the centre (a Roemer-like
    weight pattern, Roemer et al. 1990)."""
    rng = np.random.default_rng(3)
    masks = [np.ones((128, 128), bool)] * 3
    stray = _complex_frames(rng, blob=True, trend=False)
    assert cc.linear_combination_test(stray, masks, law="rayleigh")["p_value"] < 1e-3
    assert cc.linear_combination_test(stray, masks, law="rayleigh",
                                      gaussian_noise=True)["p_value"] > 1e-2
    varying = _complex_frames(rng, blob=False, trend=True)
    assert cc.linear_combination_test(varying, masks, law="rayleigh",
                                      gaussian_noise=True)["p_value"] < 1e-6


def test_pair_differences_keep_the_noise_law() -> None:
    """|a - b| / sqrt(2) of independent complex Gaussian samples of one sigma is
    Rayleigh with that sigma (scipy.stats.rayleigh, KS test)."""
    from scipy import stats

    rng = np.random.default_rng(4)
    f = 0.02 * (rng.standard_normal((64, 64)) + 1j * rng.standard_normal((64, 64)))
    d = cc.pair_differences([f], [np.ones((64, 64), bool)])
    assert d.size == 64 * 32
    assert stats.kstest(d, stats.rayleigh(scale=0.02).cdf).pvalue > 0.01
