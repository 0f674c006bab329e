"""Simulated measurement: object x loop sensitivities, central k-space, correlated noise.

The object is rendered on a grid twice as fine as the acquired matrix in every
encoded direction, multiplied by each channel's sensitivity, Fourier
transformed, and the central block of k-space is kept (a sampled continuous
object, whose spectrum extends beyond the acquired band). Thermal noise with a
channel covariance Psi is then added in k-space. Readout (cols) oversampling by
two is either kept, or removed the way a receiver does: an anti-alias roll-off
along the readout position, then cropping to the central half of the field of view.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from bench.sim2.anatomy import Anatomy, fractal_field
from bench.sim2.coils import LoopArray, correlated_noise, noise_covariance, sensitivities
from bench.sim2.fourier import crop_centre, receiver_rolloff, to_image, to_kspace


@dataclass
class Acquisition:
    """Measured multi-channel k-space and the truth behind it.

    ``kspace`` and ``clean`` are ``(L, Z, ny, nx)`` complex64: channels, slices
    (or 3D partitions), phase-encode rows, readout cols. ``sens`` holds the true
    sensitivities on the delivered image grid, ``obj`` the noise-free object
    there, ``psi`` the channel noise covariance and ``sigma`` the complex noise
    standard deviation per k-space sample of a channel with ``psi_ii = 1``.
    """

    kspace: np.ndarray
    clean: np.ndarray
    sens: np.ndarray
    obj: np.ndarray
    support: np.ndarray
    psi: np.ndarray
    sigma: float
    is_3d: bool
    oversampled: bool
    voxel_mm: tuple[float, float, float]

    @property
    def axes(self) -> tuple[int, ...]:
        """The encoded (Fourier) axes of ``kspace``."""
        return (1, 2, 3) if self.is_3d else (2, 3)


def acquire(anatomy: Anatomy, array: LoopArray, matrix: tuple[int, int], *, n_slices: int,
            is_3d: bool, snr: float, rng: np.random.Generator, readout_os: str = "none",
            fill: float = 0.8, fov_mm: float = 230.0,
            psi: np.ndarray | None = None) -> Acquisition:
    """Simulate one multi-channel acquisition.

    Parameters
    ----------
    readout_os : {"none", "cropped", "rolloff", "kept"}
        Readout oversampling by 2: none, cropped without filter, cropped after
        the receiver's anti-alias roll-off, or kept (doubled readout field of view).
    snr : float
        Mean root-sum-of-squares object signal over the complex noise standard
        deviation of one channel (both in the delivered image).
    fill : float
        Fraction of the field of view the object spans.
    psi : array, optional
        Channel noise covariance; drawn from the array geometry when omitted.

    References
    ----------
    P. B. Roemer et al., Magn. Reson. Med. 16 (1990) 192-225 (array noise);
    D. I. Hoult, Concepts Magn. Reson. 12 (2000) 173-187 (reciprocity).
    """
    ny, nx = matrix
    os_factor = 2 if readout_os in ("kept", "rolloff", "cropped") else 1
    nx_acq = nx * os_factor
    fov_y = 2.0 / fill
    fov_x = 2.0 / fill * (nx / ny) * os_factor
    yf = (np.arange(2 * ny) - ny) * (fov_y / (2 * ny))
    xf = (np.arange(2 * nx_acq) - nx_acq) * (fov_x / (2 * nx_acq))
    if is_3d:
        zf = (np.arange(2 * n_slices) - n_slices) * (1.6 / (2 * n_slices))
    else:
        zf = np.linspace(-0.35, 0.35, n_slices) if n_slices > 1 else np.zeros(1)
    nrng = np.random.default_rng(anatomy.seed)
    shape_f = (zf.size, yf.size, xf.size)
    noise = (fractal_field(shape_f, nrng), fractal_field(shape_f, nrng, beta=2.4))
    obj_f = anatomy.render(xf[None, None, :], yf[None, :, None], zf[:, None, None],
                           noise).astype(np.complex64)
    sens_f = sensitivities(array, [zf, yf, xf] if is_3d or zf.size > 1 else [yf, xf])
    if sens_f.ndim == 3:
        sens_f = sens_f[:, None]
    enc = (1, 2, 3) if is_3d else (2, 3)
    out_shape = ((n_slices,) if is_3d else ()) + (ny, nx_acq)
    scale = np.sqrt(np.prod(out_shape) / np.prod([shape_f[a - 1] for a in enc]))
    L = array.n_channels
    clean = np.empty((L, n_slices, ny, nx_acq), dtype=np.complex64)
    for c in range(L):
        k = to_kspace(sens_f[c] * obj_f, axes=[a - 1 for a in enc])
        clean[c] = crop_centre(k, out_shape) * scale
    # object and sensitivities on the acquired grid (for SNR and for the truth)
    obj = to_image(crop_centre(to_kspace(obj_f, axes=[a - 1 for a in enc]), out_shape) * scale,
                   axes=[a - 1 for a in enc]).astype(np.complex64)
    # acquired sample i sits at fine sample 2 i (both grids are centred on n // 2)
    sens = sens_f[:, 0::2] if is_3d else sens_f
    sens = np.ascontiguousarray(sens[:, :, 0::2, 0::2])
    zc = zf[0::2] if is_3d else zf
    support = anatomy.support(xf[None, None, 0::2], yf[None, 0::2, None], zc[:, None, None])
    if psi is None:
        psi = noise_covariance(array, rng)
    imgs = to_image(clean, axes=enc)
    rss_clean = np.sqrt((np.abs(imgs) ** 2).sum(0))
    signal = float(rss_clean[support].mean()) if support.any() else float(rss_clean.mean())
    sigma = signal / snr
    kspace = clean + correlated_noise(clean.shape, psi, sigma, rng)
    if readout_os in ("rolloff", "cropped"):
        kspace, clean, sens, obj, support = (
            _remove_oversampling(a, nx, rolloff=readout_os == "rolloff", image=b)
            for a, b in ((kspace, False), (clean, False), (sens, True), (obj, True),
                         (support, True)))
    voxel = (fov_mm / n_slices / 2 if is_3d else 4.0, fov_mm / ny, fov_mm / ny)
    return Acquisition(kspace.astype(np.complex64), clean.astype(np.complex64), sens, obj,
                       np.asarray(support, bool), psi, sigma, is_3d, readout_os == "kept",
                       voxel)


def _remove_oversampling(arr: np.ndarray, nx: int, *, rolloff: bool, image: bool) -> np.ndarray:
    """Crop a 2x oversampled readout to the central field of view (after a roll-off)."""
    if image:
        return crop_centre(arr, (arr.shape[-2], nx))
    img = to_image(arr, axes=(-1,))
    if rolloff:
        img = img * receiver_rolloff(arr.shape[-1])
    return to_kspace(crop_centre(img, (arr.shape[-2], nx)), axes=(-1,))
