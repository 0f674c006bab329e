"""Block grid, lattice and quantiser estimation (app/traces/jpeg_grid.py).

Outside references:
- ITU-T T.81 (1992), A.3.3: the 8 x 8 FDCT formula, implemented here directly as
  a plain double sum to compare with the vectorised orthonormal DCT.
- Pillow's JPEG encoder (libjpeg) for the compressed cases; the true tables are
  app/traces/jpeg_tables.scaled_table, itself checked against Pillow's DQT
  segments in tests/test_jpeg_tables.py.
- Z. Fan and R. L. de Queiroz, IEEE Trans. Image Processing 12(2), 2003: the
  blocking signature peaks where blocks start; quantised coefficients cluster at
  multiples of the step.
Synthetic images come from demo_data/synth.py (root-sum-of-squares magnitude of a
simulated acquisition, scaled to 8 bits); each test states the truth it built.
"""

from __future__ import annotations

import numpy as np
import pytest

from app.traces import jpeg_grid
from app.traces.jpeg_tables import scaled_table
from demo_data import synth
from demo_data.synth import jpeg2000_round_trip as _jpeg2000
from demo_data.synth import jpeg_round_trip as _jpeg


def _mr8(seed: int, shape: tuple[int, int] = (192, 192), coils: int = 4) -> np.ndarray:
    m = synth.rss(synth.acquire(shape, n_coils=coils, sigma=0.01, seed=seed), axis=1)[0]
    return np.clip(np.round(m / m.max() * 250), 0, 255).astype(np.uint8)



def test_block_dct_is_t81_fdct() -> None:
    """T.81 A.3.3: S(v,u) = 1/4 C(u) C(v) sum_x sum_y s(y,x) cos((2x+1)u pi/16)
    cos((2y+1)v pi/16), C(0) = 1/sqrt(2), else 1. The vectorised block DCT equals
    this double sum on every block, to 1e-9."""
    rng = np.random.default_rng(0)
    img = rng.integers(0, 256, size=(1, 16, 24)).astype(float) - 128
    coefs, blocks = jpeg_grid.block_dct(img, (0, 0))
    assert coefs.shape == (6, 8, 8)
    c = np.where(np.arange(8) == 0, 1 / np.sqrt(2), 1.0)
    cos = np.cos((2 * np.arange(8)[:, None] + 1) * np.arange(8)[None, :] * np.pi / 16)
    for b in range(6):
        ref = np.zeros((8, 8))
        for v in range(8):
            for u in range(8):
                ref[v, u] = 0.25 * c[u] * c[v] * np.sum(
                    blocks[b] * cos[:, v][:, None] * cos[:, u][None, :])
        np.testing.assert_allclose(coefs[b], ref, atol=1e-9)


def test_lattice_of_rescaled_8_bit_values() -> None:
    """Truth: k = 0..255 mapped by round(4095/255 * k + 300) (a linear rescale to
    12 bits stored as uint16). Estimated a within 1e-3, b within 0.5, span 255,
    and the lattice index recovers k exactly."""
    k = np.arange(256)
    v = np.round(4095 / 255 * k + 300).astype(np.uint16)
    lat = jpeg_grid.find_lattice(v)
    assert lat.found and lat.span == 255
    assert abs(lat.a - 4095 / 255) < 1e-3 and abs(lat.b - 300) < 0.5
    assert np.array_equal(jpeg_grid.lattice_levels(v, lat), k)


def test_lattice_of_float_scaled_values_and_gaps() -> None:
    """Truth: 40 of the 256 levels unused (gaps), values k / 255 * 3.5 - 1 in
    float32. The lattice is found with a = 3.5/255 (relative error 1e-5) and k is
    recovered up to the offset of the lowest level used."""
    rng = np.random.default_rng(1)
    k = np.sort(rng.choice(256, 216, replace=False))
    v = (k / 255 * 3.5 - 1).astype(np.float32)
    lat = jpeg_grid.find_lattice(v)
    assert lat.found
    assert abs(lat.a / (3.5 / 255) - 1) < 1e-5
    assert np.array_equal(jpeg_grid.lattice_levels(v, lat), k - k[0])


