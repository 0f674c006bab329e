"""kspace_synthesis: measured versus computed k-space samples.

Outside references: the GRAPPA filling rule (each missing line a linear
combination of acquired neighbours across coils; Griswold et al., MRM
47:1202-1210, 2002); the SENSE unfolding and its g-factor closed form
``g_i = sqrt([(S^H Psi^-1 S)^-1]_ii [S^H Psi^-1 S]_ii)`` (Pruessmann et al., MRM
42:952-962, 1999); the chi-square law of least-squares residuals of white
Gaussian noise; the binomial law for the false-alarm count. Objects and coils
are invented here (smooth ellipses, Gaussian coil profiles); the truth of each
case is stated in its test.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.fft as sfft
from scipy import stats

from app.io.volume import Volume
from app.traces import kspace_synthesis as ks
from app.traces.plan import trace_of


def _fft2c(x: np.ndarray) -> np.ndarray:
    return sfft.fftshift(sfft.fft2(sfft.ifftshift(x, axes=(-2, -1)), norm="ortho"),
                         axes=(-2, -1))


def _ifft2c(x: np.ndarray) -> np.ndarray:
    return sfft.fftshift(sfft.ifft2(sfft.ifftshift(x, axes=(-2, -1)), norm="ortho"),
                         axes=(-2, -1))


def _object(ny: int, nx: int) -> np.ndarray:
    y, x = np.mgrid[-1:1:ny * 1j, -1:1:nx * 1j]
    img = ((x / 0.8) ** 2 + (y / 0.9) ** 2 < 1) * 1.0
    img -= 0.4 * (((x - 0.2) / 0.3) ** 2 + (y / 0.4) ** 2 < 1)
    return img * np.exp(1j * (0.5 * x + 0.3 * y))


def _coils(ny: int, nx: int, c: int) -> np.ndarray:
    y, x = np.mgrid[-1:1:ny * 1j, -1:1:nx * 1j]
    out = []
    for j in range(c):
        a = 2 * np.pi * j / c
        out.append(np.exp(-((x - 1.3 * np.cos(a)) ** 2 + (y - 1.3 * np.sin(a)) ** 2) / 1.2)
                   * np.exp(1j * a))
    return np.array(out)


def _noise(shape: tuple[int, ...], c: int, rng: np.random.Generator, rho: float) -> np.ndarray:
    cov = (1 - rho) * np.eye(c) + rho * np.ones((c, c))
    n = (rng.standard_normal((c, *shape)) + 1j * rng.standard_normal((c, *shape))) / np.sqrt(2)
    return np.tensordot(np.linalg.cholesky(cov), n, 1)


def _raw(rng: np.random.Generator, *, ny: int = 64, nx: int = 64, c: int = 4,
         rho: float = 0.3, oversample: bool = False, rolloff: bool = False) -> np.ndarray:
    """Raw multi-coil k-space: correlated coil noise, optional kept 2x readout, roll-off."""
    nxx = 2 * nx if oversample else nx
    img = np.zeros((ny, nxx), complex)
    img[:, (nxx - nx) // 2:(nxx + nx) // 2] = _object(ny, nx)
    k = _fft2c(_coils(ny, nxx, c) * img[None] * 20) + _noise((ny, nxx), c, rng, rho)
    if rolloff:
        # receiver roll-off: a smooth attenuation of the readout edges (signal and noise)
        t = np.linspace(-1, 1, nxx)
        k = k * (1.0 / (1.0 + (t / 0.85) ** 12))[None, None, :]
    return k


def test_grappa_rule_lines_reproduced_to_rounding() -> None:
    """Lines filled by a GRAPPA rule (R = 2) are predicted by the fitted kernel to rounding.

    Truth: 4 coils of white noise (the acquired data); then each odd line is
    replaced by ``sum w * [line - 1, line + 1]`` over coils and 3 readout
    neighbours with a random kernel ``w`` (the GRAPPA filling rule, Griswold et
    al. 2002). Before filling, every line keeps its own noise: the normalised
    residual follows chi2(2 c (n - p)) / (2 c (n - p)), median within 0.8-1.2.
    After filling, the odd lines away from the edges (where the zero padding
    of the kernel differs) are predicted below 1e-8 of the noise variance.
    """
    rng = np.random.default_rng(0)
    c, ny, nx = 4, 64, 96
    k = (rng.standard_normal((c, ny, nx)) + 1j * rng.standard_normal((c, ny, nx))) / np.sqrt(2)
    before = ks.line_residuals(k, period=4, fit_columns=nx)
    assert 0.8 < np.nanmedian(before.residual) < 1.2
    w = (rng.standard_normal((c, 2, c, 3)) + 1j * rng.standard_normal((c, 2, c, 3))) * 0.2
    pad = np.pad(k, ((0, 0), (1, 1), (1, 1)))
    for y in range(1, ny - 1, 2):
        src = np.stack([pad[:, y, :], pad[:, y + 2, :]], axis=1)  # lines y-1, y+1
        acc = np.zeros((c, nx), complex)
        for s in range(3):
            acc += np.einsum("odc,cdx->ox", w[..., s], src[:, :, s:s + nx])
        k[:, y] = acc
    after = ks.line_residuals(k, period=4, fit_columns=nx)
    odd = np.arange(5, ny - 5, 2)
    assert np.nanmax(after.residual[odd]) < 1e-8


def _sense(k: np.ndarray, sens: np.ndarray, r: int) -> tuple[np.ndarray, np.ndarray]:
    """SENSE unfolding of every ``r``-th line (Pruessmann et al. 1999), white coil noise."""
    c, ny, nx = k.shape
    ku = np.zeros_like(k)
    ku[:, ::r] = k[:, ::r]
    aliased = _ifft2c(ku) * np.sqrt(r)
    out = np.zeros((ny, nx), complex)
    g = np.zeros((ny, nx))
    s = ny // r
    for y in range(s):
        ys = [(y + j * s) % ny for j in range(r)]
        a = sens[:, ys, :].transpose(2, 0, 1)  # (nx, c, r)
        m = np.einsum("xcr,xcq->xrq", a.conj(), a)
        mi = np.linalg.inv(m)
        rhs = np.einsum("xcr,cx->xr", a.conj(), aliased[:, y, :])
        out[ys, :] = np.einsum("xrq,xq->rx", mi, rhs)
        g[ys, :] = np.sqrt(np.abs(np.einsum("xrr->xr", mi) * np.einsum("xrr->xr", m))).T
    return out, g


def test_sense_noise_variance_follows_g_factor_closed_form() -> None:
    """The measured local noise variance of a SENSE image follows g^2 / sum|S|^2 (R = 2).

    Truth: unfolded pure noise (8 coils, white) has per-pixel variance
    ``[(S^H S)^-1]_ii = g_i^2 / [S^H S]_ii`` for aliased noise of unit variance
    (Pruessmann et al. 1999, closed form computed here). The Immerkaer-operator
    map of the image is compared tile by tile: correlation of logs above 0.8,
    median ratio within 15%.
    """
    rng = np.random.default_rng(1)
    ny = nx = 128
    c, r = 8, 2
    sens = _coils(ny, nx, c)
    k = _noise((ny, nx), c, rng, 0.0)
    img, g = _sense(k, sens, r)
    expected = g ** 2 / np.sum(np.abs(sens) ** 2, axis=0)
    vmap = ks.noise_variance_map(img, block=16)
    # Immerkaer's operator mixes 3x3 neighbours: compare with the tile mean of the closed form
    exp_t = expected.reshape(8, 16, 8, 16).mean(axis=(1, 3))
    ratio = vmap / exp_t
    assert abs(np.median(ratio) - 1) < 0.15
    assert np.corrcoef(np.log(vmap).ravel(), np.log(exp_t).ravel())[0, 1] > 0.8


@pytest.mark.parametrize("r", [2, 3, 4])
def test_sense_image_is_parallel_imaging(r: int) -> None:
    """A SENSE-unfolded complex image: present, method parallel_imaging, acceleration R.

    Truth: R-fold undersampled 8-coil k-space, SNR about 20, unfolded by SENSE;
    the noise of pixels ny/R apart is coupled (Pruessmann et al. 1999).
    """
    rng = np.random.default_rng(10 + r)
    ny, nx, c = 120, 128, 8
    sens = _coils(ny, nx, c)
    k = _fft2c(sens * _object(ny, nx)[None] * 20) + _noise((ny, nx), c, rng, 0.2)
    img, _ = _sense(k, sens, r)
    t = trace_of("kspace_synthesis", Volume.from_array(img[None].astype(np.complex64)))
    assert t.status == "present" and t.estimates["method"] == "parallel_imaging"
    assert t.estimates["acceleration"] == r
    d = t.evidence["decision"]
    assert d["value"] > d["threshold"] and d["p_value"] < d["false_alarm_rate"]


def test_grappa_filled_kspace_is_found_with_its_acceleration() -> None:
    """Multi-coil k-space with every other line filled from its neighbours: present, R = 2.

    Truth: 8 coils, lines 1, 3, ... outside 16 central lines replaced by a
    least-squares GRAPPA kernel (2 neighbouring lines x 3 readout samples,
    fitted on the centre; Griswold et al. 2002): filled fraction 24/64 = 0.375
    (tolerance 0.05).
    """
    rng = np.random.default_rng(3)
    c, ny, nx = 8, 64, 64
    k = _raw(rng, ny=ny, nx=nx, c=c)
    acs = k[:, 24:40]
    src, tgt = [], []
    for y in range(1, 15, 2):
        for x in range(1, nx - 1):
            src.append(np.concatenate([acs[:, y - 1, x - 1:x + 2].ravel(),
                                       acs[:, y + 1, x - 1:x + 2].ravel()]))
            tgt.append(acs[:, y, x])
    a, b = np.array(src), np.array(tgt)
    w = np.linalg.lstsq(a, b, rcond=None)[0]
    out = k.copy()
    pad = np.pad(k, ((0, 0), (0, 2), (1, 1)))
    for y in range(1, ny, 2):
        if 24 <= y < 40:
            continue
        rows = [np.concatenate([pad[:, y - 1, x:x + 3].ravel(), pad[:, y + 1, x:x + 3].ravel()])
                for x in range(nx)]
        out[:, y] = (np.array(rows) @ w).T
    vol = Volume.from_array(out[None].astype(np.complex64), domain="kspace", coil_axis=1)
    t = trace_of("kspace_synthesis", vol)
    assert t.status == "present" and t.estimates["method"] == "parallel_imaging"
    assert t.estimates["acceleration"] == 2
    assert abs(t.estimates["filled_fraction"] - 0.375) < 0.05


def test_false_alarm_rate_on_raw_acquisitions() -> None:
    """Raw multi-coil acquisitions are never called computed beyond the nominal rate.

    Truth: 12 raw acquisitions (4 coils, noise correlation 0.3, alternately a kept
    2x oversampled readout and a receiver roll-off), and their coil-combined
    complex images. The nominal false-alarm rate is 1e-3 per test; with 24
    tests the binomial probability of 2 or more false alarms is below 3e-4
    (scipy.stats.binom), so at most 1 is allowed.
    """
    rng = np.random.default_rng(7)
    alarms = 0
    for i in range(12):
        k = _raw(rng, oversample=i % 2 == 0, rolloff=i % 3 == 0)
        sc = ks.self_consistency(k)
        alarms += sc.filled_fraction >= ks.FILLED_SHARE and sc.p_value < ks.FALSE_ALARM
        coil_img = _ifft2c(k)
        combined = np.sum(coil_img * np.conj(coil_img[:1]), axis=0) / (
            np.abs(coil_img[0]) + 1e-3)
        fc = ks.fold_coupling(combined)
        alarms += fc.p_value < ks.FALSE_ALARM and fc.statistic >= ks.MIN_COUPLING
    assert stats.binom.sf(1, 24, ks.FALSE_ALARM) < 3e-4
    assert alarms <= 1


def test_magnitude_images_are_not_measurable() -> None:
    """Magnitude images: inconclusive, saying the phase is gone (common practice, no source)."""
    rng = np.random.default_rng(4)
    mag = np.abs(_object(64, 64) * 10 + rng.standard_normal((64, 64)))
    t = trace_of("kspace_synthesis", Volume.from_array(mag[None].astype(np.float32)))
    assert t.status == "inconclusive" and "phase is gone" in t.summary


@pytest.mark.parametrize("r", [2, 3, 4])
def test_period_from_residual_levels(r: int) -> None:
    """Acquired lines predicted less well than filled ones: the period is R.

    Truth: 128 lines; a measured centre of 24 lines at residual ~chi2/dof about
    1; outside, one line in R measured-but-predictable (residual 0.05) and the
    others filled (1e-6), as a GRAPPA-filled set leaves (Griswold et al. 2002).
    The filled share outside the centre is (R - 1) / R.
    """
    rng = np.random.default_rng(30 + r)
    n = 128
    res = np.where(np.arange(n) % r == 1, 0.05, 1e-6) * np.exp(0.1 * rng.standard_normal(n))
    res[52:76] = stats.chi2.rvs(500, size=24, random_state=rng) / 500
    per = ks.period_from_levels(res, np.ones(n, bool))
    assert per is not None and per.period == r and per.measured_class == 1
    assert per.p_value < 1e-3
    assert per.centre[52:76].all() and per.centre.sum() == 24


def test_raw_coil_images_are_measured() -> None:
    """Raw coil images (whose FFT has DC at index 0) are not called computed.

    Truth: raw 4-coil k-space with correlated noise and a kept 2x readout,
    delivered as coil images (inverse FFT, DC in the array corner after the
    analyser's forward FFT). The noise reference must come from the outer
    k-space, not from the DC corner (common practice, no source).
    """
    rng = np.random.default_rng(31)
    k = _raw(rng, ny=64, nx=64, c=4, oversample=True)
    imgs = _ifft2c(k)
    t = trace_of("kspace_synthesis", Volume.from_array(imgs[None].astype(np.complex64),
                                                       coil_axis=1))
    assert t.status == "absent"
