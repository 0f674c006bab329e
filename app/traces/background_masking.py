"""Background masking: was the air replaced by one constant instead of noise?

Masking, skull stripping and thresholding set the background to one value
(most often exactly 0). Measured noise never repeats one value in most of the
air, so the share of background samples holding the most common exact value
is the evidence; for integer data with a noise sigma of only a step or two,
the two neighbouring lattice values must be nearly empty too (a masked
background stands alone, quantised noise does not). The constant region's
shape (connected parts, share of the image, whether it reaches the border)
is reported for the reviewer. A noise-free synthetic image has a constant
background too and is reported the same way, with that said. Masks and
thresholds set the air to its lowest value; air flattened onto a level with
lower values around it (compression, coarse quantisation) is inconclusive.

``zero_background_fraction`` is the share of background samples holding that
constant (0 in most cases; ``constant_value`` in the evidence says which).

References
----------
.. [1] S. M. Smith, "Fast robust automated brain extraction", Human Brain
   Mapping 17(3):143-155, 2002 (skull stripping sets non-brain voxels to zero).
.. [2] H. Gudbjartsson and S. Patz, "The Rician distribution of noisy MRI data",
   Magnetic Resonance in Medicine 34(6):910-914, 1995 (air of a measured
   magnitude image holds Rayleigh noise, not a constant).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import ndimage

from app.io.volume import Volume
from app.traces.background import MASKED_SHARE, Background, constant_share
from app.traces.base import Trace, inconclusive, register
from app.traces.rounding import round_sig

TRACE_ID = "background_masking"
PARTIAL_SHARE = 0.1


def mask_shape(volume: Volume, bg: Background, value: float) -> dict[str, Any]:
    """Shape statistics of the region holding exactly ``value`` in the analysed frames.

    Returns
    -------
    dict
        ``n_regions`` (median number of connected parts per frame, parts of at
        least 16 pixels), ``fraction_of_image`` (share of the analysed pixels),
        ``touches_border`` (whether the region reaches the image border in most
        frames). Common practice, no source.
    """
    use_stored = bg.stored is not None
    regions, touches, n_const, n_px = [], [], 0, 0
    for _, block in volume.iter_slices(8, scaled=not use_stored, indices=bg.frames):
        b = np.asarray(block)
        if b.ndim == 4:
            b = np.sqrt((np.abs(b) ** 2).sum(axis=1))
        elif np.iscomplexobj(b):
            b = np.abs(b)
        for f in b:
            const = f == value
            n_const += int(const.sum())
            n_px += const.size
            lab, n = ndimage.label(const)
            if n:
                sizes = np.bincount(lab.ravel())[1:]
                regions.append(int(np.sum(sizes >= 16)))
            else:
                regions.append(0)
            touches.append(bool(const[0].any() or const[-1].any() or const[:, 0].any()
                                or const[:, -1].any()))
    return {
        "n_regions": int(np.median(regions)) if regions else 0,
        "fraction_of_image": round_sig(n_const / n_px) if n_px else 0.0,
        "touches_border": bool(np.mean(touches) >= 0.5) if touches else False,
    }


@register(TRACE_ID, version="1", order=50,
          default_estimates={"zero_background_fraction": None})
def analyse(volume: Volume, *, background: Background) -> Trace:
    """Say whether the background holds one constant instead of noise.

    References
    ----------
    Gudbjartsson and Patz, MRM 1995 (measured air holds noise); Smith, HBM 2002
    (skull stripping zeroes the background).
    """
    bg = background
    if not bg.usable:
        return inconclusive(TRACE_ID, f"Masking not measured: {bg.reason}.",
                            n_background=int(bg.n_background))
    const = constant_share(bg)
    value = 0.0 if const.value is None else const.value
    shape = mask_shape(volume, bg, value) if const.share >= PARTIAL_SHARE else {
        "n_regions": 0, "fraction_of_image": 0.0, "touches_border": False}
    physical = value * volume.scale + volume.offset if bg.stored is not None else value
    evidence = {
        "zero_background_fraction": round_sig(const.share),
        "constant_value": round_sig(physical, 6) if const.share >= PARTIAL_SHARE else None,
        "neighbour_share": round_sig(const.neighbour_share),
        "mask": shape,
        "n_background": int(bg.n_background),
        "background_fraction": round_sig(bg.fraction),
        "nan_fraction": round_sig(bg.nan_fraction),
    }
    estimates = {"zero_background_fraction": evidence["zero_background_fraction"]}
    evidence["decision"] = {"statistic": "constant_background_share", "value": const.share,
                            "threshold": MASKED_SHARE, "false_alarm_rate": None,
                            "p_value": None}
    if const.masked:
        kind = ("masked or skull-stripped, a noise-free simulation, or air flattened by "
                "lossy compression" if const.share >= 0.999
                else "masked or thresholded; some noise samples survive")
        summary = (f"{100 * const.share:.1f}% of the background holds exactly the value "
                   f"{physical:.4g} instead of noise ({kind}); the constant region covers "
                   f"{100 * shape['fraction_of_image']:.0f}% of the image in "
                   f"{shape['n_regions']} part(s).")
        conf = float(np.clip(0.5 + 0.5 * (const.share - 0.3) / 0.5, 0.5, 0.98))
        return Trace(TRACE_ID, "present", conf, summary, estimates, evidence)
    if const.flattened:
        below = "" if const.at_bottom else ", with lower values in the air too"
        summary = (f"{100 * const.share:.1f}% of the background holds the value {physical:.4g}"
                   f"{below}: the air was flattened, but not as a mask or threshold leaves it "
                   "(compression or coarse quantisation can do this).")
        return Trace(TRACE_ID, "inconclusive", 0.3, summary, estimates, evidence)
    if const.share >= PARTIAL_SHARE and bg.stored is not None and \
            bg.stored.dtype.kind in "iu":
        note = (f"; {100 * const.share:.0f}% of it at {physical:.4g}, with its lattice "
                "neighbours as common, as integer-stored noise of small sigma leaves")
    else:
        note = ""
    summary = (f"The background holds noise, not a constant ({100 * const.share:.1f}% of "
               f"its samples share the most common value{note}).")
    conf = float(np.clip(0.95 - const.share, 0.4, 0.95))
    return Trace(TRACE_ID, "absent", conf, summary, estimates, evidence)