def test_no_lattice_for_continuous_or_nonlinear_values() -> None:
    """Continuous float magnitudes and a square-root map of 8-bit levels lie on no
    affine lattice (common practice, no source: a nonlinear map breaks the
    arithmetic progression)."""
    m = synth.rss(synth.acquire((64, 64), n_coils=2, seed=2), axis=1)[0]
    assert not jpeg_grid.find_lattice(m).found
    sq = np.sqrt(np.arange(256) * 1000.0)
    lat = jpeg_grid.find_lattice(sq)
    assert not lat.found and lat.reason


@pytest.mark.parametrize(("drow", "dcol"), [(0, 0), (3, 5), (7, 1), (4, 4)])
def test_origin_of_cropped_jpeg(drow: int, dcol: int) -> None:
    """Truth: a quality-75 JPEG cropped by drow rows and dcol columns after
    decoding; blocks then start at row (8 - drow) % 8 and column (8 - dcol) % 8
    (the contract's example: 3 rows, 5 columns -> [5, 3]). Exact."""
    dec = _jpeg(_mr8(10 + drow), 75)[drow:, dcol:].astype(float)
    origin, scores = jpeg_grid.find_block_origin(dec[None], 0, 255)
    assert origin == ((8 - drow) % 8, (8 - dcol) % 8)
    assert scores[origin] == scores.min()


def test_blocking_signature_peaks_at_block_start() -> None:
    """Fan and de Queiroz (2003): across-boundary differences exceed within-block
    ones. Truth: quality-20 JPEG cropped by 2 rows and 6 columns, so blocks start at
    row 6, column 2; the signature peaks there, at least 20 % above the mean."""
    dec = _jpeg(_mr8(3), 20)[2:, 6:].astype(float)
    rows, cols = jpeg_grid.blocking_signature(dec)
    assert int(np.argmax(rows)) == 6 and int(np.argmax(cols)) == 2
    assert rows[6] > 1.2 and cols[2] > 1.2


@pytest.mark.parametrize("quality", [20, 50, 80, 95])
def test_estimated_steps_equal_libjpeg_table(quality: int) -> None:
    """Truth: Pillow/libjpeg at `quality` writes scaled_table(quality). At least
    10 frequencies are measured, and at least 95 % of the measured steps (> 1)
    equal the true entry exactly."""
    dec = _jpeg(_mr8(quality, (256, 256)), quality)
    est = jpeg_grid.analyse_grid(dec.astype(float), low=0, high=255)
    assert est.origin == (0, 0)
    true = scaled_table(quality)
    m = np.isfinite(est.steps) & (est.steps > 1)
    assert m.sum() >= 10
    assert np.mean(est.steps[m] == true[m]) >= 0.95


def test_dc_step_with_unknown_level_shift() -> None:
    """The DC step is measured with its phase fitted, so an offset of the grey
    levels (here + 37, no 8-bit clipping since values stay below 255 + 37 only in
    float) does not change it. Truth: quality 60, DC step scaled_table(60)[0, 0] = 13."""
    dec = _jpeg(_mr8(4, (256, 256)), 60).astype(float) + 37
    est = jpeg_grid.analyse_grid(dec, low=37, high=255 + 37)
    assert est.steps[0, 0] == scaled_table(60)[0, 0] == 13


def test_no_steps_in_uncompressed_8_bit() -> None:
    """Truth: the same kind of image quantised to 8 bits, never compressed. At most
    2 of the 64 frequencies show a step above 1 (none expected; the analyser needs
    at least 3)."""
    est = jpeg_grid.analyse_grid(_mr8(5, (256, 256)).astype(float), low=0, high=255)
    assert est.n_measured <= 2


