"""Coil combination: does the background noise follow the law root-sum-of-squares leaves?

The air of a magnitude image combined from ``L`` receive channels by root-sum-
of-squares follows a central chi law with ``2L`` degrees of freedom (the
non-central chi law of the object, with zero signal); one channel gives the
Rayleigh law (``L = 1``); complex and phase-corrected real images keep Gaussian
noise. The effective ``L`` and ``sigma`` come from the first two background
moments (method of moments); each candidate law is tested against the samples
with the Kolmogorov-Smirnov statistic and the law is picked by that test.
Correlated channels (or channels of unequal noise) give an effective ``L``
below the number of coils.

Estimate ``combination``: ``rss`` for the non-central chi law with ``L >= 2``,
``single`` for the Rayleigh law of one delivered magnitude image (one channel,
or a combination that leaves single-channel statistics; a spatially varying
sigma, as adaptive or Roemer weights leave, is not yet tested), ``unknown``
otherwise (separate channels, complex or signed values, no law).

Status: ``present`` for the non-central chi law with ``L >= 2`` (estimated
``L >= 1.5``), ``absent`` for the Gaussian and Rayleigh laws, ``inconclusive``
when the background is missing, masked, noise-free, quantised more coarsely
than the noise, or fits no law. Complex multi-coil data: Gaussian, absent.

References
----------
.. [1] H. Gudbjartsson and S. Patz, "The Rician distribution of noisy MRI data",
   Magnetic Resonance in Medicine 34(6):910-914, 1995.
.. [2] C. D. Constantinides, E. Atalar and E. R. McVeigh, "Signal-to-noise
   measurements in magnitude images from NMR phased arrays", Magnetic Resonance
   in Medicine 38(5):852-857, 1997.
.. [3] S. Aja-Fernandez and A. Tristan-Vega, "Influence of noise correlation in
   multiple-coil statistical models with sum of squares reconstruction",
   Magnetic Resonance in Medicine 67(2):580-585, 2012 (effective L and sigma of
   correlated channels; recalled from memory).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import ndimage, stats

from app.io.volume import Volume
from app.traces import noise_laws as nl
from app.traces.background import Background, constant_share, image_blocks, lattice_step
from app.traces.base import Trace, inconclusive, register
from app.traces.rounding import round_sig
from app.traces.value_kind import ValueKind

TRACE_ID = "coil_combination"
KS_SAMPLES = 2000
# Correlated or unequal channels follow the chi law only approximately (KS
# distances up to about 0.07 at 2000 samples were seen), so acceptance is loose;
# the choice between the laws rests on the estimated L.
KS_ACCEPT = 0.08
L_SPLIT = 1.5
TAIL_RATIO = 3.0
CONTAMINATION_RATIO = 1.15
CONTAMINATION_SKEW = 0.1
L_GAUSSIAN = 64.0
NOISE_FREE = 1e-5
MIN_SIGMA_STEPS = 1.0
_DEFAULTS = {"noise_model": "unknown", "effective_channels": None, "sigma": None,
             "combination": "unknown"}


def _subsample(x: np.ndarray, n: int, seed: int = 7) -> np.ndarray:
    if x.size <= n:
        return x
    rng = np.random.default_rng(seed)
    return x[rng.choice(x.size, n, replace=False)]


def stored_step(bg: Background, scale: float) -> float:
    """Lattice step of the background values in physical units (0 for continuous data).

    Stored values on a lattice (integers, or floats on few levels) are spaced
    by ``|scale|`` times the lattice step. Common practice, no source.
    """
    s = bg.stored
    if s is None or np.iscomplexobj(s) or s.size < 2:
        return 0.0
    step = lattice_step(s)
    return abs(scale) * step if step else 0.0


def _histogram(x: np.ndarray, hi: float, lo: float = 0.0, bins: int = 48) -> dict:
    counts, edges = np.histogram(x, bins=bins, range=(lo, hi), density=True)
    return {"edges": round_sig(edges), "counts": round_sig(counts)}


def fit_magnitude_background(x: np.ndarray, *, step: float = 0.0) -> dict[str, Any]:
    """Fit the Gaussian, Rayleigh and central chi laws to background magnitudes.

    Parameters
    ----------
    x : ndarray
        Background magnitudes (physical units).
    step : float
        Lattice step of the stored values (0 for continuous data): the second
        moment is corrected for rounding (Sheppard's correction, ``step^2 / 12``)
        and the tested samples are dithered over their rounding cell.

    Returns
    -------
    dict
        ``chosen`` (law name or ``"unknown"``), ``fits`` (law -> LawFit),
        ``channels`` (effective L), ``sigma``, ``m1``, ``m2``, ``tested`` (samples).

    References
    ----------
    Gudbjartsson and Patz, MRM 1995 (Rayleigh); Constantinides, Atalar and
    McVeigh, MRM 1997 (central chi with 2L degrees of freedom); W. F. Sheppard,
    Proc. London Math. Soc. 29:353-380, 1898 (moment correction for grouping;
    citation details recalled from memory).
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    m1 = float(x.mean())
    m2 = float(np.mean(x * x)) - step * step / 12.0
    tested = _subsample(x, KS_SAMPLES)
    if step > 0:
        tested = np.abs(nl.dither(tested, step, np.random.default_rng(11)))
    fits = {
        "gaussian": nl.fit_gaussian(tested),
        "rayleigh": nl.fit_rayleigh(tested),
        "noncentral_chi": nl.fit_central_chi(tested, m1=m1, m2=m2),
    }
    estimator = "moments"
    chi = fits["noncentral_chi"]
    spread = np.abs(nl.dither(x, step, np.random.default_rng(12))) if step > 0 else x
    Lq, sq = nl.channels_from_quantiles(spread)
    excess_skew = float(stats.skew(x)) - nl.chi_skewness(chi.channels) if chi.channels else 0.0
    if (chi.channels is not None and np.isfinite(Lq) and Lq > CONTAMINATION_RATIO * chi.channels
            and excess_skew > CONTAMINATION_SKEW):
        # an upper tail heavier than the law allows (ringing, ghosts): the lower
        # quantiles hold the noise law
        fits["noncentral_chi"] = nl.fit_central_chi_params(tested, Lq, sq)
        chi = fits["noncentral_chi"]
        estimator = "quantiles"
    fits["rayleigh"] = fits["rayleigh"] if estimator == "moments" else nl.fit_rayleigh(tested)
    L = chi.channels if chi.channels is not None else float("nan")
    ok = {k: f.statistic <= KS_ACCEPT for k, f in fits.items()}
    chosen = "unknown"
    if np.isfinite(L) and L >= L_SPLIT and ok["noncentral_chi"] and L <= L_GAUSSIAN:
        chosen = "noncentral_chi"
    elif np.isfinite(L) and L < L_SPLIT and ok["rayleigh"]:
        chosen = "rayleigh"
    elif np.isfinite(L) and L > L_GAUSSIAN and ok["gaussian"]:
        chosen = "gaussian"
    tail = float("nan")
    if chosen in ("noncentral_chi", "rayleigh"):
        tail = lower_tail_ratio(spread, fits[chosen])
        if tail > TAIL_RATIO:
            chosen = "unknown"
    sigma = {"noncentral_chi": chi.sigma, "rayleigh": fits["rayleigh"].sigma,
             "gaussian": fits["gaussian"].sigma}.get(chosen)
    return {"chosen": chosen, "fits": fits, "channels": L, "sigma": sigma, "m1": m1,
            "m2": m2, "tested": tested, "estimator": estimator,
            "channels_quantiles": Lq, "excess_skewness": excess_skew, "lower_tail_ratio": tail}


def lower_tail_ratio(x: np.ndarray, fit: nl.LawFit) -> float:
    """How much more of the fitted law lies below the sample's low quantile than should.

    ``F(q_p) / p`` for the sample quantile ``q_p`` at ``p = max(0.005, 20 / n)``:
    about 1 when the law holds down to zero. A pure noise floor reaches zero
    (the chi laws have support from 0); a background lifted by a constant offset
    holds too few low values, so the ratio grows (about 5 for Rayleigh noise on
    an offset). Ringing and ghosts add to the upper tail, not here.

    References
    ----------
    Gudbjartsson and Patz, MRM 1995; Constantinides, Atalar and McVeigh, MRM
    1997 (support of the background laws); the check itself is common practice,
    no source.
    """
    x = np.asarray(x, dtype=np.float64).ravel()
    if x.size == 0 or fit.sigma <= 0:
        return float("nan")
    p = max(0.005, 20.0 / x.size)
    q = float(np.quantile(x, p))
    return float(fit.frozen().cdf(q) / p)


def _evidence_from_fits(x: np.ndarray, res: dict, lo: float, hi: float,
                        n_background: int) -> dict[str, Any]:
    dens_x = np.linspace(lo, hi, 96)
    densities: dict[str, Any] = {"gaussian": None, "rayleigh": None, "noncentral_chi": None}
    stats_: dict[str, Any] = {}
    for law, f in res["fits"].items():
        if f.sigma > 0:
            densities[law] = round_sig(f.frozen().pdf(dens_x))
        stats_[law] = {"statistic": round_sig(f.statistic), "p_value": round_sig(f.p_value)}
    chosen = res["chosen"]
    return {
        "histogram": _histogram(x, hi, lo),
        "density_x": round_sig(dens_x),
        "densities": densities,
        "chosen": chosen,
        "effective_channels": round_sig(res["channels"]) if chosen == "noncentral_chi" else (
            1.0 if chosen == "rayleigh" else None),
        "sigma": round_sig(res["sigma"]),
        "statistics": stats_,
        "n_background": int(n_background),
        "ks_accept": KS_ACCEPT,
    }


FALSE_ALARM = 1e-3
#: above this many effective channels the estimate is not a plausible coil count
MAX_PLAUSIBLE_CHANNELS = 32.0
TEST_FRAMES = 4
#: the tile test's own p-value must stay below this for a linear call on magnitudes
TILES_ALSO = 0.05
#: whole background tiles needed for a linear call
MIN_TILES = 16


def _decision_record(statistic: str, p: float | None, value: float | None = None,
                     threshold: float | None = None) -> dict[str, Any]:
    """``-log10`` of a p-value against ``-log10`` of the false-alarm rate (larger = present).

    One statistic for every branch: the p-value of the null "no combination"
    (one channel, one sigma) against the alternative the branch tests (the moment
    ratio above Rayleigh's for root-sum-of-squares, a varying sigma for linear
    weights).
    """
    if value is None and p is not None:
        value = -np.log10(max(p, 1e-300))
    return {"statistic": statistic, "value": round_sig(value),
            "threshold": round_sig(threshold if threshold is not None else -np.log10(FALSE_ALARM)),
            "false_alarm_rate": FALSE_ALARM, "p_value": round_sig(p)}


#: confidence of an absent call that rests on the data's structure (separate channels
#: delivered side by side), not on a noise test (common practice, no source)
SEPARATE_CONFIDENCE = 0.99


def _separate_record(n_coils: int) -> dict[str, Any]:
    """Decision record of separate channels delivered: a fact of the data's structure.

    Its statistic differs from the noise tests' so that the calibration map of
    ``minus_log10_p_no_combination`` never meets an absent call that did not rest on
    it (the noise tests are still run and kept in the evidence).
    """
    return {"statistic": "images combined from the delivered channels", "value": 0.0,
            "threshold": 1.0, "false_alarm_rate": None, "p_value": None,
            "separate_channels": int(n_coils)}


def _confidence(status: str, p: float | None) -> float:
    """The analyser's own probability that its status is right, from the decision's p-value.

    Present: ``1 - p`` (the null of no combination rejected at ``p``). Absent:
    ``1 - alpha / p`` (how far the data stand from the rejection region, in
    units of the false-alarm rate ``alpha``); a calibration map fitted on
    development data replaces either when one exists.
    """
    if p is None or not np.isfinite(p):
        return 0.5
    if status == "present":
        return float(np.clip(1.0 - p, 0.5, 0.999))
    return float(np.clip(1.0 - FALSE_ALARM / max(p, 1e-300), 0.5, 0.999))


def _test_frames(volume: Volume, bg: Background, channel: int | None = None
                 ) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Up to :data:`TEST_FRAMES` analysed frames (image domain) with their background masks."""
    idx = np.asarray(bg.frames)[:TEST_FRAMES]
    frames: list[np.ndarray] = []
    for _, block in image_blocks(volume, idx):
        for b in np.asarray(block):
            frames.append(b[channel if channel is not None else 0] if b.ndim == 3 else b)
    masks = [bg.masks[i] for i in range(min(len(frames), len(bg.masks)))]
    return frames[:len(masks)], masks


def pair_difference_frames(frames: list[np.ndarray], masks: list[np.ndarray]
                           ) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """``(a - b) / sqrt(2)`` of non-overlapping horizontal pixel pairs, with their masks
    (a pair counts where both pixels lie in the mask); frames half as wide.

    For Gaussian noise (complex or signed real values) the difference of two samples
    with one sigma has that sigma again, so these values follow the same law as the
    noise itself (Rayleigh for complex, half-normal for real, in modulus), while a
    smooth signal left in the background (the object's tails, stray signal) cancels;
    a sigma that varies across the image still varies in them. Non-overlapping pairs
    keep white noise's differences independent (common practice, no source).
    """
    diffs = [(np.asarray(f)[:, 0:-1:2] - np.asarray(f)[:, 1::2]) / np.sqrt(2.0)
             for f in frames]
    dmasks = [np.asarray(m, bool)[:, 0:-1:2] & np.asarray(m, bool)[:, 1::2] for m in masks]
    return diffs, dmasks


def _masked_moduli(frames: list[np.ndarray], masks: list[np.ndarray]) -> np.ndarray:
    return np.concatenate([np.abs(np.asarray(f))[np.asarray(m, bool)].ravel()
                           for f, m in zip(frames, masks, strict=True)]) if frames \
        else np.zeros(0)


def pair_differences(frames: list[np.ndarray], masks: list[np.ndarray]) -> np.ndarray:
    """``|a - b| / sqrt(2)`` over the pairs of :func:`pair_difference_frames`, pooled."""
    return _masked_moduli(*pair_difference_frames(frames, masks))


#: a pixel belongs to the object where the 5 x 5 box mean exceeds this multiple of the
#: background's median magnitude (common practice, no source)
OBJECT_LEVEL = 4.0


def object_free_corners(frames: list[np.ndarray], masks: list[np.ndarray]
                        ) -> list[np.ndarray]:
    """The background pixels whose row and column both miss the object.

    Truncated k-space spreads every edge of the object as a 2D sinc, separable
    along rows and columns: on a row or a column through the object the ringing
    decays only as ``1/d``, in the corners as ``1/(d_x d_y)``. Magnitude images
    of zero-filled (interpolated) data show that ringing far into the air, where
    it passes for a varying noise sigma; the corners hold the least of it (the
    Gibbs phenomenon of a truncated Fourier series: common practice, no source).
    """
    out = []
    for f, m in zip(frames, masks, strict=True):
        f = np.abs(np.asarray(f, dtype=np.float64))
        m = np.asarray(m, bool)
        level = float(np.median(f[m])) if m.any() else 0.0
        obj = ndimage.uniform_filter(f, 5) > OBJECT_LEVEL * level
        obj = ndimage.binary_opening(obj)
        out.append(m & ~obj.any(axis=1)[:, None] & ~obj.any(axis=0)[None, :])
    return out


def linear_combination_test(frames: list[np.ndarray], masks: list[np.ndarray], *,
                            law: str, gaussian_noise: bool = False) -> dict[str, Any]:
    """Test the background for a sigma that varies across the image (linear coil weights).

    Two views of one effect, combined by Fisher's method: the analysis of
    variance of the tiles' noise power (:func:`noise_laws.noise_evenness`) and
    the deficit of the moment ratio below the one-sigma law
    (:func:`noise_laws.moment_ratio_z`, one-sided). With ``gaussian_noise`` (complex
    or signed real values) the moment ratio is taken over pair differences
    (:func:`pair_differences`), which stray smooth signal in the air cannot lower.

    Returns
    -------
    dict
        ``p_value`` (of one common sigma), ``p_evenness``, ``p_ratio``,
        ``ratio_z``, ``kappa``, ``spread``, ``blocks``.

    References
    ----------
    Walsh et al., MRM 2000; Roemer et al., MRM 1990; Pruessmann et al., MRM 1999
    (the noise of such combinations varies with the weights); R. A. Fisher,
    *Statistical Methods for Research Workers*, 1925 (combined p-values;
    scipy.stats.combine_pvalues).
    """
    if gaussian_noise:
        # complex or signed real values: both views are taken on pair differences, in
        # which a smooth signal left in the background cancels
        frames, masks = pair_difference_frames(frames, masks)
    ev = nl.noise_evenness(frames, masks)
    kappa = ev.kappa if ev is not None else 1.0
    z = nl.moment_ratio_z(_masked_moduli(frames, masks), law=law, kappa=kappa)
    p_ratio = float(stats.norm.cdf(z)) if np.isfinite(z) else 1.0
    p_even = ev.p_value if ev is not None else 1.0
    p = float(stats.combine_pvalues([max(p_ratio, 1e-300), max(p_even, 1e-300)],
                                    method="fisher").pvalue)
    return {"p_value": p, "p_evenness": p_even, "p_ratio": p_ratio,
            "ratio_z": z, "kappa": kappa, "spread": ev.spread if ev is not None else None,
            "blocks": ev.blocks if ev is not None else 0}


def _linear_evidence(lin: dict[str, Any]) -> dict[str, Any]:
    return {"noise_evenness": {"tiles_from": lin.get("tiles_from", "whole background"),
                               "p_value": round_sig(lin["p_value"]),
                               "p_tiles": round_sig(lin["p_evenness"]),
                               "p_moment_ratio": round_sig(lin["p_ratio"]),
                               "moment_ratio_z": round_sig(lin["ratio_z"]),
                               "tile_power_spread_90_10": round_sig(lin["spread"]),
                               "spatial_correlation_kappa": round_sig(lin["kappa"]),
                               "tiles": int(lin["blocks"])}}


def _gaussian_trace(volume: Volume, bg: Background, kind: str) -> Trace:
    """Complex or signed real data: Gaussian noise, no root-sum-of-squares.

    Such values cannot come out of a root-sum-of-squares (which is real and
    non-negative). Separate channels delivered side by side are ``absent``
    (nothing was combined). One complex or signed real image may still be a
    linear combination of channels (adaptive, Roemer or SENSE weights, and the
    phase-corrected real part of one): its noise sigma then varies across the
    image, which :func:`linear_combination_test` measures; ``present`` with
    ``combination: linear`` when it does, ``absent`` with ``single`` (one
    channel's statistics) when the noise is even.
    """
    what = ("complex values" if kind == "complex" else "real values of both signs")
    separate = volume.n_coils > 1
    coils = f" from {volume.n_coils} separate receive channels" if separate else ""
    evidence: dict[str, Any] = {"chosen": "gaussian", "effective_channels": None,
                                "sigma": None, "n_background": int(bg.n_background),
                                "n_coils": volume.n_coils, "separate_channels": separate}
    estimates = {"noise_model": "gaussian", "effective_channels": None, "sigma": None,
                 "combination": "unknown"}
    comps = np.zeros(0)
    if bg.usable and bg.values is not None:
        v = np.asarray(bg.values).ravel()
        comps = np.concatenate([v.real, v.imag]) if np.iscomplexobj(v) else v.real
        comps = comps[np.isfinite(comps)].astype(np.float64)
    rms = float(np.sqrt(np.mean(comps**2))) if comps.size else 0.0
    why = None
    if not bg.usable:
        why = bg.reason
    elif constant_share(bg).flattened:
        why = "the background holds one constant value (masked, flattened or noise-free)"
    elif rms <= NOISE_FREE * max(bg.signal_peak, 1e-30):
        why = "the background is below 1e-5 of the signal peak (noise-free data)"
    if why is not None:
        estimates["noise_model"] = evidence["chosen"] = "unknown"
        if separate:
            evidence["decision"] = _separate_record(volume.n_coils)
            summary = (f"The data hold {what}{coils}: nothing was combined; the noise law was "
                       f"not measured: {why}.")
            return Trace(TRACE_ID, "absent", SEPARATE_CONFIDENCE, summary, estimates, evidence)
        return inconclusive(TRACE_ID, f"One image of {what}: whether it combines several "
                            f"channels with linear weights is not measurable: {why}.",
                            n_background=int(bg.n_background))
    tested = _subsample(comps, KS_SAMPLES)
    fit = nl.fit_gaussian(tested, zero_mean=kind == "complex")
    lim = float(np.percentile(np.abs(comps), 99.5)) or 1.0
    dens_x = np.linspace(-lim, lim, 96)
    estimates["sigma"] = round_sig(fit.sigma)
    evidence.update({
        "histogram": _histogram(comps, lim, -lim),
        "density_x": round_sig(dens_x),
        "densities": {"gaussian": round_sig(fit.frozen().pdf(dens_x)), "rayleigh": None,
                      "noncentral_chi": None},
        "sigma": round_sig(fit.sigma),
        "statistics": {"gaussian": {"statistic": round_sig(fit.statistic),
                                    "p_value": round_sig(fit.p_value)}},
    })
    law = "rayleigh" if kind == "complex" else "halfnormal"
    frames, masks = _test_frames(volume, bg)
    lin = linear_combination_test(frames, masks, law=law, gaussian_noise=True)
    evidence.update(_linear_evidence(lin))
    p = lin["p_value"]
    evidence["decision"] = (_separate_record(volume.n_coils) if separate else
                            _decision_record("minus_log10_p_no_combination", p))
    where = " of the inverse FFT" if volume.domain == "kspace" else ""
    sig = f"background{where} sigma {fit.sigma:.4g} (KS distance {fit.statistic:.3f})"
    if separate:
        summary = (f"The data hold {what}{coils}: nothing was combined (each channel is "
                   f"delivered on its own; {sig}).")
        return Trace(TRACE_ID, "absent", SEPARATE_CONFIDENCE, summary, estimates, evidence)
    if p < FALSE_ALARM:
        estimates["combination"] = "linear"
        summary = (f"One image of {what} whose Gaussian noise varies across the image (tile "
                   f"noise power spread {lin['spread'] or float('nan'):.2f}, p = {p:.2g} for one "
                   f"common sigma; {sig}): a linear combination of receive channels (adaptive, "
                   "Roemer or SENSE weights), not one channel.")
        return Trace(TRACE_ID, "present", _confidence("present", p), summary, estimates,
                     evidence)
    estimates["combination"] = "single"
    summary = (f"One image of {what} with even Gaussian noise (p = {p:.2g} for one common "
               f"sigma; {sig}): the statistics of one channel, no combination visible.")
    return Trace(TRACE_ID, "absent", _confidence("absent", p), summary, estimates, evidence)


@register(TRACE_ID, version="2", order=40, default_estimates=dict(_DEFAULTS))
def analyse(volume: Volume, *, background: Background,
            value_kind: ValueKind) -> Trace:
    """Fit the background noise laws and name the combination of the channels.

    ``rss`` (central chi law, ``L >= 1.5``), ``linear`` (one image whose noise
    sigma varies across it: adaptive, Roemer or SENSE weights), ``single`` (one
    channel's even noise: absent), or separate channels delivered (absent).

    References
    ----------
    Gudbjartsson and Patz, MRM 1995; Constantinides, Atalar and McVeigh, MRM 1997;
    Walsh et al., MRM 2000; Roemer et al., MRM 1990; Pruessmann et al., MRM 1999.
    """
    bg = background
    kind = value_kind.domain
    if kind in ("complex", "real_signed"):
        return _gaussian_trace(volume, bg, kind)
    if not bg.usable:
        return inconclusive(TRACE_ID, f"No noise law measured: {bg.reason}.",
                            n_background=int(bg.n_background))
    const = constant_share(bg)
    if const.flattened:
        kind = ("masked, thresholded or noise-free background" if const.masked else
                "a flattened background, as compression or coarse quantisation leaves")
        return inconclusive(
            TRACE_ID,
            f"No noise law measured: {100 * const.share:.0f}% of the background holds the one "
            f"value {const.value:.4g} ({kind}).",
            n_background=int(bg.n_background), constant_value=const.value,
            constant_share=const.share)
    per_channel = volume.coil_axis is not None and bg.values is not None
    # uncombined magnitude channels: each channel's own law is what was delivered
    x = np.abs(np.asarray(bg.values)).ravel() if per_channel else bg.magnitude
    x = x[np.isfinite(x)]
    rms = float(np.sqrt(np.mean(x * x))) if x.size else 0.0
    if rms <= NOISE_FREE * max(bg.signal_peak, 1e-30):
        return inconclusive(
            TRACE_ID,
            f"No noise law measured: the background is {rms:.3g}, below {NOISE_FREE:g} of the "
            "signal peak (noise-free or synthetic data).",
            n_background=int(bg.n_background))
    step = stored_step(bg, volume.scale)
    res = fit_magnitude_background(x, step=step)
    sigma_guess = res["sigma"] if res["sigma"] else rms / np.sqrt(2.0)
    if step > 0 and sigma_guess < MIN_SIGMA_STEPS * step:
        return inconclusive(
            TRACE_ID,
            f"No noise law measured: the background noise (sigma about {sigma_guess:.3g}) is "
            f"below the quantisation step {step:.3g} of the stored values.",
            n_background=int(bg.n_background), quantisation_step=step)
    hi = float(np.percentile(x, 99.5)) * 1.15 or 1.0
    evidence = _evidence_from_fits(x, res, 0.0, hi, bg.n_background)
    evidence.update({"background_method": bg.method, "quantisation_step": round_sig(step),
                     "excluded_blocks": bg.excluded_blocks,
                     "per_channel": per_channel, "n_coils": volume.n_coils,
                     "estimator": res["estimator"],
                     "channels_quantiles": round_sig(res["channels_quantiles"]),
                     "excess_skewness": round_sig(res["excess_skewness"]),
                     "lower_tail_ratio": round_sig(res["lower_tail_ratio"])})
    chosen = res["chosen"]
    L = res["channels"]
    frames, masks = _test_frames(volume, bg)
    mags = [np.abs(f) for f in frames]
    corners = object_free_corners(mags, masks)
    # the corners' test is run only where they hold enough tiles; it is also set aside
    # when it could not use them (too small a background to measure the correlation)
    lin = (linear_combination_test(mags, corners, law="rayleigh")
           if nl.count_whole_tiles(mags, corners) >= MIN_TILES else None)
    if lin is not None and lin["blocks"] >= MIN_TILES:
        lin["tiles_from"] = "object-free corners"
    else:
        lin = linear_combination_test(mags, masks, law="rayleigh")
        lin["tiles_from"] = "whole background"
    evidence.update(_linear_evidence(lin))
    kappa = lin["kappa"]
    z_ratio = nl.moment_ratio_z(x, law="rayleigh", kappa=kappa)
    # evidence of more than one channel: the moment ratio above Rayleigh's pi / 4
    p_rss = float(stats.norm.sf(z_ratio)) if np.isfinite(z_ratio) else 1.0
    tail = res["lower_tail_ratio"]
    offset = np.isfinite(tail) and tail > TAIL_RATIO
    if per_channel:
        estimates = {"noise_model": chosen, "sigma": round_sig(res["sigma"]),
                     "effective_channels": None, "combination": "unknown"}
        evidence["decision"] = _separate_record(volume.n_coils)
        summary = (f"The data hold {volume.n_coils} separate magnitude channels, not combined "
                   f"(background law of one channel: {chosen}).")
        return Trace(TRACE_ID, "absent", SEPARATE_CONFIDENCE, summary, estimates, evidence)
    if chosen == "noncentral_chi":
        eff = evidence["effective_channels"]
        capped = eff is not None and eff > MAX_PLAUSIBLE_CHANNELS
        if capped:
            # an even, uninterpolated noise floor is needed for a channel count
            evidence["effective_channels"] = None
            evidence["channels_withheld"] = (f"{eff:.0f} is above a plausible coil count "
                                             "(interpolated or filtered noise?)")
        estimates = {"noise_model": chosen, "sigma": round_sig(res["sigma"]),
                     "effective_channels": evidence["effective_channels"],
                     "combination": "rss"}
        evidence["decision"] = _decision_record("minus_log10_p_no_combination", p_rss)
        stat = res["fits"][chosen]
        robust = ("; from the lower quantiles, the upper tail carries stray signal"
                  if res["estimator"] == "quantiles" else "")
        ch = (f"effective L = {L:.1f} channels" if evidence["effective_channels"] is not None
              else f"channel count withheld: {evidence['channels_withheld']}")
        summary = (f"The background follows a central chi law with 2L = {2 * L:.1f} degrees "
                   f"of freedom ({ch}, sigma {res['sigma']:.4g}; KS distance "
                   f"{stat.statistic:.3f}{robust}): a root-sum-of-squares combination of "
                   "several receive channels.")
        return Trace(TRACE_ID, "present", _confidence("present", p_rss), summary, estimates,
                     evidence)
    # the moment ratio alone also drops when tissue reaches into the air: the tiles must
    # show the varying sigma too (p below TILES_ALSO, on at least MIN_TILES tiles). The
    # decision p-value states that rule: below the false-alarm rate exactly when both hold.
    p_tiles = lin["p_evenness"] if lin["blocks"] >= MIN_TILES else 1.0
    p_lin = max(lin["p_value"], p_tiles * FALSE_ALARM / TILES_ALSO)
    if not offset and L < L_SPLIT and p_lin < FALSE_ALARM:
        estimates = {"noise_model": "rayleigh", "sigma": None, "effective_channels": None,
                     "combination": "linear"}
        evidence["decision"] = _decision_record("minus_log10_p_no_combination", p_lin)
        summary = (f"The background is Rayleigh-like (moment estimate L = {L:.2f}) but its "
                   f"sigma varies across the image (tile noise power spread "
                   f"{lin['spread'] or float('nan'):.2f}, p = {p_lin:.2g} for one common sigma): "
                   "magnitude of a linear combination of receive channels (adaptive, Roemer or "
                   "SENSE weights).")
        return Trace(TRACE_ID, "present", _confidence("present", p_lin), summary, estimates,
                     evidence)
    combination = "single" if chosen == "rayleigh" else "unknown"
    estimates = {"noise_model": chosen, "sigma": round_sig(res["sigma"]),
                 "effective_channels": evidence["effective_channels"],
                 "combination": combination}
    if chosen == "unknown":
        evidence["decision"] = _decision_record("minus_log10_p_no_combination", p_lin)
        if offset:
            why = (f"the air holds {tail:.1f} times too few values near zero for a pure noise "
                   "floor (an offset added to the background?)")
        else:
            best = min(res["fits"].values(), key=lambda f: f.statistic)
            why = (f"best: {best.law}, KS distance {best.statistic:.3f} > {KS_ACCEPT}; "
                   f"estimated L = {L:.2g}")
        return Trace(TRACE_ID, "inconclusive", 0.0,
                     f"The background fits no candidate noise law ({why}).", estimates,
                     evidence)
    # an absent call rests on the linear test (the chi law with L >= 1.5 was not chosen)
    p_any = p_lin
    evidence["decision"] = _decision_record("minus_log10_p_no_combination", p_any)
    stat = res["fits"][chosen]
    if chosen == "rayleigh":
        summary = (f"The background follows the Rayleigh law with one sigma throughout (sigma "
                   f"{res['sigma']:.4g}; moment estimate L = {L:.2f}; KS distance "
                   f"{stat.statistic:.3f}; p = {p_lin:.2g} for one common sigma): the magnitude "
                   "of one channel (or an equivalent single-channel combination), not a "
                   "root-sum-of-squares of several.")
        return Trace(TRACE_ID, "absent", _confidence("absent", p_any), summary, estimates,
                     evidence)
    summary = (f"The background is Gaussian around {res['m1']:.4g} (sigma {res['sigma']:.4g}; "
               f"KS distance {stat.statistic:.3f}): an offset background, no chi law.")
    return Trace(TRACE_ID, "absent", _confidence("absent", p_any), summary, estimates, evidence)
