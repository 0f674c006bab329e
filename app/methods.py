"""A methods paragraph a researcher can paste into a paper, from a report and a decision.

Pure: dicts in, one string out. It names every processing trace found with its
estimated parameters, states what could not be decided, and says what the
traces mean for retrospective undersampling experiments.
"""

from __future__ import annotations

from typing import Any

import app

#: Plain names of the trace ids (trade terms), used in sentences and on pages.
TRACE_NAMES: dict[str, str] = {
    "zero_filling": "zero-filled k-space interpolation",
    "magnitude_only": "magnitude-only values",
    "coil_combination": "root-sum-of-squares coil combination",
    "background_masking": "background masking",
    "lossy_compression": "lossy (JPEG-type) compression",
    "intensity_quantization": "intensity quantisation",
    "resampling": "grid resampling",
    "kspace_filtering": "k-space apodization",
    "partial_fourier": "partial Fourier acquisition",
    "kspace_synthesis": "k-space samples computed by a reconstruction (parallel imaging or "
                        "a partial-Fourier fill) rather than measured",
}

OUTCOME_NAMES = {
    "fit_for_reconstruction": "fit for reconstruction research",
    "downstream_only": "fit for downstream tasks only",
    "rejected": "rejected",
}

LAW_NAMES = {"gaussian": "Gaussian", "rayleigh": "Rayleigh",
             "noncentral_chi": "non-central chi", "unknown": "unidentified"}


def trace_name(tid: str) -> str:
    """The plain name of a trace id (the id itself, spaced, when unknown)."""
    return TRACE_NAMES.get(tid, tid.replace("_", " "))


def _num(v: Any) -> float | None:
    if isinstance(v, int | float) and not isinstance(v, bool):
        return float(v)
    return None


def _g(v: float, digits: int = 3) -> str:
    return f"{v:.{digits}g}"


def _pct(v: float) -> str:
    return f"{100 * v:.1f} %" if v < 0.995 else f"{100 * v:.0f} %"


def _axis_phrase(est: dict[str, Any], key: str, fmt: Any) -> list[str]:
    out = []
    for axis in ("rows", "cols", "slices"):
        d = est.get(axis)
        if isinstance(d, dict) and _num(d.get(key)) is not None:
            out.append(fmt(axis, float(d[key])))
    return out


def _zero_filling(est: dict[str, Any], shape: list[int]) -> str:
    sizes = dict(zip(("rows", "cols"), shape[-2:], strict=False)) if len(shape) >= 2 else {}
    parts = []
    for axis in ("rows", "cols", "slices"):
        d = est.get(axis)
        f = _num(d.get("support_fraction")) if isinstance(d, dict) else None
        if f is None:
            continue
        text = f"{_pct(f)} of the {axis}"
        if f < 0.995:
            text += f" (padding factor {_g(1 / f)}"
            if axis in sizes:
                text += f", about {round(sizes[axis] * f)} of {sizes[axis]} samples acquired"
            text += ")"
        parts.append(text)
    if not parts:
        return "the k-space was padded with zeros around a central region (zero-filling)"
    return "k-space was occupied in only " + " and ".join(parts) + " (zero-filling)"


def _describe(tid: str, trace: dict[str, Any], shape: list[int]) -> str:
    est = trace.get("estimates") or {}
    if tid == "zero_filling":
        return _zero_filling(est, shape)
    if tid == "magnitude_only":
        dom = est.get("domain")
        if dom == "magnitude":
            return "the values are magnitudes with the phase discarded"
        return f"the values are {dom or 'not complex'} (no phase)"
    if tid == "kspace_synthesis":
        method = est.get("method") or "a reconstruction"
        acc = _num(est.get("acceleration"))
        s = f"k-space samples were computed ({str(method).replace('_', ' ')}"
        return s + (f", acceleration about {_g(acc, 2)})" if acc is not None else ")")
    if tid == "coil_combination":
        law = LAW_NAMES.get(str(est.get("noise_model")), str(est.get("noise_model")))
        L, sigma = _num(est.get("effective_channels")), _num(est.get("sigma"))
        s = f"the background noise follows a {law} law"
        if L is not None:
            s += f" with about {_g(L, 2)} effective channels"
        if sigma is not None:
            s += f" (noise standard deviation {_g(sigma)} in stored units)"
        return s + ", as left by root-sum-of-squares combination of multi-coil images"
    if tid == "background_masking":
        f = _num(est.get("zero_background_fraction"))
        return ("the background was replaced by a constant (masking or skull stripping)"
                + (f", covering {_pct(f)} of the image" if f is not None else ""))
    if tid == "lossy_compression":
        method, q = est.get("method"), _num(est.get("quality"))
        origin = est.get("block_origin")
        if method == "declared":
            s = "lossy compression is declared by the file header"
        else:
            s = "8 x 8 block-transform (JPEG) compression traces are in the pixels"
        if q is not None:
            s += f", at an estimated JPEG quality of {q:.0f}"
        if isinstance(origin, list) and len(origin) == 2 and origin != [0, 0]:
            s += f", with the block grid starting at row {origin[0]}, column {origin[1]}"
        return s
    if tid == "intensity_quantization":
        lv, bits = _num(est.get("distinct_levels")), _num(est.get("effective_bits"))
        clip = _num(est.get("clipped_fraction"))
        bits_s = f" ({_g(bits, 2)} effective bits)" if bits is not None else ""
        s = (f"the intensities take only {lv:.0f} distinct levels{bits_s}" if lv is not None
             else "the intensities were quantised to few levels")
        if clip is not None and clip > 0:
            s += f" and {_pct(clip)} of the samples are clipped at the range ends"
        return s
    if tid == "resampling":
        parts = _axis_phrase(est, "factor", lambda a, f: f"{_g(f)} along the {a}")
        return "the pixel grid was resampled by interpolation" + (
            " (output samples per input sample " + ", ".join(parts) + ")" if parts else "")
    if tid == "kspace_filtering":
        w = est.get("window")
        return f"k-space was apodized with a smooth window{f' ({w})' if w else ''}"
    if tid == "partial_fourier":
        parts = _axis_phrase(est, "fraction", lambda a, f: f"{_pct(f)} of the {a}")
        return "one side of k-space is missing or synthesised (partial Fourier" + (
            "; acquired " + " and ".join(parts) if parts else "") + ")"
    return trace.get("summary") or trace_name(tid)


