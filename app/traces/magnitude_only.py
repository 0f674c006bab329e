"""Magnitude only: were the complex values (the phase) discarded?

Reconstruction research needs complex images or k-space. A delivered image is
``complex`` (complex values with a non-trivial phase), ``magnitude`` (real and
non-negative: the phase was discarded) or ``real_signed`` (real values of both
signs, as phase-corrected real reconstructions leave: zero-mean Gaussian noise
in the air, about half of it negative).

Status: ``present`` for ``magnitude`` and for ``real_signed``; ``absent`` for
``complex``. Any real-valued image has a Hermitian-symmetric Fourier transform
(``F(-k) = conj(F(k))``): whatever the sign of its values, half of its k-space
is a copy of the other half, so its FFT is synthetic by construction and not
raw k-space. The test is direct: the energy of the anti-Hermitian part of the
FFT equals, by Parseval's theorem, the energy of the image's imaginary part;
the decision statistic is the Hermitian share of the spectral energy,
``1 - imag_energy / total_energy`` (exactly 1 for real dtypes).

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

import numpy as np

from app.io.volume import Volume
from app.traces.base import Trace, inconclusive, register
from app.traces.rounding import round_sig
from app.traces.value_kind import ValueKind

TRACE_ID = "magnitude_only"


HERMITIAN_SHARE = 1.0 - 1e-8


def hermitian_share(value_kind: ValueKind) -> float:
    """Share of the spectral energy in the Hermitian part of the FFT (1 for real values).

    By Parseval's theorem the anti-Hermitian part of the FFT of ``z`` carries the
    energy of ``imag(z)``.

    References
    ----------
    R. N. Bracewell, *The Fourier Transform and Its Applications*, McGraw-Hill,
    2000 (symmetry of the transform of a real function; recalled from memory).
    """
    f = value_kind.imag_energy_fraction
    return 1.0 if f is None else float(1.0 - f)


def hermitian_log_ratio(value_kind: ValueKind) -> tuple[float, float]:
    """The decision statistic and its threshold, in decades (larger = real values).

    ``log10((1 - f) / max(f, f_round))`` for the imaginary (anti-Hermitian)
    energy fraction ``f`` and the storage rounding's energy fraction
    ``f_round``: how many decades the Hermitian part of the spectrum stands above
    the anti-Hermitian part, counted no further than the precision of the
    stored values allows. The threshold is ``-log10(max(f0, 10 f_round))`` with
    ``f0`` = 1e-8: an imaginary part within ten times the rounding energy is no
    evidence of a phase.

    References
    ----------
    Bracewell 2000 (Hermitian symmetry of real functions' transforms); W. F.
    Sheppard, Proc. London Math. Soc. 29:353-380, 1898 (rounding variance
    ``d^2 / 12``; citation details recalled from memory).
    """
    f = value_kind.imag_energy_fraction or 0.0
    floor = value_kind.rounding_energy_fraction or 1e-300
    value = float(np.log10(max(1.0 - f, 1e-300) / max(f, floor, 1e-300)))
    threshold = float(-np.log10(max(1.0 - HERMITIAN_SHARE, 10.0 * floor)))
    return value, threshold


def _decision(value: float, threshold: float) -> dict:
    return {"statistic": "log10_hermitian_to_antihermitian_energy", "value": round_sig(value),
            "threshold": round_sig(threshold), "false_alarm_rate": None, "p_value": None}


def _confidence(value: float, threshold: float, present: bool) -> float:
    """Logistic in the decades between the statistic and its threshold (one decade: 0.91).

    A model-based probability until a calibration map is fitted on development
    data (``bench.calibrate``).
    """
    margin = (value - threshold) if present else (threshold - value)
    return float(1.0 / (1.0 + 10.0 ** (-min(max(margin, -30.0), 30.0))))


@register(TRACE_ID, version="3", order=30, default_estimates={"domain": None})
def analyse(volume: Volume, *, value_kind: ValueKind) -> Trace:
    """Say whether the values are complex, magnitudes or signed real values.

    References
    ----------
    Gudbjartsson and Patz, MRM 1995.
    """
    vk = value_kind
    if vk.domain == "unknown":
        return inconclusive(TRACE_ID, "No finite values to judge (every sample is NaN or "
                            "infinite).")
    kspace = volume.domain == "kspace"
    evidence = {
        "negative_fraction": round_sig(vk.negative_fraction),
        "negative_background_fraction": round_sig(vk.negative_background_fraction),
        "phase_spread": round_sig(vk.phase_spread),
        "imag_energy_fraction": round_sig(vk.imag_energy_fraction),
        "dtype": str(volume.dtype),
        "n_coils": volume.n_coils,
        "measured_on": "inverse FFT of the k-space" if kspace else "stored values",
    }
    value, threshold = hermitian_log_ratio(vk)
    evidence["decision"] = _decision(value, threshold)
    evidence["rounding_energy_fraction"] = round_sig(vk.rounding_energy_fraction)
    conf = _confidence(value, threshold, present=vk.domain != "complex")
    estimates = {"domain": vk.domain}
    if vk.domain == "complex":
        coils = f" from {volume.n_coils} receive channels" if volume.n_coils > 1 else ""
        what = "Complex k-space whose images are complex" if kspace else "Complex values"
        summary = (f"{what}{coils} with a non-trivial phase (phase spread "
                   f"{vk.phase_spread:.2f} rad): the phase was kept.")
        return Trace(TRACE_ID, "absent", conf, summary, estimates, evidence)
    if kspace:
        signs = "of both signs" if vk.domain == "real_signed" else "non-negative"
        summary = (f"The k-space is the Fourier transform of real, {signs} images (imaginary "
                   f"energy {vk.imag_energy_fraction:.1e} of the total): it was synthesised "
                   "from processed images, not measured.")
        return Trace(TRACE_ID, "present", conf, summary, estimates, evidence)
    zero_imag = " (complex dtype with a zero imaginary part)" if vk.imag_energy_fraction \
        is not None else ""
    if vk.domain == "real_signed":
        bg_part = (f", {100 * vk.negative_background_fraction:.0f}% of the air"
                   if vk.negative_background_fraction is not None else "")
        summary = (f"Real values of both signs{zero_imag} ({100 * vk.negative_fraction:.1f}% "
                   f"negative{bg_part}): real-valued images (a phase-corrected real "
                   "part, or magnitudes shifted by a normalisation), whose FFT is Hermitian-"
                   "symmetric by construction: half of that k-space is a copy, not raw "
                   "data.")
        return Trace(TRACE_ID, "present", conf, summary, estimates, evidence)
    note = ""
    if vk.negative_fraction > 0:
        note = (f"; {100 * vk.negative_fraction:.2f}% slightly negative values, as "
                "interpolation overshoot leaves")
    summary = (f"Real, non-negative values{zero_imag}: magnitude images, the phase was "
               f"discarded{note}.")
    return Trace(TRACE_ID, "present", conf, summary, estimates, evidence)
