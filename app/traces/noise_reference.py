"""The thermal noise reference of a dataset: the level and spectrum of its white noise.

Before any processing, MRI noise is white in k-space: every k-space sample carries
the same noise variance. The spectral analysers (zero-filling, partial Fourier,
k-space filtering) decide against this reference rather than against fixed dB
steps: zero-filled k-space holds less than the thermal noise beyond its support,
a missing partial-Fourier side holds less than the acquired side's noise, and a
window multiplies the noise spectrum by its square.

What is measured, once per dataset (the analysis plan's ``noise_reference`` step):

* From the background (air, the ``background`` step's masks), for every kind of
  input: the per-pixel noise variance (summed over coils) by the median of 8 x 8
  block variances, which ghosting bands and stray signal cannot inflate; the white
  noise level it implies per bin of the ``spectrum`` step's power
  (``rows * cols * variance`` for images, unnormalised FFT; the variance itself for
  k-space input, which the background step brought to images with an orthonormal
  FFT); and the noise power spectrum by a masked periodogram (the background,
  mean removed, times its mask, transformed and divided by the mask's area),
  averaged over the analysed frames, with its per-bin variance. For magnitude
  images the background holds Rayleigh or non-central chi noise (Gudbjartsson and
  Patz 1995), whose variance is at most that of the noise on the object, so the
  level is a lower bound of the image's white noise level.
  For magnitude images the noise power spectrum is that of the intensity (the
  squared magnitude): by the Isserlis (Wick) theorem [4]_ the autocovariance of
  ``|z|**2`` for circular complex Gaussian ``z`` is ``|R_z|**2``, so its spectrum is
  the autocorrelation of the complex noise spectrum, exactly.
* For complex images and k-space: the mean power of the outer, noise-dominated
  bands of the spectrum (the outermost sixteenth per axis and side), the reference
  of the mirrored-band tests of partial Fourier.

Where there is no usable background (masked, cropped to the object, too few
samples) ``kind`` is ``"outer_bands"`` (complex data) or ``"none"``, with the
reason; the analysers then fall back to what the spectrum alone shows.

References
----------
.. [1] Welch, P. D. "The use of fast Fourier transform for the estimation of power
   spectra", IEEE Trans. Audio Electroacoust. 15(2):70-73, 1967.
.. [2] Gudbjartsson, H. and Patz, S. "The Rician distribution of noisy MRI data",
   Magn. Reson. Med. 34(6):910-914, 1995.
.. [3] Kay, S. M. *Fundamentals of Statistical Signal Processing, vol. II:
   Detection Theory*, Prentice Hall, 1998 (periodogram bins of white Gaussian noise
   are exponential: chi-square with 2 degrees of freedom over 2).
.. [4] Isserlis, L. "On a formula for the product-moment coefficient of any order of
   a normal frequency distribution in any number of variables", Biometrika
   12(1/2):134-139, 1918.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.fft as sfft
from scipy import ndimage

from app.io.volume import Volume
from app.traces import spectrum as sp
from app.traces.base import StepUnavailableError

#: side of the blocks whose variances give the robust background variance
BLOCK = 8
#: at least this many full background blocks make a usable reference
MIN_BLOCKS = 12
#: the outer bands of the spectrum: this share of each axis, per side
OUTER_SHARE = 1 / 16
#: pixels over which the periodogram's data taper rises from the background's edge
TAPER = 4.0
#: standard deviation (pixels) of the local mean removed before the periodogram
HIGHPASS_SIGMA = 1.5
#: Whether the support step uses the joint support-and-window fit to the background
#: noise spectrum (magnitude images: support; every kind: the window;
#: app/traces/support.py reads this switch). Off: measured on the sim2 dev split it
#: does not yet beat the step locator (resized and JPEG archives and resliced volumes
#: have low-passed background noise that it reads as a narrower support or a window;
#: 1.25-1.5x padding of magnitude images is weak evidence). While it is off, the
#: masked periodogram of magnitude and real images, which only that fit reads, is
#: not computed (it was a third of the analysis time of a magnitude volume); the
#: noise level, the block variances and the outer bands are.
USE_NOISE_SPECTRUM = False


@dataclass
class NoiseReference:
    """The white thermal noise of a dataset, as the spectral analysers use it.

    Attributes
    ----------
    kind : {"background", "outer_bands", "none"}
        Where the level comes from: the background (air), the outer bands of the
        spectrum only (complex data without a usable background), or nowhere.
    value_kind : {"complex", "magnitude", "real"}
        Complex (phase kept; complex images and k-space), magnitude (real,
        non-negative) or real with signs.
    pixel_variance : float or None
        Per-pixel noise variance (summed over coils) in the background.
    floor : float or None
        The white noise level per bin of the spectrum step's mean power.
    floor_rse : float or None
        Relative standard error of ``floor`` (from the number of blocks).
    n_blocks : int
        Background blocks the variance was taken from.
    psd : ndarray or None
        ``(rows, cols)`` background noise power spectrum (centred), in units of the
        white level (white noise gives 1 everywhere); blurred by the mask's own
        spectrum (``mask_kernel``). For complex data the spectrum of the values
        (summed over channels): the acquired k-space noise spectrum, ``|W(k)|**2``
        on the acquired support. For magnitude and real images the spectrum of the
        intensity (squared magnitude, summed over channels): by the Isserlis (Wick)
        theorem its autocorrelation is ``|R_z|**2`` plus a constant, so apart from
        DC its spectrum is the autocorrelation of ``|W|**2`` on the support.
    psd_of : {"complex", "intensity"}
        What ``psd`` is the spectrum of.
    mask_kernel : ndarray or None
        ``(rows, cols)`` centred ``|FFT(mask)|**2 / area**2`` averaged over frames:
        the spectrum a masked periodogram is convolved with.
    area : float
        Background pixels summed over the analysed frames.
    psd_frames : int
        Frames (times coils) averaged in ``psd``: each bin's relative variance is
        about ``1 / psd_frames``.
    outer : dict
        Axis -> ``{"pos": mean power, "neg": mean power, "bins": int}`` of the outer
        bands (complex data and k-space only).
    reason : str or None
        Why there is no background reference, when there is none.
    notes : list of str
    """

    kind: str
    value_kind: str
    pixel_variance: float | None
    floor: float | None
    floor_rse: float | None
    n_blocks: int
    psd: np.ndarray | None
    psd_frames: int
    outer: dict[str, dict[str, float]] = field(default_factory=dict)
    reason: str | None = None
    notes: list[str] = field(default_factory=list)
    psd_of: str = "complex"
    mask_kernel: np.ndarray | None = None
    area: float = 0.0
    highpass_sigma: float = 0.0

    @property
    def usable(self) -> bool:
        """Whether a background noise level was measured."""
        return self.kind == "background" and self.floor is not None and self.floor > 0

    def psd_profile(self, axis: int, band: int | None = None) -> np.ndarray | None:
        """Background noise spectrum along ``axis`` (0 rows, 1 cols), centred.

        Averaged over the other axis's central ``band`` bins on each side of DC
        (default: all of it).
        """
        if self.psd is None:
            return None
        a = self.psd if axis == 0 else self.psd.T
        if band is None:
            return a.mean(axis=1)
        m = a.shape[1]
        c = m // 2
        cols = np.r_[c - band:c, c + 1:c + band + 1]
        cols = cols[(cols >= 0) & (cols < m)]
        return a[:, cols].mean(axis=1)


def block_variances(values: np.ndarray, mask: np.ndarray, block: int = BLOCK) -> np.ndarray:
    """Variances of the ``block x block`` tiles that lie wholly inside ``mask``.

    ``values`` is ``(rows, cols)`` or ``(coils, rows, cols)`` (variances summed over
    coils; complex values give ``E|x - mean|^2``).
    """
    v = values if values.ndim == 3 else values[None]
    r = (mask.shape[0] // block) * block
    c = (mask.shape[1] // block) * block
    if r == 0 or c == 0:
        return np.zeros(0)
    m = mask[:r, :c].reshape(r // block, block, c // block, block).all(axis=(1, 3))
    if not m.any():
        return np.zeros(0)
    t = v[:, :r, :c].reshape(v.shape[0], r // block, block, c // block, block)
    t = t.transpose(0, 1, 3, 2, 4)[:, m]  # (coils, tiles, block, block)
    t = t.reshape(t.shape[0], t.shape[1], -1)
    dev = t - t.mean(axis=-1, keepdims=True)
    var = (dev.real ** 2 + (dev.imag ** 2 if np.iscomplexobj(dev) else 0)).sum(axis=-1)
    return (var / (block * block - 1)).sum(axis=0)


def _median_to_mean(dof: float) -> float:
    """Mean over median of a chi-square variable with ``dof`` degrees of freedom.

    The median of block variances is turned into their mean with it (Gaussian noise:
    a block variance is ``chi2(dof) / dof`` times the variance).

    References
    ----------
    .. [1] Wilson, E. B. and Hilferty, M. M. "The distribution of chi-square",
       PNAS 17(12):684-688, 1931 (here computed exactly with scipy.stats).
    """
    from scipy import stats

    return float(dof / stats.chi2.median(dof))


def _frames(volume: Volume, frames: np.ndarray, batch: int) -> Any:
    """Image-domain frames ``(b, [coils,] rows, cols)`` of the given flat indices."""
    from app.traces.background import image_blocks

    yield from image_blocks(volume, frames, batch=batch)


def _outer_bands(spectrum: sp.Spectrum) -> dict[str, dict[str, float]]:
    out = {}
    for i, ax in enumerate(("rows", "cols")):
        prof = spectrum.profiles[ax]
        n = len(prof)
        c = n // 2
        m = max(1, int(round(n * OUTER_SHARE)))
        pos, neg = prof[c:][-m:], prof[c::-1][-m:]
        out[ax] = {"pos": float(pos.mean()), "neg": float(neg.mean()),
                   "bins": int(m * spectrum.shape[1 - i] * spectrum.n_frames)}
    return out


def measure(volume: Volume, spectrum: sp.Spectrum, background: Any, *,
            batch: int = 8) -> NoiseReference:
    """Measure the noise reference of a Volume (see the module docstring).

    Parameters
    ----------
    volume : Volume
    spectrum : Spectrum
        The ``spectrum`` step's result (for the outer bands and the normalisation).
    background : Background or None
        The ``background`` step's result (None when it failed).
    batch : int
        Frames per read.

    Returns
    -------
    NoiseReference

    References
    ----------
    .. [1] Welch, IEEE Trans. Audio Electroacoust. 15:70-73, 1967.
    .. [2] Gudbjartsson and Patz, Magn. Reson. Med. 34:910-914, 1995.
    """
    complex_like = volume.value_type == "complex" or volume.domain == "kspace"
    outer = _outer_bands(spectrum) if complex_like else {}
    if complex_like:
        value_kind = "complex"
    else:
        value_kind = "real"
        if background is not None and background.magnitude.size and \
                float(np.min(background.magnitude)) >= 0:
            value_kind = "magnitude"
    fallback = "outer_bands" if complex_like else "none"

    def none(reason: str) -> NoiseReference:
        return NoiseReference(fallback, value_kind, None, None, None, 0, None, 0, outer,
                              reason)

    if background is None:
        return none("no background (air) region could be found")
    if background.reason:
        return none(background.reason)
    rows, cols = spectrum.shape
    multi = volume.coil_axis is not None
    variances: list[np.ndarray] = []
    psd = np.zeros((rows, cols))
    kernel = np.zeros((rows, cols))
    area = 0.0
    n_psd = 0
    n_masks = 0
    masks = background.masks
    k = 0
    magnitude_values = value_kind == "magnitude"
    for _, block in _frames(volume, np.asarray(background.frames), batch):
        for j in range(block.shape[0]):
            if k >= len(masks):
                break
            mask = masks[k]
            k += 1
            if not mask.any():
                continue
            x = np.nan_to_num(np.asarray(block[j]))
            if not multi:
                x = x[None]
            if magnitude_values and not np.iscomplexobj(x):
                x = x.astype(np.float64)
            variances.append(block_variances(x, mask))
            if not (complex_like or USE_NOISE_SPECTRUM):
                continue
            # masked periodogram: the background, its mean removed, over its area; for
            # real values of the intensity (squared magnitude summed over channels),
            # whose spectrum is the autocorrelation of the complex noise spectrum
            y = x if complex_like else (x.astype(np.float64) ** 2).sum(axis=0)[None]
            # a data taper rising over TAPER pixels from the mask's edge keeps the
            # mask's own spectrum (the periodogram's leakage) compact (Harris 1978)
            taper = np.clip(ndimage.distance_transform_edt(mask) / TAPER, 0.0, 1.0)
            tw = float((taper ** 2).sum())
            if tw <= 0:
                continue
            # the slowly varying level (object leakage, shading) is removed by a local
            # mean within the mask (normalised convolution with a Gaussian of
            # HIGHPASS_SIGMA pixels); the spectrum is then multiplied by
            # (1 - G(k))**2, which the models take into account
            den = ndimage.gaussian_filter(mask.astype(np.float64), HIGHPASS_SIGMA)
            loc = np.stack([ndimage.gaussian_filter(np.where(mask, yc, 0).real,
                                                    HIGHPASS_SIGMA)
                            + (1j * ndimage.gaussian_filter(np.where(mask, yc, 0).imag,
                                                            HIGHPASS_SIGMA)
                               if np.iscomplexobj(yc) else 0)
                            for yc in y]) / np.maximum(den, 1e-12)
            dev = (y - loc) * taper
            f = sfft.fft2(dev, workers=1)
            psd += (f.real ** 2 + f.imag ** 2).sum(axis=0) / tw
            fm = sfft.fft2(taper ** 2, workers=1)
            kernel += (fm.real ** 2 + fm.imag ** 2) / tw ** 2
            area += tw
            n_psd += y.shape[0]
            n_masks += 1
    var = np.concatenate(variances) if variances else np.zeros(0)
    if var.size < MIN_BLOCKS or not np.any(var > 0):
        return none(f"only {var.size} full {BLOCK} x {BLOCK} background blocks "
                    f"(at least {MIN_BLOCKS} needed) or a constant background")
    dof = float((BLOCK * BLOCK - 1) * (2 if value_kind == "complex" else 1))
    pixel_var = float(np.median(var) * _median_to_mean(dof))
    if pixel_var <= 0:
        return none("the background is constant (masked or replaced)")
    norm = 1.0 if volume.domain == "kspace" else float(rows * cols)
    floor = norm * pixel_var
    rse = float(np.sqrt(2.0 / dof) * 1.25 / np.sqrt(var.size))
    # no periodogram was taken for magnitude or real values while the noise-spectrum fit
    # is off: the level and its uncertainty only (n_psd and area stay 0)
    psd_white = mask_kernel = None
    if n_masks:
        psd = sfft.fftshift(psd / n_masks)
        mask_kernel = sfft.fftshift(kernel / n_masks)
        if complex_like:
            # the per-pixel variance is a multi-coil sum: psd in white units
            psd_white = psd / pixel_var
        else:
            # intensity: white noise gives a flat spectrum whose mean (Parseval) is the
            # variance of the intensity; units of that mean away from DC
            rr, cc = np.meshgrid(np.abs(np.arange(rows) - rows // 2),
                                 np.abs(np.arange(cols) - cols // 2), indexing="ij")
            away = (rr > rows // 16) | (cc > cols // 16)
            psd_white = psd / max(float(psd[away].mean()), 1e-300)
    return NoiseReference("background", value_kind, pixel_var, floor, rse, int(var.size),
                          psd_white, n_psd, outer, None,
                          psd_of="complex" if complex_like else "intensity",
                          mask_kernel=mask_kernel, area=area, highpass_sigma=HIGHPASS_SIGMA)


def noise_reference_step(volume: Volume, scope: Any, spectrum: sp.Spectrum,
                         background: Any = None) -> NoiseReference:
    """The shared step: the dataset's :class:`NoiseReference`.

    Raises
    ------
    StepUnavailableError
        Never for a lack of background (that is ``kind="none"`` with a reason); only
        when the spectrum itself could not be computed (then this step is not run).

    References
    ----------
    .. [1] Welch, IEEE Trans. Audio Electroacoust. 15:70-73, 1967.
    """
    if spectrum is None:  # pragma: no cover - the plan does not call it then
        raise StepUnavailableError("no spectrum")
    return measure(volume, spectrum, background, batch=max(1, min(8, scope.batch)))
