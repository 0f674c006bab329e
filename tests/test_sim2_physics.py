"""Physics of the second simulator (bench/sim2) against outside references."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy import signal, stats

from bench.sim2 import TRACE_IDS, cases, recon
from bench.sim2.acquisition import acquire
from bench.sim2.anatomy import draw_anatomy
from bench.sim2.coils import correlated_noise, draw_array, noise_covariance, prewhiten
from bench.sim2.fourier import to_image, window_1d

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def head_acq():
    """A 12-channel noise-free-and-noisy head acquisition, 96 x 96 (truth built here)."""
    rng = np.random.default_rng(11)
    return acquire(draw_anatomy("head", rng), draw_array(12, rng), (96, 96), n_slices=1,
                   is_3d=False, snr=40.0, rng=rng)


def test_prewhitened_noise_covariance_is_identity():
    """Noise drawn with covariance Psi, decorrelated by the inverse Cholesky factor, has
    identity covariance within sampling error (Roemer et al., MRM 16 (1990) 192-225;
    Pruessmann et al., MRM 46 (2001) 638-651). Tolerance: 5 standard errors of a sample
    covariance entry, 5 / sqrt(n)."""
    rng = np.random.default_rng(3)
    array = draw_array(8, rng)
    psi = noise_covariance(array, rng)
    corr = np.abs(psi) / np.sqrt(np.outer(np.diag(psi).real, np.diag(psi).real))
    off = corr[np.triu_indices(8, 1)]
    assert off.min() >= 0.08 and off.max() <= 0.41
    n = 200_000
    noise = correlated_noise((8, n), psi, 1.0, rng)
    emp = noise @ noise.conj().T / n
    assert np.abs(emp - psi).max() < 5 / np.sqrt(n) * np.abs(psi).max() * 2
    white = prewhiten(noise, psi)
    cov = white @ white.conj().T / n
    assert np.abs(cov - np.eye(8)).max() < 5 / np.sqrt(n)


def test_grappa_reproduces_skipped_lines_noise_free(head_acq):
    """GRAPPA weights fitted on a 24-line calibration block of noise-free data predict the
    skipped lines (Griswold et al., MRM 47 (2002) 1202-1210); tolerance 6 % relative error
    over interior lines (rows near the k-space edge are filled from zero rows outside)."""
    k = head_acq.clean[:, 0]
    ny = k.shape[1]
    for R in (2, 3, 4):
        keep = recon.undersampling_rows(ny, R, 24)
        w = recon.grappa_fit(k[:, ny // 2 - 12: ny // 2 + 12], R)
        filled = recon.grappa_fill(k * keep[:, None], keep, R, w)
        inner = np.zeros(ny, bool)
        inner[2 * R:-2 * R] = True
        miss = ~keep & inner
        err = np.linalg.norm((filled - k)[:, miss]) / np.linalg.norm(k[:, miss])
        assert err < 0.06, (R, err)
        assert np.array_equal(filled[:, keep], k[:, keep])


@pytest.mark.parametrize("n_coils", [1, 4, 8])
def test_rss_of_white_noise_follows_chi(n_coils):
    """Root-sum-of-squares of L channels of complex white Gaussian noise (per-component sd
    sigma) is sigma times a chi variable with 2L degrees of freedom (Constantinides, Atalar
    and McVeigh, MRM 38 (1997) 852-857); checked with scipy.stats.chi by a KS test, p > 0.01."""
    rng = np.random.default_rng(100 + n_coils)
    sigma = 0.7
    noise = correlated_noise((n_coils, 4000), np.eye(n_coils), sigma * np.sqrt(2), rng)
    r = recon.rss(noise)
    assert stats.kstest(r, stats.chi(2 * n_coils, scale=sigma).cdf).pvalue > 0.01


def test_rss_signal_follows_noncentral_chi():
    """RSS of L channels carrying signals A_i plus white noise is sigma times a non-central
    chi with 2L dof and non-centrality sqrt(sum |A_i|^2) / sigma (Constantinides et al. 1997):
    its square over sigma^2 follows scipy.stats.ncx2(2L, sum|A|^2 / sigma^2); KS p > 0.01."""
    rng = np.random.default_rng(7)
    L, sigma = 6, 0.5
    amp = rng.uniform(0.2, 0.6, L) * np.exp(1j * rng.uniform(0, 6, L))
    x = amp[:, None] + correlated_noise((L, 4000), np.eye(L), sigma * np.sqrt(2), rng)
    r2 = recon.rss(x) ** 2 / sigma**2
    lam = np.sum(np.abs(amp) ** 2) / sigma**2
    assert stats.kstest(r2, stats.ncx2(2 * L, lam).cdf).pvalue > 0.01


def test_sense_g_factor_matches_closed_form(head_acq):
    """The SENSE g-factor map at R = 2 equals sqrt([(S^H Psi^-1 S)^-1]_ii [S^H Psi^-1 S]_ii)
    (Pruessmann et al., MRM 42 (1999) 952-962, eq. 13), here computed pixel by pixel with
    plain loops; tolerance 1e-6 relative. The unfolded noise-free image equals the optimal
    R = 1 combination within 3 % inside the object."""
    sens = head_acq.sens[:, 0].astype(np.complex128)
    psi = head_acq.psi
    R = 2
    g = recon.sense_g_factor(sens, psi, R)
    L, ny, nx = sens.shape
    nr = ny // R
    pinv = np.linalg.inv(psi)
    for y in range(0, nr, 7):
        for x in range(0, nx, 9):
            S = np.stack([sens[:, y + k * nr, x] for k in range(R)], axis=1)
            A = S.conj().T @ pinv @ S
            Ai = np.linalg.inv(A)
            for k in range(R):
                ref = np.sqrt((Ai[k, k] * A[k, k]).real)
                assert g[y + k * nr, x] == pytest.approx(ref, rel=1e-6)
    assert g.min() >= 1 - 1e-9
    k = head_acq.clean[:, 0]
    unfolded = recon.sense_unfold(recon.alias(k, R), sens, psi, R, lam=1e-8)
    ref_img = recon.roemer_combine(to_image(k), sens, psi)
    m = head_acq.support[0]
    assert np.linalg.norm((unfolded - ref_img)[m]) / np.linalg.norm(ref_img[m]) < 0.03


def test_pocs_keeps_samples_and_beats_zero_fill(head_acq):
    """POCS partial Fourier (Haacke, Lindskog and Lin, J. Magn. Reson. 92 (1991) 126-145)
    returns the acquired rows unchanged, and its missing rows are closer to the true k-space
    than the zero fill; conjugate synthesis (Margosian et al. 1986) likewise."""
    k = head_acq.clean[:, 0]
    ny = k.shape[1]
    for frac in (0.625, 0.75):
        keep = recon.pf_rows(ny, frac)
        kz = k * keep[:, None]
        for out in (recon.pf_pocs(kz, keep), recon.pf_conjugate(kz, keep)):
            assert np.array_equal(out[:, keep], kz[:, keep])
            err = np.linalg.norm((out - k)[:, ~keep])
            assert err < 0.6 * np.linalg.norm(k[:, ~keep])      # zero fill's error is 1.0


@pytest.mark.parametrize("n", [16, 63, 128])
def test_hamming_raw_filter_matches_scipy(n):
    """The Hamming raw filter equals scipy.signal.windows.hamming(n, sym=True) (Hamming,
    Digital Filters, 1977); Hann equals scipy.signal.windows.hann."""
    np.testing.assert_allclose(window_1d("hamming", n), signal.windows.hamming(n), atol=1e-12)
    np.testing.assert_allclose(window_1d("hann", n), signal.windows.hann(n), atol=1e-12)


def test_object_spectrum_reaches_kspace_edge(head_acq):
    """Sampling the central k-space of an object rendered on a 2x grid leaves energy at the
    acquired band's edge well above zero (common practice, no source: measured k-space of an
    object with sharp edges is not band-limited); a zero-filled spectrum would be exactly 0."""
    k = np.abs(head_acq.clean[:, 0]).sum(0)
    assert k[0].mean() > 1e-4 * k.max() and k[:, 0].mean() > 1e-4 * k.max()


def test_case_lists_are_disjoint_and_complete():
    """dev and heldout draw from disjoint seeds and names; every truth lists all ten trace
    ids of the report contract (shared/REPORT_CONTRACT.md) and obeys its verdict rule."""
    for quick in (True, False):
        dev, held = cases("dev", quick=quick), cases("heldout", quick=quick)
        assert not {c.name for c in dev} & {c.name for c in held}
        assert not {c.seed for c in dev} & {c.seed for c in held}
        assert len({c.name for c in dev}) == len(dev)
        for c in dev + held:
            assert set(c.truth["traces"]) == set(TRACE_IDS)
            tr, origin = c.truth["traces"], c.truth["origin"]
            processed = any(s == "present" and origin.get(t) != "acquisition"
                            for t, s in tr.items())
            assert (c.truth["verdict"] == "processed") == processed
    assert len(cases("dev")) >= 120
    raw = [c for c in cases("dev") if c.route == "raw_control"]
    assert raw and all(c.truth["verdict"] == "raw-like" for c in raw)


def test_quick_set_materialises_readable_files(tmp_path):
    """Every quick case writes files that nibabel, pydicom, Pillow, h5py or numpy read back
    (the formats' reference readers), with the kwargs the contract names for k-space."""
    import json

    import h5py
    import nibabel as nib
    import pydicom
    from PIL import Image

    for case in cases("dev", quick=True):
        path, kwargs = case.materialise(tmp_path / case.name)
        p = Path(path)
        files = sorted(p.iterdir()) if p.is_dir() else [p]
        assert files
        f = files[0]
        if f.suffix == ".dcm":
            ds = pydicom.dcmread(f)
            assert ds.pixel_array.shape == (ds.Rows, ds.Columns)
        elif f.name.endswith((".nii", ".nii.gz")):
            assert np.isfinite(nib.load(f).get_fdata()).all()
        elif f.suffix in (".png", ".jpg"):
            assert Image.open(f).mode == "L"
        elif f.suffix == ".h5":
            with h5py.File(f) as fh:
                assert "kspace" in fh
        elif f.suffix in (".npy", ".npz"):
            arr = np.load(f)
            if f.suffix == ".npz":
                arr = arr[arr.files[0]]
            side = json.loads(f.with_suffix(".json").read_text())
            if side["domain"] == "kspace":
                assert kwargs == {"domain": "kspace", "coil_axis": 0}
                assert np.iscomplexobj(arr)
        else:
            raise AssertionError(f"unexpected file {f}")
