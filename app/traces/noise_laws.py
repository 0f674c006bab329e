"""Noise laws of MR images in signal-free background, and fitting them.

Three laws describe the background of a reconstructed MR image:

- Gaussian: the real and imaginary parts of complex images (and real, phase-
  corrected images) carry zero-mean Gaussian noise of standard deviation sigma.
- Rayleigh: the magnitude of one complex channel in pure background
  (Gudbjartsson and Patz, 1995).
- Central chi with ``2L`` degrees of freedom, scaled by sigma: the root-sum-of-
  squares of ``L`` channels in pure background; away from the background the
  law is non-central chi (Constantinides, Atalar and McVeigh, 1997). Rayleigh is
  the case ``L = 1``.

Pure maths: arrays in, dataclasses out.

References
----------
.. [1] H. Gudbjartsson and S. Patz, "The Rician distribution of noisy MRI data",
   Magnetic Resonance in Medicine 34(6):910-914, 1995.
.. [2] C. D. Constantinides, E. Atalar and E. R. McVeigh, "Signal-to-noise
   measurements in magnitude images from NMR phased arrays", Magnetic Resonance
   in Medicine 38(5):852-857, 1997.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft
from scipy import optimize, special, stats

L_MIN = 0.5
L_MAX = 512.0


def chi_mean(sigma: float, n_channels: float) -> float:
    """Mean of the central chi law with ``2L`` degrees of freedom scaled by sigma.

    ``E[x] = sigma * sqrt(2) * Gamma(L + 1/2) / Gamma(L)``; for ``L = 1`` this is
    the Rayleigh mean ``sigma * sqrt(pi / 2)``.

    References
    ----------
    Constantinides, Atalar and McVeigh, MRM 1997 (the magnitude of ``L``
    combined channels); Gudbjartsson and Patz, MRM 1995 (``L = 1``).
    """
    L = float(n_channels)
    return float(sigma * np.sqrt(2.0) * np.exp(special.gammaln(L + 0.5) - special.gammaln(L)))


def chi_variance(sigma: float, n_channels: float) -> float:
    """Variance of the central chi law with ``2L`` degrees of freedom scaled by sigma.

    ``Var[x] = 2 L sigma^2 - E[x]^2``; for ``L = 1``, ``(2 - pi/2) sigma^2``.

    References
    ----------
    Constantinides, Atalar and McVeigh, MRM 1997; Gudbjartsson and Patz, MRM 1995.
    """
    return float(2.0 * n_channels * sigma**2 - chi_mean(sigma, n_channels) ** 2)


def _moment_ratio(L: float) -> float:
    """``E[x]^2 / E[x^2]`` of the central chi law with ``2L`` degrees of freedom."""
    return float(np.exp(2.0 * (special.gammaln(L + 0.5) - special.gammaln(L))) / L)


def channels_from_moments(m1: float, m2: float) -> float:
    """Solve ``E[x]^2 / E[x^2]`` for the number of channels ``L`` (method of moments).

    The ratio depends on ``L`` only and grows monotonically from ``pi/4`` at
    ``L = 1`` towards 1; the result is clamped to ``[L_MIN, L_MAX]``.

    Parameters
    ----------
    m1, m2 : float
        First and second raw moments of background magnitudes.

    Returns
    -------
    float
        The effective number of channels (not rounded).

    References
    ----------
    Constantinides, Atalar and McVeigh, MRM 1997 (moments of the combined law).
    """
    if m2 <= 0 or m1 <= 0:
        return float("nan")
    r = m1 * m1 / m2
    lo, hi = _moment_ratio(L_MIN), _moment_ratio(L_MAX)
    if r <= lo:
        return L_MIN
    if r >= hi:
        return L_MAX
    return float(optimize.brentq(lambda L: _moment_ratio(L) - r, L_MIN, L_MAX, xtol=1e-6))


QUANTILES = (0.1, 0.5)


def _quantile_ratio(L: float) -> float:
    lo, hi = QUANTILES
    return float(np.sqrt(stats.chi2.ppf(hi, 2.0 * L) / stats.chi2.ppf(lo, 2.0 * L)))


def channels_from_quantiles(samples: np.ndarray) -> tuple[float, float]:
    """Effective ``L`` and ``sigma`` from the 10% and 50% quantiles of background magnitudes.

    For the central chi law with ``2L`` degrees of freedom scaled by sigma, the
    quantile ratio ``q50 / q10`` depends on ``L`` only; sigma then follows from
    the median. Ringing, ghosting and stray signal raise the upper tail and bias
    the moments, hardly the lower quantiles; this is the robust companion of
    :func:`channels_from_moments`.

    Returns
    -------
    L, sigma : float
        NaN when the quantiles are not positive.

    References
    ----------
    Constantinides, Atalar and McVeigh, MRM 1997 (the chi law); quantile
    matching is common practice, no source.
    """
    x = np.asarray(samples, dtype=np.float64).ravel()
    q10, q50 = np.quantile(x, QUANTILES)
    if q10 <= 0 or q50 <= q10:
        return float("nan"), float("nan")
    r = q50 / q10
    lo, hi = _quantile_ratio(L_MIN), _quantile_ratio(L_MAX)
    if r >= lo:
        L = L_MIN
    elif r <= hi:
        L = L_MAX
    else:
        L = float(optimize.brentq(lambda v: _quantile_ratio(v) - r, L_MIN, L_MAX, xtol=1e-4))
    sigma = float(q50 / np.sqrt(stats.chi2.ppf(QUANTILES[1], 2.0 * L)))
    return L, sigma


def chi_skewness(n_channels: float) -> float:
    """Skewness of the central chi law with ``2L`` degrees of freedom (scipy.stats.chi)."""
    return float(stats.chi(df=2.0 * n_channels).stats(moments="s"))


@dataclass
class LawFit:
    """One candidate law fitted to background samples.

    Attributes
    ----------
    law : {"gaussian", "rayleigh", "noncentral_chi"}
    sigma : float
        Per-component noise standard deviation (Gaussian: the standard deviation).
    channels : float or None
        Effective number of channels ``L`` (chi laws), else None.
    loc : float
        Mean of the Gaussian law; 0 for the chi laws.
    statistic : float
        Kolmogorov-Smirnov distance between the samples and the fitted law.
    p_value : float
        The test's p-value (samples taken as independent; see :func:`fit_laws`).
    """

    law: str
    sigma: float
    channels: float | None
    loc: float
    statistic: float
    p_value: float

    def frozen(self) -> stats.rv_continuous:
        """The fitted law as a frozen ``scipy.stats`` distribution."""
        if self.law == "gaussian":
            return stats.norm(loc=self.loc, scale=self.sigma)
        if self.law == "rayleigh":
            return stats.rayleigh(scale=self.sigma)
        return stats.chi(df=2.0 * float(self.channels or 1.0), scale=self.sigma)


def _ks(samples: np.ndarray, dist: stats.rv_continuous) -> tuple[float, float]:
    res = stats.kstest(samples, dist.cdf)
    return float(res.statistic), float(res.pvalue)


def fit_gaussian(samples: np.ndarray, *, zero_mean: bool = False) -> LawFit:
    """Fit a Gaussian law by its moments and test it.

    Parameters
    ----------
    samples : ndarray
        Real values (for complex data: real and imaginary parts together).
    zero_mean : bool
        Fix the mean at zero (background of complex or real phase-corrected data).

    References
    ----------
    Gudbjartsson and Patz, MRM 1995 (Gaussian noise of the complex components).
    """
    x = np.asarray(samples, dtype=np.float64).ravel()
    loc = 0.0 if zero_mean else float(x.mean())
    sigma = float(np.sqrt(np.mean((x - loc) ** 2)))
    if sigma <= 0:
        return LawFit("gaussian", 0.0, None, loc, 1.0, 0.0)
    d, p = _ks(x, stats.norm(loc=loc, scale=sigma))
    return LawFit("gaussian", sigma, None, loc, d, p)


def fit_rayleigh(samples: np.ndarray) -> LawFit:
    """Fit the Rayleigh law by maximum likelihood (``sigma^2 = E[x^2] / 2``) and test it.

    References
    ----------
    Gudbjartsson and Patz, MRM 1995.
    """
    x = np.asarray(samples, dtype=np.float64).ravel()
    sigma = float(np.sqrt(np.mean(x * x) / 2.0))
    if sigma <= 0:
        return LawFit("rayleigh", 0.0, 1.0, 0.0, 1.0, 0.0)
    d, p = _ks(x, stats.rayleigh(scale=sigma))
    return LawFit("rayleigh", sigma, 1.0, 0.0, d, p)


def fit_central_chi(samples: np.ndarray, *, m1: float | None = None,
                    m2: float | None = None) -> LawFit:
    """Fit the central chi law with ``2L`` degrees of freedom by the method of moments.

    ``L`` comes from :func:`channels_from_moments`, then ``sigma^2 = E[x^2] / (2L)``.
    The moments may be given (computed on more samples than are tested).

    References
    ----------
    Constantinides, Atalar and McVeigh, MRM 1997.
    """
    x = np.asarray(samples, dtype=np.float64).ravel()
    m1 = float(x.mean()) if m1 is None else float(m1)
    m2 = float(np.mean(x * x)) if m2 is None else float(m2)
    L = channels_from_moments(m1, m2)
    if not np.isfinite(L) or m2 <= 0:
        return LawFit("noncentral_chi", 0.0, None, 0.0, 1.0, 0.0)
    sigma = float(np.sqrt(m2 / (2.0 * L)))
    d, p = _ks(x, stats.chi(df=2.0 * L, scale=sigma))
    return LawFit("noncentral_chi", sigma, L, 0.0, d, p)


def fit_central_chi_params(samples: np.ndarray, channels: float, sigma: float) -> LawFit:
    """Test the central chi law with given ``L`` and ``sigma`` against the samples.

    References
    ----------
    Constantinides, Atalar and McVeigh, MRM 1997.
    """
    x = np.asarray(samples, dtype=np.float64).ravel()
    d, p = _ks(x, stats.chi(df=2.0 * channels, scale=sigma))
    return LawFit("noncentral_chi", float(sigma), float(channels), 0.0, d, p)


def dither(values: np.ndarray, step: float, rng: np.random.Generator) -> np.ndarray:
    """Spread values stored on a lattice of ``step`` uniformly over their rounding cell.

    Makes integer-quantised samples comparable with a continuous law in a
    Kolmogorov-Smirnov test (ties otherwise dominate the statistic).
    Common practice, no source.
    """
    return values + rng.uniform(-0.5 * step, 0.5 * step, size=values.shape)


@dataclass
class NoiseEvenness:
    """Whether the noise power is the same all over a region (one sigma) or varies.

    Attributes
    ----------
    statistic : float
        The between-tile to within-tile ratio of the noise power, with the
        within-tile variance corrected for correlation and the between-tile
        variance divided by the tile factor ``K`` (about 1 for one sigma).
    p_value : float
        Upper tail of the F law with ``(df1, df2)`` effective degrees of freedom.
    blocks : int
        Tiles of the region used (``k``).
    kappa : float
        Sum of the noise power's autocorrelation over the lags of one tile
        window (``|lag| < block`` per axis, the product of the two axes'
        sums): the variance inflation of a mean over a large region (1 for
        independent samples; larger after interpolation or filtering).
    spread : float
        Ratio of the 90th to the 10th percentile of the tiles' mean power.
    tile_factor : float
        ``K``: the variance of a tile mean of correlated samples over that of
        independent ones (the autocorrelation weighted by the share of the
        tile's pixel pairs at each lag).
    """

    statistic: float
    p_value: float
    blocks: int
    kappa: float
    spread: float
    tile_factor: float = 1.0


def _lag_window(field: np.ndarray, mask: np.ndarray, max_lag: int
                ) -> tuple[np.ndarray, np.ndarray]:
    """Lagged products ``sum d_i d_{i+h}`` and pair counts over a mask, lags ``|h| <= max_lag``.

    Both come from one zero-padded FFT each (Wiener-Khinchin); the arrays are
    indexed ``[hy + max_lag, hx + max_lag]``.
    """
    ny, nx = field.shape
    shape = (sfft.next_fast_len(ny + max_lag), sfft.next_fast_len(nx + max_lag))
    prods = sfft.irfft2(np.abs(sfft.rfft2(field, shape)) ** 2, shape)
    pairs = sfft.irfft2(np.abs(sfft.rfft2(mask.astype(np.float64), shape)) ** 2, shape)
    lags = np.r_[-max_lag:0, 0:max_lag + 1]
    return prods[np.ix_(lags, lags)], np.rint(pairs[np.ix_(lags, lags)])


#: offsets (pixels) of the lines parallel to each axis whose autocovariance is subtracted from
#: the axis's own: they carry the smooth trend's share but hardly any of the noise's
OFFSETS = (2, 3, 4)


def _noise_profiles(prods: np.ndarray, pairs: np.ndarray, block: int
                    ) -> tuple[np.ndarray, np.ndarray] | None:
    """Autocorrelation profiles of the noise power along each axis, a smooth trend removed.

    Zero-filling, k-space windows and separable interpolation filter the noise
    with a product of one-dimensional filters, so its autocorrelation is a
    product ``rho(hy, hx) = rho_y(hy) rho_x(hx)``, and so is that of the power
    ``|x|^2`` (Isserlis 1918: ``rho_y = |rho_x|^2`` for circular Gaussian
    noise). A sigma that varies smoothly across the image adds a covariance
    ``T(h)`` that changes slowly with the lag. The autocovariance ``A`` along
    an axis minus the mean of ``A`` on the parallel lines at the offsets
    :data:`OFFSETS` is ``c0 rho_x(hx) (1 - mean rho_y(g))`` plus only the
    second difference of ``T`` across a few pixels; divided by its value at
    lag 0 it leaves ``rho_x``. Returns ``(rho_y, rho_x)`` over ``|h| < block``,
    or None when lag 0 holds no noise.
    """
    H = (prods.shape[0] - 1) // 2
    if pairs[H, H] <= 0:
        return None
    acov = prods / np.maximum(pairs, 1.0)
    h = np.arange(-(block - 1), block) + H
    g = np.asarray(OFFSETS)
    line_x = acov[H, h] - 0.5 * (acov[H + g][:, h] + acov[H - g][:, h]).mean(axis=0)
    line_y = acov[h, H] - 0.5 * (acov[:, H + g][h] + acov[:, H - g][h]).mean(axis=1)
    if line_x[block - 1] <= 0 or line_y[block - 1] <= 0:
        return None
    return line_y / line_y[block - 1], line_x / line_x[block - 1]


def whole_tiles(values: np.ndarray, mask: np.ndarray, block: int = 8) -> np.ndarray | None:
    """Which ``block x block`` tiles (from the top-left corner) lie wholly in the mask
    with finite values: a ``(rows // block, cols // block)`` boolean grid, or None
    when the frame is smaller than one tile."""
    ny, nx = (values.shape[0] // block) * block, (values.shape[1] // block) * block
    if ny == 0 or nx == 0:
        return None
    mk = np.asarray(mask, bool) & np.isfinite(values)
    return mk[:ny, :nx].reshape(ny // block, block, nx // block, block).all(axis=(1, 3))


def count_whole_tiles(frames: list[np.ndarray], masks: list[np.ndarray], *,
                      block: int = 8) -> int:
    """The number of tiles :func:`noise_evenness` would use (``blocks``)."""
    total = 0
    for f, m in zip(frames, masks, strict=True):
        a = np.asarray(f)
        whole = whole_tiles(np.abs(a.astype(np.complex128 if np.iscomplexobj(a)
                                            else np.float64)) ** 2, m, block)
        total += int(whole.sum()) if whole is not None else 0
    return total


def noise_evenness(frames: list[np.ndarray], masks: list[np.ndarray], *,
                   block: int = 8) -> NoiseEvenness | None:
    """Test the noise power of a background for one common sigma (one-way analysis of variance).

    The noise power ``y = |x|^2`` of the background samples is grouped in
    ``block x block`` tiles lying wholly in the background. Under one sigma
    (one channel, root-sum-of-squares of a stationary array) the tile means
    scatter only as the samples do: the analysis-of-variance ratio follows the
    F law. Adaptive, Roemer and SENSE weights leave a sigma that varies across
    the image (Walsh et al. 2000; Roemer et al. 1990; Pruessmann et al. 1999),
    which lifts the ratio.

    Spatially correlated noise (zero-filling, k-space windows, interpolation)
    makes neighbouring samples alike. With the autocorrelation ``rho(h)`` of
    ``y``, the variance of a tile mean is ``c0 K / n`` with the tile factor
    ``K = sum_h rho(h) (1 - |hy|/B)(1 - |hx|/B)`` over ``|h| < B``, and the
    within-tile variance has expectation ``c0 (n - K) / (n - 1)`` (the variance
    of a mean of correlated samples; Priestley 1981). The autocovariance is
    measured on the whole-tile background from the lagged products over the
    pair counts at each lag (unbiased for any mask shape); ``rho`` is taken
    separable, one profile per axis, each with the share a smooth sigma trend
    adds removed (:func:`_noise_profiles`), so the trend is tested, not taken
    for correlation.

    The tile means of a power are not Gaussian: the noise power of Gaussian
    noise follows a gamma law of shape ``a`` (1 for complex, 1/2 for real
    samples) with excess kurtosis ``6 / a``, estimated here from the pooled
    squared coefficient of variation ``1 / a``; a tile mean of ``n / K``
    effective samples keeps ``6 K / (a n)``. The between-tile degrees of
    freedom are divided by ``1 + kurtosis / 2`` (Box 1953), those of the
    within-tile variance likewise and by the sum of ``rho^2``.

    Parameters
    ----------
    frames : list of ndarray
        2D magnitudes, complex or real values, one per frame.
    masks : list of ndarray of bool
        The background of each frame.
    block : int
        Tile side ``B`` (``n = B^2`` samples a tile).

    Returns
    -------
    NoiseEvenness or None
        None when fewer than 8 whole tiles lie in the background, or the
        background is too small to measure the correlation over a tile.

    References
    ----------
    R. A. Fisher, *Statistical Methods for Research Workers*, Oliver and Boyd,
    1925 (analysis of variance; recalled from memory). M. B. Priestley,
    *Spectral Analysis and Time Series*, Academic Press, 1981 (the variance of
    a mean of correlated samples and the lag-window estimate of the
    autocovariance). L. Isserlis, "On a formula for the product-moment
    coefficient of any order of a normal frequency distribution in any number
    of variables", Biometrika 12:134-139, 1918 (``rho_y = |rho_x|^2`` for
    circular Gaussian noise, which makes separable k-space filters separable
    in ``y`` too). G. E. P. Box, "Non-normality and tests on variances",
    Biometrika 40:318-335, 1953 (the kurtosis correction of the degrees of
    freedom; recalled from memory). D. O. Walsh, A. F. Gmitro and
    M. W. Marcellin, "Adaptive reconstruction of phased array MR imagery",
    Magnetic Resonance in Medicine 43(5):682-690, 2000. P. B. Roemer et al.,
    "The NMR phased array", Magnetic Resonance in Medicine 16(2):192-225, 1990.
    K. P. Pruessmann et al., "SENSE: sensitivity encoding for fast MRI",
    Magnetic Resonance in Medicine 42(5):952-962, 1999.
    """
    B = int(block)
    n = B * B
    H = B - 1 + max(OFFSETS)
    tile_means, tile_vars = [], []
    prods = np.zeros((2 * H + 1, 2 * H + 1))
    pairs = np.zeros_like(prods)
    n_pixels = 0
    for m, mask in zip(frames, masks, strict=True):
        y = np.abs(np.asarray(m, dtype=np.complex128 if np.iscomplexobj(m)
                              else np.float64)) ** 2
        whole = whole_tiles(y, mask, B)
        if whole is None or not whole.any():
            continue
        ny, nx = whole.shape[0] * B, whole.shape[1] * B
        t = y[:ny, :nx].reshape(ny // B, B, nx // B, B)
        sel = t.transpose(0, 2, 1, 3)[whole].reshape(-1, n)
        tile_means.append(sel.mean(axis=1))
        tile_vars.append(sel.var(axis=1, ddof=1))
        inside = np.repeat(np.repeat(whole, B, axis=0), B, axis=1)
        d = np.where(inside, y[:ny, :nx] - sel.mean(), 0.0)
        p, c = _lag_window(d, inside, H)
        prods += p
        pairs += c
        n_pixels += int(inside.sum())
    k = sum(mu.size for mu in tile_means)
    n_frames = sum(1 for mu in tile_means if mu.size > 1)
    if k < 8 or k - n_frames < 1:
        return None
    profiles = _noise_profiles(prods, pairs, B)
    if profiles is None:
        return None
    rho_y, rho_x = profiles
    share = 1.0 - np.abs(np.arange(-(B - 1), B)) / B
    K = float(np.clip(np.sum(rho_y * share) * np.sum(rho_x * share), 1.0, n / 2.0))
    kappa = float(max(np.sum(rho_y) * np.sum(rho_x), 1.0))
    sum_sq = float(max(np.sum(rho_y**2) * np.sum(rho_x**2), 1.0))
    mu = np.concatenate(tile_means)
    var = np.concatenate(tile_vars)
    between = sum(float(np.sum((t - t.mean()) ** 2)) for t in tile_means) * n / (k - n_frames)
    within = float(np.mean(var)) * (n - 1) / (n - K)
    if within <= 0:
        return None
    # squared coefficient of variation of the power (1 / a of its gamma law): E[s^2] over
    # E[m^2] = mu^2 (1 + cv2 K / n), solved for cv2; a trend cancels tile by tile
    r = float(np.sum(var) * (n - 1) / (n - K) / np.sum(mu * mu))
    cv2 = r / max(1.0 - r * K / n, 0.5)
    kurt_power = 6.0 * cv2
    kurt_mean = kurt_power * K / n
    df1 = (k - n_frames) / (1.0 + kurt_mean / 2.0)
    df2 = max(1.0, (n_pixels - k) / (sum_sq * (1.0 + kurt_power / 2.0)))
    f = between / (within * K)
    p_value = float(stats.f.sf(f, df1, df2))
    spread = float(np.percentile(mu, 90) / max(np.percentile(mu, 10), 1e-300))
    return NoiseEvenness(float(f), p_value, int(k), kappa, spread, K)


#: ``n Var(r)`` of the moment ratio ``r = E[x]^2 / E[x^2]`` (delta method): Rayleigh, half-normal
_RATIO_VAR = {"rayleigh": 0.0574, "halfnormal": 0.1148}
_RATIO_NULL = {"rayleigh": np.pi / 4.0, "halfnormal": 2.0 / np.pi}


def moment_ratio_z(x: np.ndarray, *, law: str = "rayleigh", kappa: float = 1.0) -> float:
    """z-score of the moment ratio ``E[x]^2 / E[x^2]`` against one sigma (negative: varying sigma).

    For one sigma the ratio is ``pi / 4`` (Rayleigh: the modulus of complex
    Gaussian noise) or ``2 / pi`` (half-normal: the modulus of real Gaussian
    noise); any mixture of sigmas lowers it (by Jensen's inequality). The
    standard error comes from the delta method with the law's first four
    moments (``n Var(r)`` = 0.0574 for Rayleigh, 0.1148 for half-normal,
    derived here from the closed-form moments of Gudbjartsson and Patz 1995),
    with ``n / kappa`` effective samples.

    References
    ----------
    Gudbjartsson and Patz, MRM 1995 (Rayleigh moments); the delta method is
    common practice, no source.
    """
    v = np.abs(np.asarray(x, dtype=np.float64)).ravel()
    v = v[np.isfinite(v)]
    if v.size < 16:
        return float("nan")
    m2 = float(np.mean(v * v))
    if m2 <= 0:
        return float("nan")
    r = float(v.mean()) ** 2 / m2
    se = np.sqrt(_RATIO_VAR[law] * max(kappa, 1.0) / v.size)
    return float((r - _RATIO_NULL[law]) / se)