def _effective_sentence(effective: dict[str, Any]) -> str | None:
    nominal = _num(effective.get("acceleration", effective.get("nominal")))
    eff = _num(effective.get("effective_acceleration", effective.get("effective")))
    if nominal is None or eff is None:
        return None
    family = effective.get("family")
    fam = f" with {str(family).replace('_', ' ')} masks" if family else ""
    return (f"A nominal acceleration of R = {_g(nominal)}{fam} on these images corresponds to "
            f"an effective acceleration of R_eff = {_g(eff)} on the acquired k-space support, "
            "so results should be reported against R_eff, not R.")


def methods_statement(report: dict[str, Any], decision: dict[str, Any] | None = None, *,
                      effective: dict[str, Any] | None = None) -> str:
    """A paragraph describing the vetting of one dataset, for a paper's methods section.

    Parameters
    ----------
    report : dict
        A ``rawproof.report/1`` object.
    decision : dict, optional
        The lab's current decision: ``outcome`` (``fit_for_reconstruction``,
        ``downstream_only`` or ``rejected``, as in app.store.models.OUTCOMES) and
        ``rationale``; ``caveats`` if any.
    effective : dict, optional
        An effective-rate result from :mod:`app.sampling`: ``family``,
        ``acceleration`` (nominal) and ``effective_acceleration``.

    Returns
    -------
    str
        Plain text, one paragraph.

    References
    ----------
    The undersampling consequence is the effective acceleration computed by
    :mod:`app.sampling` (mask samples counted inside the acquired support);
    variable-density mask families after Lustig, Donoho and Pauly, Magn. Reson.
    Med. 58:1182-1195, 2007.
    """
    inp = report.get("input") or {}
    shape = [int(s) for s in inp.get("shape") or []]
    traces = report.get("traces") or {}
    present = [(t, d) for t, d in traces.items() if d.get("status") == "present"]
    unsure = [t for t, d in traces.items() if d.get("status") == "inconclusive"]
    absent = [t for t, d in traces.items() if d.get("status") == "absent"]
    matrix = " x ".join(str(s) for s in shape[-2:]) if len(shape) >= 2 else "unknown"
    frames = 1
    for s in shape[:-2]:
        frames *= s
    n_files = inp.get("n_files")
    fmt = inp.get("format", "")
    src = f"{n_files} {fmt} file(s)".replace("  ", " ") if n_files else "the files"
    out = [
        f"The candidate dataset ({src}; matrix {matrix}, {frames} image(s); "
        f"{inp.get('value_type', 'real')} {inp.get('domain', 'image')}-domain values) was "
        f"screened for traces of processing applied before distribution with rawproof "
        f"{report.get('tool_version', app.__version__)}."
    ]
    if present:
        found = [f"{trace_name(t)}: {_describe(t, d, shape)}" for t, d in present]
        out.append("Traces found: " + "; ".join(found) + ".")
    else:
        out.append("No trace of processing was found.")
    if unsure:
        out.append("Not decidable from the data: " + ", ".join(trace_name(t) for t in unsure) + ".")
    if absent:
        out.append("No evidence of: " + ", ".join(trace_name(t) for t in absent) + ".")
    ids = {t for t, _ in present}
    spectral = ids & {"zero_filling", "kspace_filtering", "partial_fourier", "resampling",
                      "lossy_compression", "magnitude_only", "coil_combination"}
    if spectral:
        out.append(
            "The Fourier transform of these images is therefore not measured k-space: "
            "retrospective undersampling experiments on them simulate an easier problem "
            "than a real accelerated acquisition"
            + (", because the outer k-space that a mask appears to skip was never acquired"
               if "zero_filling" in ids or "partial_fourier" in ids else "")
            + "."
        )
        if effective:
            eff = _effective_sentence(effective)
            if eff:
                out.append(eff)
    elif not present and not unsure:
        out.append("Within the sensitivity of these analysers the data are consistent with "
                   "raw acquisitions.")
    if decision and decision.get("outcome"):
        outcome = OUTCOME_NAMES.get(str(decision["outcome"]), str(decision["outcome"]))
        s = f"After review, the lab recorded the dataset as {outcome}"
        rationale = str(decision.get("rationale") or "").strip().rstrip(".")
        s += f" ({rationale})." if rationale else "."
        out.append(s)
        caveats = str(decision.get("caveats") or "").strip().rstrip(".")
        if caveats:
            out.append(f"Caveats: {caveats}.")
    return " ".join(out)
