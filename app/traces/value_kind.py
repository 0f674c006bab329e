"""The value kind of a Volume: complex, magnitude or signed real values (a shared step).

Computed once per dataset by the analysis plan (:mod:`app.traces.plan`) and handed
to the analysers that declare ``value_kind`` in their signature.

References
----------
.. [1] H. Gudbjartsson and S. Patz, "The Rician distribution of noisy MRI data",
   Magnetic Resonance in Medicine 34(6):910-914, 1995.
.. [2] K. V. Mardia and P. E. Jupp, *Directional Statistics*, Wiley, 2000, sec. 2.3.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from app.io.volume import Volume
from app.traces.background import Background, image_blocks

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
    rounding_energy_fraction : float or None
        The energy of the storage rounding over the signal energy: ``(d^2 / 12) /
        mean(|z|^2)`` for a rounding step ``d`` (the scale of integer-stored
        values, ``eps * rms`` for floats). An imaginary part below it cannot be
        told from zero.
    """

    domain: str
    negative_fraction: float
    negative_background_fraction: float | None
    phase_spread: float | None
    imag_energy_fraction: float | None
    rounding_energy_fraction: float | None = None


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
    # rounding can leave R a hair above 1 when every phase is the same
    return float(np.sqrt(-2.0 * np.log(min(max(R, 1e-12), 1.0))))


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
    power = 0.0
    for _, block in image_blocks(volume, frames):
        block = np.asarray(block)
        fin = np.isfinite(block)
        power += float(np.sum(np.abs(np.where(fin, block, 0.0)).astype(np.float64) ** 2))
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
    rounding = _rounding_fraction(volume, power / n_fin)
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
        return ValueKind("complex", neg_fraction, neg_bg, spread, imag_fraction, rounding)
    signed = neg_fraction >= NEG_OVERALL_SHARE or (
        neg_bg is not None and neg_bg >= NEG_BACKGROUND_SHARE and neg_fraction >= 0.005)
    domain = "real_signed" if signed else "magnitude"
    return ValueKind(domain, neg_fraction, neg_bg, spread, imag_fraction, rounding)


def _rounding_fraction(volume: Volume, mean_power: float) -> float | None:
    """Energy of the storage rounding over the mean signal energy (see :class:`ValueKind`).

    Integer-stored values are rounded to steps of ``|scale|``; floats to about
    ``eps`` of their magnitude; k-space is transformed in single precision at
    least. The rounding error is uniform over a step: variance ``d^2 / 12``
    (W. F. Sheppard, 1898; common practice).
    """
    if mean_power <= 0 or not np.isfinite(mean_power):
        return None
    dt = np.dtype(volume.dtype)
    if volume.domain == "kspace":
        eps = float(np.finfo(np.float32 if dt.itemsize <= 8 else np.float64).eps)
        return float(max(eps * eps / 12.0, 1e-300))
    if dt.kind in "iub":
        step2 = float(volume.scale) ** 2
        return float(step2 / 12.0 / mean_power)
    eps = float(np.finfo(dt).eps) if dt.kind in "fc" else float(np.finfo(np.float64).eps)
    return float(eps * eps / 12.0)


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


def value_kind_step(volume: Volume, background: Background) -> ValueKind:
    """The shared step: the :class:`ValueKind` of ``volume`` (see :func:`classify_values`)."""
    return classify_values(volume, background)
