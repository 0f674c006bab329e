"""Magnitude only: were the complex values (the phase) discarded?

Reconstruction research needs complex images or k-space. A delivered image is
``complex`` (complex values with a non-trivial phase), ``magnitude`` (real and
non-negative: the phase was discarded) or ``real_signed`` (real values of both
signs, as phase-corrected real reconstructions leave: zero-mean Gaussian noise
in the air, about half of it negative).

Status: ``present`` for ``magnitude``; ``absent`` for ``complex``; ``absent`` for
``real_signed`` as well, because the phase was not simply discarded (it was
removed by a phase correction that keeps the sign), with the summary saying
that the data are nevertheless real-valued, not complex.

A complex array whose imaginary part is zero is judged by its real part.
K-space is judged by its images (centred inverse FFT): k-space synthesised
from magnitude images (the FFT of a real, non-negative image) is
``magnitude``, present; measured k-space gives complex images. Sparse
negative values (interpolation overshoot at edges of a resampled magnitude
image) do not make an image ``real_signed``: it takes a substantial share of
negative values, most of all in the air.

References
----------
.. [1] H. Gudbjartsson and S. Patz, "The Rician distribution of noisy MRI data",
   Magnetic Resonance in Medicine 34(6):910-914, 1995 (magnitude images: noise
   law of the discarded-phase image, non-negative values).
.. [2] E. M. Haacke, R. W. Brown, M. R. Thompson and R. Venkatesan, *Magnetic
   Resonance Imaging: Physical Principles and Sequence Design*, Wiley, 1999
   (real, phase-corrected images keep Gaussian noise of both signs; recalled
   from memory).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from app.io.volume import Volume
from app.traces.background import Background, background_of, image_blocks
from app.traces.base import Trace, inconclusive, register

TRACE_ID = "magnitude_only"
IMAG_ZERO = 1e-10
IMAG_ZERO_FFT = 1e-8
NEG_TOL_FFT = 1e-5
NEG_BACKGROUND_SHARE = 0.2
NEG_OVERALL_SHARE = 0.05


@dataclass
class ValueKind:
    """What the values of a Volume are.

    Attributes
    ----------
    domain : {"complex", "magnitude", "real_signed"}
    negative_fraction : float
        Share of negative (real part) values among the finite samples examined.
    negative_background_fraction : float or None
        The same in the background, where one was found.
    phase_spread : float or None
        Circular standard deviation (radians) of the phase over the object,
        complex data only.
    imag_energy_fraction : float or None
        ``sum(imag^2) / sum(|z|^2)``, complex dtypes only.
    """

    domain: str
    negative_fraction: float
    negative_background_fraction: float | None
    phase_spread: float | None
    imag_energy_fraction: float | None


def circular_spread(z: np.ndarray) -> float:
    """Circular standard deviation ``sqrt(-2 ln R)`` of the phases of ``z``.

    ``R`` is the mean resultant length of the unit phasors.

    References
    ----------
    K. V. Mardia and P. E. Jupp, *Directional Statistics*, Wiley, 2000, sec. 2.3.
    """
    z = np.asarray(z).ravel()
    z = z[np.abs(z) > 0]
    if z.size == 0:
        return 0.0
    R = float(np.abs(np.mean(z / np.abs(z))))
    return float(np.sqrt(-2.0 * np.log(max(R, 1e-12))))


def classify_values(volume: Volume, bg: Background) -> ValueKind:
    """Decide whether the values are complex, magnitudes or signed real values.

    Parameters
    ----------
    volume : Volume
    bg : Background
        The shared background (its frames are the ones examined).

    Returns
    -------
    ValueKind

    References
    ----------
    Gudbjartsson and Patz, MRM 1995 (magnitude images are non-negative with
    Rayleigh-distributed air).
    """
    frames = bg.frames
    kspace = volume.domain == "kspace"
    is_complex = kspace or volume.value_type == "complex"
    imag_zero = IMAG_ZERO_FFT if kspace else IMAG_ZERO
    imag_e = total_e = 0.0
    n_neg = n_fin = 0
    peak = 0.0
    obj_samples = []
    reals = []
    for _, block in image_blocks(volume, frames):
        block = np.asarray(block)
        fin = np.isfinite(block)
        if is_complex:
            imag_e += float(np.sum(np.where(fin, block.imag, 0.0).astype(np.float64) ** 2))
            total_e += float(np.sum(np.abs(np.where(fin, block, 0.0)).astype(np.float64) ** 2))
            obj_samples.append(_object_phasors(block))
        re = np.where(fin, block.real, 0.0)
        if fin.any():
            peak = max(peak, float(np.max(np.abs(re))))
        if kspace:
            reals.append(re)
        else:
            n_neg += int(np.sum(re < 0))
        n_fin += int(fin.sum())
    if n_fin == 0:
        return ValueKind("unknown", 0.0, None, None, None)
    # values from an inverse FFT carry round-off: negatives count beyond 1e-5 of the peak
    tol = NEG_TOL_FFT * peak if kspace else 0.0
    if kspace:
        n_neg = sum(int(np.sum(re < -tol)) for re in reals)
    imag_fraction = imag_e / total_e if is_complex and total_e > 0 else (0.0 if is_complex
                                                                        else None)
    neg_fraction = n_neg / n_fin
    neg_bg = None
    if bg.values is not None and bg.values.size and bg.usable:
        v = bg.values.real if np.iscomplexobj(bg.values) else bg.values
        v = np.asarray(v).ravel()
        v = v[np.isfinite(v)]
        neg_bg = float(np.mean(v < -tol)) if v.size else None
    spread = None
    if is_complex and imag_fraction is not None and imag_fraction > imag_zero:
        z = np.concatenate(obj_samples) if obj_samples else np.zeros(0, complex)
        spread = circular_spread(z)
        return ValueKind("complex", neg_fraction, neg_bg, spread, imag_fraction)
    signed = neg_fraction >= NEG_OVERALL_SHARE or (
        neg_bg is not None and neg_bg >= NEG_BACKGROUND_SHARE and neg_fraction >= 0.005)
    domain = "real_signed" if signed else "magnitude"
    return ValueKind(domain, neg_fraction, neg_bg, spread, imag_fraction)


def _object_phasors(block: np.ndarray) -> np.ndarray:
    """Complex samples above the median magnitude of each frame (the object), bounded."""
    out = []
    for b in block:
        z = b.reshape(-1, *b.shape[-2:])[0] if b.ndim == 3 else b
        z = z[np.isfinite(z)]
        mag = np.abs(z)
        sel = z[mag > np.median(mag)]
        out.append(sel[:: max(1, sel.size // 4096)])
    return np.concatenate(out) if out else np.zeros(0, complex)


def value_kind_of(volume: Volume, ctx: Any) -> ValueKind:
    """The shared :class:`ValueKind` of ``volume``, computed once per context."""
    return ctx.cached("value_kind", lambda: classify_values(volume, background_of(volume, ctx)))


def _r4(x: float | None) -> float | None:
    return None if x is None else float(f"{x:.4g}")


@register(TRACE_ID, version="1", order=30, default_estimates={"domain": None})
def analyse(volume: Volume, ctx: Any) -> Trace:
    """Say whether the values are complex, magnitudes or signed real values.

    References
    ----------
    Gudbjartsson and Patz, MRM 1995.
    """
    vk = value_kind_of(volume, ctx)
    if vk.domain == "unknown":
        return inconclusive(TRACE_ID, "No finite values to judge (every sample is NaN or "
                            "infinite).")
    kspace = volume.domain == "kspace"
    evidence = {
        "negative_fraction": _r4(vk.negative_fraction),
        "negative_background_fraction": _r4(vk.negative_background_fraction),
        "phase_spread": _r4(vk.phase_spread),
        "imag_energy_fraction": _r4(vk.imag_energy_fraction),
        "dtype": str(volume.dtype),
        "n_coils": volume.n_coils,
        "measured_on": "inverse FFT of the k-space" if kspace else "stored values",
    }
    estimates = {"domain": vk.domain}
    if vk.domain == "complex":
        coils = f" from {volume.n_coils} receive channels" if volume.n_coils > 1 else ""
        what = "Complex k-space whose images are complex" if kspace else "Complex values"
        summary = (f"{what}{coils} with a non-trivial phase (phase spread "
                   f"{vk.phase_spread:.2f} rad): the phase was kept.")
        return Trace(TRACE_ID, "absent", 0.97, summary, estimates, evidence)
    if kspace:
        signs = "of both signs" if vk.domain == "real_signed" else "non-negative"
        summary = (f"The k-space is the Fourier transform of real, {signs} images (imaginary "
                   f"energy {vk.imag_energy_fraction:.1e} of the total): it was synthesised "
                   "from processed images, not measured.")
        status = "present" if vk.domain == "magnitude" else "absent"
        return Trace(TRACE_ID, status, 0.95, summary, estimates, evidence)
    zero_imag = " (complex dtype with a zero imaginary part)" if vk.imag_energy_fraction \
        is not None else ""
    if vk.domain == "real_signed":
        bg_part = (f", {100 * vk.negative_background_fraction:.0f}% of the air"
                   if vk.negative_background_fraction is not None else "")
        summary = (f"Real values of both signs{zero_imag} ({100 * vk.negative_fraction:.1f}% "
                   f"negative{bg_part}), as a phase-corrected real reconstruction leaves: "
                   "the phase was not simply discarded, but the data are real-valued, not "
                   "complex.")
        return Trace(TRACE_ID, "absent", 0.8, summary, estimates, evidence)
    note = ""
    if vk.negative_fraction > 0:
        note = (f"; {100 * vk.negative_fraction:.2f}% slightly negative values, as "
                "interpolation overshoot leaves")
    summary = (f"Real, non-negative values{zero_imag}: magnitude images, the phase was "
               f"discarded{note}.")
    conf = 0.95 if vk.negative_fraction == 0 else 0.8
    return Trace(TRACE_ID, "present", conf, summary, estimates, evidence)
