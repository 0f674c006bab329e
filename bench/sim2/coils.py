"""Receive arrays of circular loops (Biot-Savart sensitivities) and their correlated noise.

References
----------
P. B. Roemer, W. A. Edelstein, C. E. Hayes, S. P. Souza and O. M. Mueller,
"The NMR phased array", Magn. Reson. Med. 16 (1990) 192-225.
K. P. Pruessmann, M. Weiger, P. Boernert and P. Boesiger, "Advances in
sensitivity encoding with arbitrary k-space trajectories", Magn. Reson. Med. 46
(2001) 638-651.
D. I. Hoult, "The principle of reciprocity in signal strength calculations - a
mathematical guide", Concepts Magn. Reson. 12 (2000) 173-187.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline


@dataclass
class LoopArray:
    """Circular receive loops on a cylinder around the object (axis = z)."""

    centres: np.ndarray     # (L, 3)
    normals: np.ndarray     # (L, 3), unit, pointing to the axis
    radius: float
    cable_phase: np.ndarray  # (L,)

    @property
    def n_channels(self) -> int:
        return int(self.centres.shape[0])


def draw_array(n_channels: int, rng: np.random.Generator, *, slab: bool = False) -> LoopArray:
    """Place ``n_channels`` loops on one or two rings of a cylinder around the object.

    Arrays of more than 12 channels use two rings offset along z (as head and
    torso arrays do); the loop radius shrinks with the number per ring.

    References
    ----------
    P. B. Roemer et al., Magn. Reson. Med. 16 (1990) 192-225 (overlapped loops);
    the geometry here is invented.
    """
    rings = 2 if n_channels > 12 else 1
    per_ring = [n_channels // rings + (1 if r < n_channels % rings else 0) for r in range(rings)]
    cyl = rng.uniform(1.15, 1.35)
    loop_r = min(0.95, 1.1 * np.pi * cyl / max(per_ring))
    centres, normals = [], []
    offset = rng.uniform(0, 2 * np.pi)
    for r, n in enumerate(per_ring):
        zc = 0.0 if rings == 1 else (-0.45 + 0.9 * r)
        for k in range(n):
            ang = offset + 2 * np.pi * (k + 0.5 * r) / n + rng.uniform(-0.08, 0.08)
            centres.append([cyl * np.cos(ang), cyl * np.sin(ang), zc + rng.uniform(-0.05, 0.05)])
            normals.append([-np.cos(ang), -np.sin(ang), 0.0])
    return LoopArray(np.asarray(centres), np.asarray(normals), float(loop_r),
                     rng.uniform(0, 2 * np.pi, n_channels))


def biot_savart_field(array: LoopArray, points: np.ndarray, n_segments: int = 32) -> np.ndarray:
    """Magnetic field per unit current of each loop at ``points`` (N, 3): (L, N, 3).

    The loop is a polygon of ``n_segments`` straight pieces; each piece
    contributes ``dl x (r - r') / |r - r'|**3`` at its midpoint (mu0 / 4 pi dropped).

    References
    ----------
    J. D. Jackson, *Classical Electrodynamics*, 3rd ed., Wiley (1999), eq. 5.14
    (the Biot-Savart law).
    """
    t = np.linspace(0, 2 * np.pi, n_segments + 1)
    out = np.zeros((array.n_channels, points.shape[0], 3))
    for c in range(array.n_channels):
        n = array.normals[c]
        u = np.cross(n, [0.0, 0.0, 1.0])
        if np.linalg.norm(u) < 1e-9:
            u = np.array([1.0, 0.0, 0.0])
        u /= np.linalg.norm(u)
        v = np.cross(n, u)
        ring = array.centres[c] + array.radius * (np.cos(t)[:, None] * u + np.sin(t)[:, None] * v)
        dl = np.diff(ring, axis=0)                      # (S, 3)
        mid = 0.5 * (ring[1:] + ring[:-1])
        d = points[None, :, :] - mid[:, None, :]        # (S, N, 3)
        r3 = np.linalg.norm(d, axis=-1, keepdims=True) ** 3
        out[c] = (np.cross(dl[:, None, :], d) / r3).sum(0)
    return out


def sensitivities(array: LoopArray, axes: list[np.ndarray], *, coarse: int = 40) -> np.ndarray:
    """Complex receive sensitivities on the grid spanned by ``axes`` ((z,) y, x).

    By reciprocity the receive sensitivity of a loop is the circularly polarised
    component ``Bx - i By`` of the field it would make with unit current. The
    field is computed on a coarse grid and interpolated with cubic splines (the
    maps are smooth); a cable phase per channel is added.

    Returns ``(L, *grid)`` complex64, scaled so that the root-sum-of-squares is 1
    at the grid centre.

    References
    ----------
    D. I. Hoult, Concepts Magn. Reson. 12 (2000) 173-187 (reciprocity).
    """
    if len(axes) == 2:
        axes = [np.zeros(1), *axes]
    zc, yc, xc = (np.linspace(a.min(), a.max(), min(coarse, a.size) if a.size > 1 else 1)
                  for a in axes)
    zcoarse = zc if len(zc) > 1 else zc[:1]
    if axes[0].size > 1:
        zcoarse = np.linspace(axes[0].min(), axes[0].max(), min(12, axes[0].size))
    Z, Y, X = np.meshgrid(zcoarse, yc, xc, indexing="ij")
    pts = np.stack([X.ravel(), Y.ravel(), Z.ravel()], axis=1)
    b = biot_savart_field(array, pts)
    s = (b[..., 0] - 1j * b[..., 1]).reshape((array.n_channels,) + Z.shape)
    s = s * np.exp(1j * array.cable_phase)[:, None, None, None]
    # separable cubic-spline interpolation from the coarse to the target grid
    mats = [_spline_matrix(c, a) for c, a in zip((zcoarse, yc, xc), axes, strict=True)]
    out = np.einsum("za,yb,xc,labc->lzyx", *mats, s, optimize=True).astype(np.complex64)
    centre = tuple(n // 2 for n in out.shape[1:])
    out /= np.sqrt((np.abs(out[(slice(None), *centre)]) ** 2).sum())
    if axes[0].size == 1:
        out = out[:, 0]
    return out


def _spline_matrix(coarse: np.ndarray, fine: np.ndarray) -> np.ndarray:
    """Matrix taking samples on ``coarse`` to their cubic-spline interpolant on ``fine``."""
    if coarse.size == 1:
        return np.ones((fine.size, 1))
    return CubicSpline(coarse, np.eye(coarse.size), axis=0)(np.clip(fine, coarse[0], coarse[-1]))


def noise_covariance(array: LoopArray, rng: np.random.Generator, *, low: float = 0.1,
                     high: float = 0.4) -> np.ndarray:
    """A Hermitian positive definite channel noise covariance Psi (diagonal near 1).

    Correlation magnitudes fall with loop distance from ``high`` for neighbours
    towards ``low`` for distant loops (mutual inductance and shared sample
    noise); each off-diagonal gets a phase, and channel noise levels differ by up
    to about 30 %.

    References
    ----------
    P. B. Roemer et al., Magn. Reson. Med. 16 (1990) 192-225 (noise correlation
    between array elements); the magnitudes chosen here are invented.
    """
    n = array.n_channels
    d = np.linalg.norm(array.centres[:, None] - array.centres[None], axis=-1)
    d_near = np.sort(d + np.diag(np.full(n, np.inf)), axis=1)[:, 0].min()
    corr = low + (high - low) * np.exp(-0.8 * (d / d_near - 1.0))
    corr *= rng.uniform(0.9, 1.0, (n, n))
    corr = np.triu(corr, 1)
    corr = corr + corr.T + np.eye(n)
    for _ in range(40):                    # shrink until positive definite
        if np.linalg.eigvalsh(corr).min() > 0.05:
            break
        off = corr - np.eye(n)
        corr = np.eye(n) + 0.9 * off
    ph = np.exp(1j * rng.uniform(-0.6, 0.6, n))
    corr = corr * np.outer(ph, ph.conj())
    std = rng.uniform(0.85, 1.15, n)
    return (corr * np.outer(std, std)).astype(np.complex128)


def correlated_noise(shape: tuple[int, ...], psi: np.ndarray, sigma: float,
                     rng: np.random.Generator, *, coil_axis: int = 0) -> np.ndarray:
    """Complex circular Gaussian noise with channel covariance ``sigma**2 * psi``.

    ``E[n n^H] = sigma**2 psi`` (so each real component of channel i has variance
    ``sigma**2 psi_ii / 2``), drawn as ``chol(psi) w`` with white ``w``.

    References
    ----------
    P. B. Roemer et al., Magn. Reson. Med. 16 (1990) 192-225; K. P. Pruessmann
    et al., Magn. Reson. Med. 46 (2001) 638-651.
    """
    chol = np.linalg.cholesky(psi)
    w = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) * (sigma / np.sqrt(2))
    w = np.moveaxis(w, coil_axis, 0)
    n = np.tensordot(chol, w, axes=(1, 0))
    return np.moveaxis(n, 0, coil_axis).astype(np.complex64)


def prewhiten(data: np.ndarray, psi: np.ndarray, *, coil_axis: int = 0) -> np.ndarray:
    """Decorrelate channels: ``L^-1 x`` with ``psi = L L^H`` (Cholesky).

    References
    ----------
    K. P. Pruessmann et al., Magn. Reson. Med. 46 (2001) 638-651 (noise
    decorrelation by the Cholesky factor); P. B. Roemer et al. (1990).
    """
    chol_inv = np.linalg.inv(np.linalg.cholesky(psi))
    x = np.moveaxis(data, coil_axis, 0)
    out = np.tensordot(chol_inv, x, axes=(1, 0))
    return np.moveaxis(out, 0, coil_axis).astype(data.dtype)
