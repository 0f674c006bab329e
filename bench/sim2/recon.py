"""Reconstruction steps: coil combination, GRAPPA, SENSE and partial-Fourier fills.

Coil data are ``(L, ..., ny, nx)`` with channels first; phase encoding runs
along ``ny`` (rows) and the readout along ``nx`` (cols).
"""

from __future__ import annotations

import numpy as np
from scipy.ndimage import uniform_filter, zoom

from bench.sim2.fourier import crop_centre, to_image, to_kspace, window_1d, zero_pad


def rss(coil_images: np.ndarray) -> np.ndarray:
    """Root-sum-of-squares over the channel axis 0.

    References
    ----------
    P. B. Roemer et al., "The NMR phased array", Magn. Reson. Med. 16 (1990) 192-225.
    """
    return np.sqrt((np.abs(coil_images) ** 2).sum(0))


def low_res_sensitivities(kspace: np.ndarray, n_centre: int = 24, *, axes=(-2, -1)) -> np.ndarray:
    """Sensitivity estimate: Hann-windowed central k-space lines, divided by their RSS.

    References
    ----------
    K. P. Pruessmann, M. Weiger, M. B. Scheidegger and P. Boesiger, "SENSE:
    sensitivity encoding for fast MRI", Magn. Reson. Med. 42 (1999) 952-962
    (sensitivities from low-resolution reference images divided by a body-coil or
    sum-of-squares image).
    """
    ny, nx = kspace.shape[-2:]
    w = np.zeros(ny)
    c = ny // 2
    h = min(n_centre, ny) // 2
    w[c - h: c + h] = window_1d("hann", 2 * h + 2)[1:-1]
    wx = np.zeros(nx)
    hx = min(n_centre, nx) // 2
    wx[nx // 2 - hx: nx // 2 + hx] = window_1d("hann", 2 * hx + 2)[1:-1]
    low = to_image(kspace * np.outer(w, wx), axes=axes)
    norm = rss(low)
    return (low / (norm + 1e-3 * norm.max())).astype(np.complex64)


def roemer_combine(coil_images: np.ndarray, sens: np.ndarray, psi: np.ndarray) -> np.ndarray:
    """Optimal (B1-weighted) linear combination ``S^H Psi^-1 x / (S^H Psi^-1 S)``.

    Unit-gain signal weighting with the noise covariance; with estimated
    sensitivities this is SENSE at R = 1.

    References
    ----------
    P. B. Roemer et al., Magn. Reson. Med. 16 (1990) 192-225; K. P. Pruessmann
    et al., Magn. Reson. Med. 42 (1999) 952-962.
    """
    psi_inv = np.linalg.inv(psi)
    ps = np.tensordot(psi_inv, sens, axes=(1, 0))
    num = (ps.conj() * coil_images).sum(0)
    den = (ps.conj() * sens).sum(0).real
    return (num / np.maximum(den, 1e-6 * den.max())).astype(np.complex64)


def walsh_combine(coil_images: np.ndarray, psi: np.ndarray, *, kernel: int = 7,
                  max_points: int = 4096) -> np.ndarray:
    """Adaptive combination: weights from the dominant eigenvector of local signal correlation.

    The prewhitened signal correlation matrix is averaged over a ``kernel``-wide
    neighbourhood, its dominant eigenvector (found by power iteration) gives the
    weights; weights are computed on a decimated grid and spline-interpolated
    (the weights are smooth), and their phase is referred to the first channel.

    References
    ----------
    D. O. Walsh, A. F. Gmitro and M. W. Marcellin, "Adaptive reconstruction of
    phased array MR imagery", Magn. Reson. Med. 43 (2000) 682-690.
    """
    chol_inv = np.linalg.inv(np.linalg.cholesky(psi))
    L = coil_images.shape[0]
    x = np.tensordot(chol_inv, coil_images, axes=(1, 0))        # prewhitened
    ny, nx = x.shape[-2:]
    step = max(1, int(np.ceil(np.sqrt(ny * nx / max_points))))
    out = np.empty(x.shape[1:], dtype=np.complex64)
    for idx in np.ndindex(*x.shape[1:-2]):
        xi = x[(slice(None), *idx)]
        sub = xi[:, ::step, ::step]
        r = sub[:, None] * sub[None].conj()                       # (L, L, y, x)
        size = max(1, kernel // step) | 1
        r = uniform_filter(r.real, size=(1, 1, size, size)) + 1j * uniform_filter(
            r.imag, size=(1, 1, size, size))
        r = np.moveaxis(r, (0, 1), (-2, -1))                      # (y, x, L, L)
        v = np.ones(r.shape[:-1], dtype=complex) / np.sqrt(L)
        for _ in range(12):
            v = np.einsum("...ij,...j->...i", r, v)
            v /= np.linalg.norm(v, axis=-1, keepdims=True) + 1e-30
        v = v * np.exp(-1j * np.angle(v[..., :1]))
        v = np.moveaxis(v, -1, 0)
        if step > 1:
            fy, fx = ny / v.shape[1], nx / v.shape[2]
            v = np.stack([zoom(c.real, (fy, fx), order=1) + 1j * zoom(c.imag, (fy, fx), order=1)
                          for c in v])[:, :ny, :nx]
            pad = ((0, 0), (0, ny - v.shape[1]), (0, nx - v.shape[2]))
            v = np.pad(v, pad, mode="edge")
        out[idx] = (v.conj() * xi).sum(0)
    return out


def grappa_fit(acs: np.ndarray, R: int, *, kx: int = 3, lam: float = 1e-4) -> np.ndarray:
    """Fit GRAPPA weights on fully sampled calibration lines (channels, ny_acs, nx).

    For each offset m = 1..R-1 the target line ky0 + m of every channel is
    predicted from the acquired lines ky0 and ky0 + R (all channels, ``kx``
    neighbouring readout samples): weights of shape ``(R-1, L, 2 * kx * L)``,
    found by Tikhonov-regularised least squares.

    References
    ----------
    M. A. Griswold, P. M. Jakob, R. M. Heidemann, M. Nittka, V. Jellus, J. Wang,
    B. Kiefer and A. Haase, "Generalized autocalibrating partially parallel
    acquisitions (GRAPPA)", Magn. Reson. Med. 47 (2002) 1202-1210.
    """
    L, na, nx = acs.shape
    h = kx // 2
    weights = []
    for m in range(1, R):
        src, tgt = [], []
        for y0 in range(0, na - R):
            rows = acs[:, [y0, y0 + R], :]                          # (L, 2, nx)
            cols = np.stack([rows[..., h + d: nx - h + d] for d in range(-h, h + 1)], axis=2)
            src.append(cols.reshape(-1, nx - 2 * h).T)
            tgt.append(acs[:, y0 + m, h:nx - h].T)
        a = np.concatenate(src)
        b = np.concatenate(tgt)
        aha = a.conj().T @ a
        reg = lam * np.trace(aha).real / aha.shape[0]
        w = np.linalg.solve(aha + reg * np.eye(aha.shape[0]), a.conj().T @ b)
        weights.append(w.T)
    return np.asarray(weights)


def grappa_fill(kspace: np.ndarray, sampled: np.ndarray, R: int, weights: np.ndarray, *,
                kx: int = 3) -> np.ndarray:
    """Fill the skipped lines of ``kspace`` (L, ny, nx) from the acquired ones.

    ``sampled`` marks acquired rows (a regular pattern of spacing R, plus the
    calibration block). Rows outside k-space are taken as zero. Acquired rows are
    kept as measured.

    References
    ----------
    M. A. Griswold et al., Magn. Reson. Med. 47 (2002) 1202-1210.
    """
    L, ny, nx = kspace.shape
    h = kx // 2
    out = kspace.copy()
    padded = np.concatenate([np.zeros((L, R, nx), kspace.dtype), kspace,
                             np.zeros((L, R, nx), kspace.dtype)], axis=1)
    regular = np.zeros(ny, bool)
    regular[np.arange(ny // 2 % R, ny, R)] = True
    for y in range(ny):
        if sampled[y]:
            continue
        m = (y - ny // 2) % R
        y0 = y - m
        rows = padded[:, [y0 + R, y0 + 2 * R], :]                    # rows y0, y0 + R
        ext = np.concatenate([rows[..., -h:], rows, rows[..., :h]], axis=-1) if h else rows
        cols = np.stack([ext[..., h + d: h + d + nx] for d in range(-h, h + 1)], axis=2)
        out[:, y, :] = weights[m - 1] @ cols.reshape(-1, nx)
    return out


def undersampling_rows(ny: int, R: int, n_acs: int) -> np.ndarray:
    """Rows kept by a regular R-fold pattern through the centre plus ``n_acs`` central rows."""
    keep = np.zeros(ny, bool)
    keep[np.arange(ny // 2 % R, ny, R)] = True
    keep[ny // 2 - n_acs // 2: ny // 2 - n_acs // 2 + n_acs] = True
    return keep


def sense_unfold(aliased: np.ndarray, sens: np.ndarray, psi: np.ndarray, R: int, *,
                 lam: float = 1e-3) -> np.ndarray:
    """Cartesian SENSE: unfold R-fold aliased coil images (L, ny / R, nx) to (ny, nx).

    Solves ``(S^H Psi^-1 S + lam I) v = S^H Psi^-1 a`` for each aliased pixel,
    with ``S`` the sensitivities of the R superimposed positions.

    References
    ----------
    K. P. Pruessmann, M. Weiger, M. B. Scheidegger and P. Boesiger, "SENSE:
    sensitivity encoding for fast MRI", Magn. Reson. Med. 42 (1999) 952-962.
    """
    L, ny, nx = sens.shape
    nr = ny // R
    s = np.stack([np.roll(sens, -(k * nr), axis=1)[:, :nr] for k in range(R)], axis=-1)
    s = np.moveaxis(s, 0, -2)                                         # (nr, nx, L, R)
    psi_inv = np.linalg.inv(psi)
    shp = s.conj().swapaxes(-1, -2) @ psi_inv                         # (nr, nx, R, L)
    a = np.moveaxis(aliased, 0, -1)[..., None]                        # (nr, nx, L, 1)
    gram = shp @ s
    reg = lam * np.trace(gram, axis1=-2, axis2=-1).real[..., None, None] / R
    v = np.linalg.solve(gram + reg * np.eye(R), shp @ a)[..., 0]       # (nr, nx, R)
    out = np.empty((ny, nx), dtype=np.complex64)
    for k in range(R):
        out[k * nr:(k + 1) * nr] = v[..., k]
    return out


def sense_g_factor(sens: np.ndarray, psi: np.ndarray, R: int) -> np.ndarray:
    """SENSE g-factor map ``sqrt([(S^H Psi^-1 S)^-1]_ii [S^H Psi^-1 S]_ii)`` for (L, ny, nx).

    References
    ----------
    K. P. Pruessmann et al., Magn. Reson. Med. 42 (1999) 952-962, eq. 13.
    """
    L, ny, nx = sens.shape
    nr = ny // R
    s = np.stack([np.roll(sens, -(k * nr), axis=1)[:, :nr] for k in range(R)], axis=-1)
    s = np.moveaxis(s, 0, -2).astype(np.complex128)
    gram = s.conj().swapaxes(-1, -2) @ np.linalg.inv(psi) @ s
    inv = np.linalg.inv(gram)
    g = np.sqrt(np.abs(np.diagonal(inv, axis1=-2, axis2=-1) * np.diagonal(gram, axis1=-2,
                                                                              axis2=-1)))
    out = np.empty((ny, nx))
    for k in range(R):
        out[k * nr:(k + 1) * nr] = g[..., k]
    return out


def alias(kspace: np.ndarray, R: int) -> np.ndarray:
    """R-fold aliased coil images (L, ny / R, nx) from the rows ``ky - ny // 2 = 0 mod R``.

    Keeping every R-th row (the centre row among them) and inverse transforming
    gives ``(1 / R) sum_m I(y + m ny / R)``; its first ``ny / R`` rows, times R, are
    the folded image SENSE unfolds.

    References
    ----------
    K. P. Pruessmann et al., Magn. Reson. Med. 42 (1999) 952-962 (Cartesian folding).
    """
    L, ny, nx = kspace.shape
    mask = np.zeros(ny)
    mask[ny // 2 % R::R] = 1.0
    return (R * to_image(kspace * mask[:, None]))[:, : ny // R]


def pf_rows(ny: int, fraction: float) -> np.ndarray:
    """Rows acquired by a partial-Fourier scan: the last ``round(fraction * ny)`` rows."""
    keep = np.zeros(ny, bool)
    keep[ny - int(round(fraction * ny)):] = True
    return keep


def _pf_phase(kspace: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """Low-resolution phase from the symmetric central band of a partial-Fourier scan."""
    ny = kspace.shape[-2]
    n_missing = int((~keep).sum())
    c = ny // 2
    half = c - n_missing
    w = np.zeros(ny)
    w[c - half: c + half] = window_1d("hann", 2 * half + 2)[1:-1]
    return np.angle(to_image(kspace * w[:, None]))


def pf_conjugate(kspace: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """Conjugate synthesis after phase correction; measured rows are kept as measured.

    The zero-filled image is demodulated by the low-resolution phase, its
    spectrum made Hermitian on the missing rows (``K(-k) = conj K(k)``), the
    phase put back and the synthesised rows inserted.

    References
    ----------
    P. Margosian, F. Schmitt and D. Purdy, "Faster MR imaging: imaging with half
    the data", Health Care Instrum. 1 (1986) 195-197.
    """
    phase = np.exp(1j * _pf_phase(kspace, keep))
    real_img = to_image(kspace) * phase.conj()
    k = to_kspace(real_img)
    ny, nx = k.shape[-2:]
    mirror = np.conj(np.roll(np.flip(k, axis=(-2, -1)), (1 if ny % 2 == 0 else 0,
                                                         1 if nx % 2 == 0 else 0), axis=(-2, -1)))
    k = np.where(keep[:, None], k, mirror)
    full = to_kspace(to_image(k).real * phase)
    return np.where(keep[:, None], kspace, full).astype(np.complex64)


def pf_pocs(kspace: np.ndarray, keep: np.ndarray, *, iterations: int = 15) -> np.ndarray:
    """Projection onto convex sets: alternate the low-resolution phase and the measured rows.

    References
    ----------
    E. M. Haacke, E. D. Lindskog and W. Lin, "A fast, iterative, partial-Fourier
    technique capable of local phase recovery", J. Magn. Reson. 92 (1991) 126-145.
    """
    phase = np.exp(1j * _pf_phase(kspace, keep))
    k = kspace.copy()
    for _ in range(iterations):
        img = np.abs(to_image(k)) * phase
        k = np.where(keep[:, None], kspace, to_kspace(img))
    return k.astype(np.complex64)


__all__ = ["rss", "roemer_combine", "walsh_combine", "grappa_fit", "grappa_fill",
           "sense_unfold", "sense_g_factor", "pf_conjugate", "pf_pocs", "crop_centre",
           "zero_pad", "low_res_sensitivities", "undersampling_rows", "alias", "pf_rows"]
