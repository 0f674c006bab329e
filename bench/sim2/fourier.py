"""Centred Fourier transforms, k-space windows, zero-filling and the receiver roll-off.

Pure array code; every transform is orthonormal so noise keeps its variance
between k-space and image space.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import scipy.fft as sfft

WINDOWS = ("hamming", "hann", "fermi", "tukey", "gaussian")


def to_kspace(image: np.ndarray, axes: Sequence[int] = (-2, -1)) -> np.ndarray:
    """Centred orthonormal forward FFT over ``axes`` (DC at index n // 2).

    References
    ----------
    J. W. Cooley and J. W. Tukey, "An algorithm for the machine calculation of
    complex Fourier series", Math. Comp. 19 (1965) 297-301.
    """
    axes = tuple(axes)
    return sfft.fftshift(sfft.fftn(sfft.ifftshift(image, axes=axes), axes=axes, norm="ortho",
                                   workers=1), axes=axes)


def to_image(kspace: np.ndarray, axes: Sequence[int] = (-2, -1)) -> np.ndarray:
    """Centred orthonormal inverse FFT over ``axes`` (the inverse of :func:`to_kspace`).

    References
    ----------
    J. W. Cooley and J. W. Tukey, Math. Comp. 19 (1965) 297-301.
    """
    axes = tuple(axes)
    return sfft.fftshift(sfft.ifftn(sfft.ifftshift(kspace, axes=axes), axes=axes, norm="ortho",
                                    workers=1), axes=axes)


def crop_centre(arr: np.ndarray, shape: Sequence[int]) -> np.ndarray:
    """The centred block of ``shape`` over the trailing axes (the sample n // 2 stays centred)."""
    shape = tuple(shape)
    lead = arr.ndim - len(shape)
    idx = [slice(None)] * lead
    for n_in, n_out in zip(arr.shape[lead:], shape, strict=True):
        start = n_in // 2 - n_out // 2
        idx.append(slice(start, start + n_out))
    return arr[tuple(idx)]


def zero_pad(kspace: np.ndarray, shape: Sequence[int]) -> np.ndarray:
    """Pad centred k-space with zeros to ``shape`` over the trailing axes (zero-filling).

    References
    ----------
    Common practice, no source (interpolation by padding the measured spectrum).
    """
    shape = tuple(shape)
    lead = kspace.ndim - len(shape)
    out = np.zeros(kspace.shape[:lead] + shape, dtype=kspace.dtype)
    idx = [slice(None)] * lead
    for n_in, n_out in zip(kspace.shape[lead:], shape, strict=True):
        start = n_out // 2 - n_in // 2
        idx.append(slice(start, start + n_in))
    out[tuple(idx)] = kspace
    return out


def window_1d(name: str, n: int, *, fermi_radius: float = 0.85, fermi_width: float = 0.04,
              tukey_alpha: float = 0.5, gaussian_sd: float = 0.4) -> np.ndarray:
    """A symmetric apodization window of ``n`` samples over the measured k-space line.

    Hamming and Hann use the classic cosine sums over ``n`` points (the same
    definition as ``scipy.signal.windows.hamming(n, sym=True)``); Fermi is the
    Fermi-Dirac roll-off ``1 / (1 + exp((|k| - k0) / w))`` in units of the half
    width; Tukey is the tapered cosine with taper fraction ``alpha``; Gaussian has
    standard deviation ``gaussian_sd`` half widths.

    References
    ----------
    R. W. Hamming, *Digital Filters*, Prentice-Hall (1977); F. J. Harris, "On the
    use of windows for harmonic analysis with the discrete Fourier transform",
    Proc. IEEE 66 (1978) 51-83; J. W. Tukey, "An introduction to the calculations
    of numerical spectrum analysis" (1967). Fermi filter in MRI: common practice,
    no source.
    """
    if n == 1:
        return np.ones(1)
    m = np.arange(n)
    phase = 2 * np.pi * m / (n - 1)
    if name == "hamming":
        return 0.54 - 0.46 * np.cos(phase)
    if name == "hann":
        return 0.5 - 0.5 * np.cos(phase)
    r = np.abs(np.linspace(-1.0, 1.0, n))
    return _radial_profile(name, r, fermi_radius, fermi_width, tukey_alpha, gaussian_sd)


def _radial_profile(name: str, r: np.ndarray, fermi_radius: float, fermi_width: float,
                    tukey_alpha: float, gaussian_sd: float) -> np.ndarray:
    """The window as a function of the normalised distance r from the k-space centre (1 = edge)."""
    rc = np.clip(r, 0.0, 1.0)
    if name == "hamming":
        return 0.54 + 0.46 * np.cos(np.pi * rc)
    if name == "hann":
        return 0.5 + 0.5 * np.cos(np.pi * rc)
    if name == "fermi":
        return 1.0 / (1.0 + np.exp((r - fermi_radius) / fermi_width))
    if name == "tukey":
        edge = 1.0 - tukey_alpha
        out = np.ones_like(r)
        taper = rc > edge
        out[taper] = 0.5 * (1 + np.cos(np.pi * (rc[taper] - edge) / tukey_alpha))
        return out
    if name == "gaussian":
        return np.exp(-0.5 * (r / gaussian_sd) ** 2)
    raise ValueError(f"unknown window {name!r}; choose one of {WINDOWS}")


def window_2d(name: str, shape: tuple[int, int], *, shape_kind: str = "separable",
              **kw: float) -> np.ndarray:
    """A 2D k-space apodization: the outer product of two 1D windows or a radial one.

    References
    ----------
    F. J. Harris, Proc. IEEE 66 (1978) 51-83 (the 1D windows); radial versus
    separable raw filters: common practice, no source.
    """
    ny, nx = shape
    if shape_kind == "separable":
        return np.outer(window_1d(name, ny, **kw), window_1d(name, nx, **kw))
    if shape_kind != "radial":
        raise ValueError("shape_kind must be 'separable' or 'radial'")
    ky = (np.arange(ny) - ny // 2) / max(ny / 2, 1)
    kx = (np.arange(nx) - nx // 2) / max(nx / 2, 1)
    r = np.sqrt(ky[:, None] ** 2 + kx[None, :] ** 2)
    return _radial_profile(name, r, kw.get("fermi_radius", 0.85), kw.get("fermi_width", 0.04),
                           kw.get("tukey_alpha", 0.5), kw.get("gaussian_sd", 0.4))


def receiver_rolloff(n_oversampled: int, *, passband: float = 0.8, stopband: float = 1.25,
                     floor: float = 0.02) -> np.ndarray:
    """Gain of an anti-alias receiver filter across a 2x oversampled readout field of view.

    The gain is flat out to ``passband`` (in units of the final half field of
    view), falls as a raised cosine to ``floor`` at ``stopband``. It acts on the
    readout signal, that is, position along the readout in the image.

    References
    ----------
    Common practice, no source (digital receivers low-pass filter the sampled
    echo before the oversampled field of view is cropped).
    """
    x = np.abs((np.arange(n_oversampled) - n_oversampled // 2) / (n_oversampled / 4))
    t = np.clip((x - passband) / (stopband - passband), 0.0, 1.0)
    return floor + (1 - floor) * 0.5 * (1 + np.cos(np.pi * t))
