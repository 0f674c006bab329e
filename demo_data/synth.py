"""Synthetic MRI acquisitions with a known truth, for the demo, tests and bench.

Every function takes a ``numpy.random.Generator`` (or a seed) and returns arrays;
nothing here touches files.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft


def _rng(seed: int | np.random.Generator | None) -> np.random.Generator:
    return seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)


def phantom(
    shape: tuple[int, int] = (128, 128),
    *,
    seed: int | np.random.Generator | None = 0,
    n_blobs: int = 8,
    smooth_phase: bool = True,
) -> np.ndarray:
    """A head-like complex object: nested ellipses, random inner blobs, smooth phase.

    The object fills about 60-75 % of the field of view, leaving air around it
    for noise analysers. Returns complex64 with peak magnitude near 1.
    """
    rng = _rng(seed)
    ny, nx = shape
    y, x = np.mgrid[-1 : 1 : complex(0, ny), -1 : 1 : complex(0, nx)]
    img = np.zeros(shape, dtype=np.float64)
    a, b = 0.72 + 0.05 * rng.random(), 0.58 + 0.05 * rng.random()
    img[(x / b) ** 2 + (y / a) ** 2 <= 1] = 0.9
    img[(x / (b - 0.06)) ** 2 + (y / (a - 0.06)) ** 2 <= 1] = 0.35
    for _ in range(n_blobs):
        cx, cy = rng.uniform(-0.35, 0.35), rng.uniform(-0.45, 0.45)
        ra, rb = rng.uniform(0.05, 0.2), rng.uniform(0.05, 0.2)
        th = rng.uniform(0, np.pi)
        xr = (x - cx) * np.cos(th) + (y - cy) * np.sin(th)
        yr = -(x - cx) * np.sin(th) + (y - cy) * np.cos(th)
        img[(xr / ra) ** 2 + (yr / rb) ** 2 <= 1] += rng.uniform(-0.15, 0.45)
    img = np.clip(img, 0, None)
    # a little texture so that spectra are not pure ellipse sidelobes
    tex = sfft.ifft2(sfft.fft2(rng.standard_normal(shape)) * _lowpass(shape, 0.25)).real
    img = img * (1 + 0.08 * tex / (np.abs(tex).max() + 1e-12))
    img /= img.max()
    if smooth_phase:
        ph = (rng.uniform(-1, 1) * x + rng.uniform(-1, 1) * y) * np.pi * 0.8 + rng.uniform(
            0, 2 * np.pi
        )
        ph += 0.6 * np.pi * (x**2 - y**2) * rng.uniform(-1, 1)
        return (img * np.exp(1j * ph)).astype(np.complex64)
    return img.astype(np.complex64)


def _lowpass(shape: tuple[int, int], frac: float) -> np.ndarray:
    ky = sfft.fftfreq(shape[0])[:, None]
    kx = sfft.fftfreq(shape[1])[None, :]
    return np.exp(-(kx**2 + ky**2) / (2 * (frac / 4) ** 2))


def coil_maps(
    shape: tuple[int, int], n_coils: int, *, seed: int | np.random.Generator | None = 0
) -> np.ndarray:
    """Smooth complex receive sensitivities of coils placed around the object.

    Returns ``(n_coils, rows, cols)`` complex64, normalised so that the
    root-sum-of-squares of the maps is 1 at the centre.
    """
    rng = _rng(seed)
    ny, nx = shape
    y, x = np.mgrid[-1 : 1 : complex(0, ny), -1 : 1 : complex(0, nx)]
    maps = []
    for c in range(n_coils):
        ang = 2 * np.pi * c / n_coils + rng.uniform(-0.2, 0.2)
        cx, cy = 1.3 * np.cos(ang), 1.3 * np.sin(ang)
        d2 = (x - cx) ** 2 + (y - cy) ** 2
        mag = np.exp(-d2 / 1.6)
        ph = rng.uniform(0, 2 * np.pi) + 0.5 * (x * np.cos(ang) + y * np.sin(ang))
        maps.append(mag * np.exp(1j * ph))
    m = np.asarray(maps)
    m /= np.sqrt((np.abs(m) ** 2).sum(0))[ny // 2, nx // 2]
    return m.astype(np.complex64)


def to_kspace(image: np.ndarray) -> np.ndarray:
    """Centred orthonormal 2D FFT over the last two axes."""
    return sfft.fftshift(
        sfft.fft2(sfft.ifftshift(image, axes=(-2, -1)), norm="ortho"), axes=(-2, -1)
    )


def to_image(kspace: np.ndarray) -> np.ndarray:
    """Centred orthonormal inverse 2D FFT over the last two axes."""
    return sfft.fftshift(
        sfft.ifft2(sfft.ifftshift(kspace, axes=(-2, -1)), norm="ortho"), axes=(-2, -1)
    )


def zero_fill(kspace: np.ndarray, out_shape: tuple[int, int]) -> np.ndarray:
    """Pad centred k-space with zeros to ``out_shape`` (the centre sample stays centred)."""
    ny, nx = kspace.shape[-2:]
    oy, ox = out_shape
    out = np.zeros(kspace.shape[:-2] + (oy, ox), dtype=kspace.dtype)
    y0 = oy // 2 - ny // 2
    x0 = ox // 2 - nx // 2
    out[..., y0 : y0 + ny, x0 : x0 + nx] = kspace
    return out


def complex_noise(
    shape: tuple[int, ...],
    sigma: float,
    rng: np.random.Generator,
    correlation: np.ndarray | None = None,
) -> np.ndarray:
    """Complex white Gaussian noise with per-component standard deviation ``sigma``.

    ``correlation`` (coils x coils, Hermitian positive definite) correlates the
    leading (coil) axis.
    """
    n = (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) * sigma
    if correlation is not None:
        chol = np.linalg.cholesky(correlation)
        n = np.tensordot(chol, n, axes=(1, 0))
    return n.astype(np.complex64)


def acquire(
    shape: tuple[int, int] = (128, 128),
    *,
    n_coils: int = 1,
    n_slices: int = 1,
    sigma: float = 0.01,
    seed: int | np.random.Generator | None = 0,
    correlation: np.ndarray | None = None,
) -> np.ndarray:
    """Simulate multi-coil complex images of a phantom with k-space noise.

    Returns ``(n_slices, n_coils, rows, cols)`` complex64 images: the raw-like
    truth that processing steps are applied to. Noise is white in k-space with
    per-component standard deviation ``sigma`` (the same in image space, since
    the transform is orthonormal).
    """
    rng = _rng(seed)
    maps = coil_maps(shape, n_coils, seed=rng)
    out = np.empty((n_slices, n_coils) + tuple(shape), dtype=np.complex64)
    for s in range(n_slices):
        obj = phantom(shape, seed=rng)
        out[s] = maps * obj[None] + complex_noise(
            (n_coils,) + tuple(shape), sigma, rng, correlation
        )
    return out


def rss(coil_images: np.ndarray, axis: int = -3) -> np.ndarray:
    """Root-sum-of-squares coil combination (Roemer et al., MRM 1990)."""
    return np.sqrt((np.abs(coil_images) ** 2).sum(axis=axis)).astype(np.float32)


def zero_filled_magnitude(
    acquired_shape: tuple[int, int],
    padding: tuple[float, float],
    *,
    n_coils: int = 8,
    n_slices: int = 4,
    sigma: float = 0.01,
    seed: int | np.random.Generator | None = 0,
) -> tuple[np.ndarray, tuple[int, int]]:
    """Acquire, zero-fill k-space by ``padding`` per axis, combine by root-sum-of-squares.

    Returns the ``(n_slices, rows, cols)`` float32 magnitude stack and the output
    matrix. The truth: support fraction per axis = acquired / output size.
    """
    imgs = acquire(acquired_shape, n_coils=n_coils, n_slices=n_slices, sigma=sigma, seed=seed)
    out_shape = (
        int(round(acquired_shape[0] * padding[0])),
        int(round(acquired_shape[1] * padding[1])),
    )
    k = to_kspace(imgs)
    zf = to_image(zero_fill(k, out_shape))
    return rss(zf, axis=1), out_shape


def _pillow_round_trip(img8: np.ndarray, fmt: str, **save: object) -> np.ndarray:
    import io

    from PIL import Image

    buf = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(img8), "L").save(buf, fmt, **save)
    buf.seek(0)
    return np.asarray(Image.open(buf))


def jpeg_round_trip(img8: np.ndarray, quality: int) -> np.ndarray:
    """A uint8 greyscale image saved as baseline JPEG by Pillow (libjpeg) and decoded."""
    return _pillow_round_trip(img8, "JPEG", quality=quality)


def png_round_trip(img8: np.ndarray) -> np.ndarray:
    """A uint8 greyscale image saved as PNG by Pillow and decoded (lossless)."""
    return _pillow_round_trip(img8, "PNG")


def jpeg2000_round_trip(img8: np.ndarray, rate: int) -> np.ndarray:
    """A uint8 greyscale image saved as irreversible JPEG 2000 at ``rate``:1 by Pillow
    (OpenJPEG) and decoded."""
    return _pillow_round_trip(img8, "JPEG2000", quality_mode="rates", quality_layers=[rate],
                              irreversible=True)