def test_step_unmeasurable_when_all_coefficients_zero() -> None:
    """A frequency whose coefficients are all in the zero bin gives no step (NaN),
    common practice, no source: zeros fit every step. Truth: 200 blocks, frequency
    (7, 7) identically zero, frequency (0, 1) on multiples of 12 plus noise 0.2."""
    rng = np.random.default_rng(6)
    c = np.zeros((200, 8, 8))
    c[:, 0, 0] = 8 * rng.integers(0, 200, 200) + rng.normal(0, 0.2, 200)
    c[:, 0, 1] = 12 * rng.integers(-6, 7, 200) + rng.normal(0, 0.2, 200)
    steps, support, fit, z = jpeg_grid.estimate_steps(c)
    assert np.isnan(steps[7, 7]) and support[7, 7] == 0
    assert steps[0, 1] == 12 and fit[0, 1] > 0.95
    assert steps[0, 0] == 8


def test_dwt97_taps_equal_t800_table_f4() -> None:
    """ITU-T T.800 Table F.4 (analysis filter taps of the irreversible 9/7, values
    from memory): low-pass 0.602949018236, 0.266864118443, -0.078223266529,
    -0.016864118443, 0.026748757411 (taps 0..4); high-pass 1.115087052457,
    -0.591271763114, -0.057543526229, 0.091271763114 (taps 0..3). The lifting
    implementation's impulse responses equal them to 1e-6."""
    low = [0.602949018236, 0.266864118443, -0.078223266529, -0.016864118443, 0.026748757411]
    high = [1.115087052457, -0.591271763114, -0.057543526229, 0.091271763114]
    for pos in (16, 17):  # an impulse on an even and on an odd sample
        x = np.zeros((1, 32))
        x[0, pos] = 1.0
        lo, hi = jpeg_grid._lift97(x, -1)
        # output sample i of the low band sits at 2i, of the high band at 2i + 1
        for i, v in enumerate(lo[0]):
            tap = abs(2 * i - pos)
            assert abs(v - (low[tap] if tap < 5 else 0.0)) < 1e-6
        for i, v in enumerate(hi[0]):
            tap = abs(2 * i + 1 - pos)
            assert abs(v - (high[tap] if tap < 4 else 0.0)) < 1e-6


def test_dwt97_vanishing_moments() -> None:
    """The CDF 9/7 analysis high-pass has four vanishing moments (Cohen, Daubechies
    and Feauveau 1992): a cubic polynomial image has zero detail coefficients away
    from the borders (1e-6 of its range)."""
    y, x = np.mgrid[0:64, 0:64].astype(float)
    img = 0.01 * x**3 - 0.2 * y**2 * x + 3 * y + 5
    _, lh, hl, hh = jpeg_grid.dwt97_2d(img)
    scale = np.ptp(img)
    for band in (lh, hl, hh):
        assert np.abs(band[4:-4, 4:-4]).max() < 1e-6 * scale



def test_wavelet_deadzone_of_pillow_jpeg2000() -> None:
    """Truth: the same 8-bit image uncompressed, rescaled to 12 bits (x 16, noise far
    above the gap), and through Pillow's JPEG 2000 encoder (OpenJPEG, irreversible,
    10:1). Compressed: some subband's density on [1, 4) is under 0.1 of that on
    [4, 16); uncompressed, at either scale: every scored subband over 0.5."""
    img = _mr8(2, (256, 256))
    raw = jpeg_grid.wavelet_deadzone(img.astype(float))
    wide = jpeg_grid.wavelet_deadzone(img.astype(float) * 16)
    j2k = jpeg_grid.wavelet_deadzone(_jpeg2000(img, 10).astype(float))
    assert raw.min_gap_ratio is not None and raw.min_gap_ratio > 0.5
    assert wide.min_gap_ratio is not None and wide.min_gap_ratio > 0.5
    assert j2k.min_gap_ratio is not None and j2k.min_gap_ratio < 0.1
