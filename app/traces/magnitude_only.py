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

from app.io.volume import Volume
from app.traces.base import Trace, inconclusive, register
from app.traces.value_kind import ValueKind

TRACE_ID = "magnitude_only"


def _r4(x: float | None) -> float | None:
    return None if x is None else float(f"{x:.4g}")


@register(TRACE_ID, version="1", order=30, default_estimates={"domain": None})
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
