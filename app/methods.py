"""The words rawproof uses for its findings, and the texts built from a report.

One source of each name: the short label and the sentence name of every trace
id, the status words (present / absent / inconclusive, as in the report
contract), the noise-law and outcome names. The command line, the pages, the
exports and the methods statement all read them from here.

Pure: dicts in, strings out.

- :func:`methods_statement`: a paragraph a researcher can paste into a paper.
- :func:`plain_answer`: the verdict panel at the top of a dataset page, the
  printable record and the command's summary (the same sentences everywhere).
- :func:`finding_text`: the one-line finding of a trace, read from its estimates.
"""

from __future__ import annotations

from typing import Any

import app

#: Short labels of the trace ids (trade terms), for tables, chips and filters.
TRACE_LABELS: dict[str, str] = {
    "zero_filling": "Zero-filling",
    "magnitude_only": "Magnitude only",
    "coil_combination": "Coil combination",
    "background_masking": "Background masking",
    "lossy_compression": "Lossy compression",
    "intensity_quantization": "Intensity quantisation",
    "resampling": "Resampling",
    "kspace_filtering": "k-space filtering",
    "partial_fourier": "Partial Fourier",
    "kspace_synthesis": "k-space synthesis",
}

#: The status words: the report contract's own, on every surface.
STATUS_WORDS: dict[str, str] = {
    "present": "present",
    "absent": "absent",
    "inconclusive": "inconclusive",
}

#: What a confidence number means, in one sentence, wherever one is shown.
#: True to DEVELOPERS.md "Validation discipline": maps are fitted on the in-sample
#: generator and the second simulator's development split; held-out and shelf only report.
CONFIDENCE_MEANING = ("Confidence is the estimated probability that this finding is right: "
                      "from a calibration map fitted on simulated development data, or from "
                      "the analyser's own probability model (the report table says which); "
                      "held-out simulations and real files only measure how well it holds.")

#: The nominal acceleration the verdict panel quotes (the calculator's default).
USUAL_ACCELERATION = 4.0

#: Plain names of the trace ids (trade terms), used in sentences.
TRACE_NAMES: dict[str, str] = {
    "zero_filling": "zero-filled k-space interpolation",
    "magnitude_only": "magnitude-only values",
    "coil_combination": "coil combination into magnitude images",
    "background_masking": "background masking",
    "lossy_compression": "lossy (JPEG-type) compression",
    "intensity_quantization": "intensity quantisation",
    "resampling": "grid resampling",
    "kspace_filtering": "k-space apodization",
    "partial_fourier": "partial Fourier acquisition",
    "kspace_synthesis": "k-space samples computed by a reconstruction (parallel imaging or "
                        "a partial-Fourier fill) rather than measured",
}

#: The lab's three decision outcomes: key -> label (pages, CLI, exports).
OUTCOME_LABELS: dict[str, str] = {
    "fit_for_reconstruction": "Fit for reconstruction research",
    "downstream_only": "Fit for downstream tasks only",
    "rejected": "Rejected",
}
#: The same outcomes inside a sentence.
OUTCOME_NAMES = {k: v[0].lower() + v[1:] for k, v in OUTCOME_LABELS.items()}

LAW_NAMES = {"gaussian": "Gaussian", "rayleigh": "Rayleigh",
             "noncentral_chi": "non-central chi", "unknown": "unidentified"}


def trace_label(tid: str) -> str:
    """The short label of a trace id (the id in words when unknown)."""
    return TRACE_LABELS.get(tid, tid.replace("_", " ").capitalize())


def status_word(status: str) -> str:
    """The word for a trace status (present, absent, inconclusive)."""
    return STATUS_WORDS.get(status, status)


def window_name(est: dict[str, Any]) -> str | None:
    """The apodization window family the ``kspace_filtering`` estimates name."""
    w = est.get("window") if isinstance(est, dict) else None
    return str(w).replace("_", " ") if w else None


def law_name(law: Any) -> str:
    """The plain name of a noise law of the ``coil_combination`` estimates."""
    return LAW_NAMES.get(str(law), str(law).replace("_", " "))


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
        law = law_name(est.get("noise_model"))
        L, sigma = _num(est.get("effective_channels")), _num(est.get("sigma"))
        s = f"the background noise follows a {law} law"
        if L is not None:
            s += f" with about {_g(L, 2)} effective channels"
        if sigma is not None:
            s += f" (noise standard deviation {_g(sigma)} in stored units)"
        combination = est.get("combination")
        if combination == "linear":
            return (s + ", with a noise level that varies across the image, as a linear "
                    "combination of receive channels (adaptive, Roemer or SENSE weights) "
                    "leaves")
        if combination == "single":
            return s + ", as the magnitude of a single receive channel leaves"
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
        w = window_name(est)
        return f"k-space was apodized with a smooth window{f' ({w})' if w else ''}"
    if tid == "partial_fourier":
        parts = _axis_phrase(est, "fraction", lambda a, f: f"{_pct(f)} of the {a}")
        fill = {"zeros": "the missing side holds zeros",
                "conjugate": "the missing side was filled by conjugate symmetry",
                "iterative": "the missing side was filled by an iterative reconstruction",
                }.get(str(est.get("fill")))
        return "one side of k-space is missing or synthesised (partial Fourier" + (
            "; acquired " + " and ".join(parts) if parts else "") + (
            f"; {fill}" if fill else "") + ")"
    return trace.get("summary") or trace_name(tid)


def _effective_sentence(effective: dict[str, Any]) -> str | None:
    nominal = _num(effective.get("acceleration", effective.get("nominal")))
    eff = _num(effective.get("effective_acceleration", effective.get("effective")))
    if nominal is None or eff is None:
        return None
    family = effective.get("family")
    fam = f" with {str(family).replace('_', ' ')}" if family else ""
    if family and "mask" not in str(family):
        fam += " masks"
    return (f"A nominal acceleration of R = {_g(nominal)}{fam} on these images corresponds to "
            f"an effective acceleration of R_eff = {_g(eff)} on the acquired k-space support, "
            "so results should be reported against R_eff, not R.")


def methods_statement(report: dict[str, Any], decision: dict[str, Any] | None = None, *,
                      effective: dict[str, Any] | None = None,
                      probe: dict[str, Any] | None = None) -> str:
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
    probe : dict, optional
        A ``rawproof.probe/1`` result; its numbers are quoted when given.

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
        found = [f"{trace_name(t)}: {_describe(t, d, shape)}"
                 + (" (a property of the acquisition, not a processing step)"
                    if _origin(d) == "acquisition" else "") for t, d in present]
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
    ptext = probe_sentence(probe)
    if ptext:
        out.append(ptext)
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


# ------------------------------------------------------------------ the plain answer
def _origin(trace: dict[str, Any]) -> str:
    return "acquisition" if trace.get("origin") == "acquisition" else "processing"


def finding_text(tid: str, trace: dict[str, Any], shape: list[int] | None = None) -> str:
    """The one-line finding of a trace, read from its estimates (the figures and the
    methods statement read the same fields).

    A present trace is described by its estimates; an absent or inconclusive one
    by its status, with the analyser's own sentence kept for the details.
    """
    status = trace.get("status")
    if status == "present":
        s = _describe(tid, trace, list(shape or []))
        s = s if s.startswith("k-space") else s[0].upper() + s[1:]
        if _origin(trace) == "acquisition":
            s += " (a property of the acquisition, not a processing step)"
        return s + "."
    if status == "absent":
        return f"No sign of {trace_name(tid)}."
    return f"Could not be decided whether the data show {trace_name(tid)}."


def usual_effective(report: dict[str, Any]) -> dict[str, Any] | None:
    """The effective acceleration at the usual nominal R on the report's measured support.

    The calculator's default answer (polynomial variable-density lines along the
    axis with the smaller support, 20 masks, seed 0), so the command's summary and
    the dataset page quote the same number. None when the support is the full grid.

    References
    ----------
    :func:`app.sampling.effective_rate`; Lustig, Donoho and Pauly, Magn. Reson.
    Med. 58:1182-1195, 2007 (variable-density masks).
    """
    from app import sampling
    from app.errors import InputError

    try:
        sup = sampling.support_from_report(report)
    except (InputError, ValueError):
        return None
    rows_f, cols_f = (float(f) for f in sup["support"])
    if min(rows_f, cols_f) >= 0.999:
        return None
    axis = "rows" if rows_f < cols_f else "cols"
    res = sampling.effective_rate(tuple(int(n) for n in sup["shape"]), (rows_f, cols_f),
                                  "polynomial", USUAL_ACCELERATION, dims=1, axis=axis,
                                  n_masks=20, seed=0)
    return {"acceleration": USUAL_ACCELERATION,
            "effective_acceleration": float(res["effective_acceleration"]),
            "family": f"polynomial variable-density line masks along the {axis}"}


def probe_sentence(probe: dict[str, Any] | None) -> str | None:
    """The bias probe's result in one sentence (None when the probe has not run)."""
    if not probe or not isinstance(probe.get("routes"), dict):
        return None
    gap = _num((probe.get("gap") or {}).get("nrmse"))
    dl = probe["routes"].get("as_delivered") or {}
    cr = probe["routes"].get("support_cropped") or {}
    nd, nc = _num(dl.get("nrmse")), _num(cr.get("nrmse"))
    R = _num(probe.get("acceleration"))
    if gap is None or nd is None or nc is None or R is None:
        return None
    fam = str(probe.get("family") or "").replace("_", " ")
    n = probe.get("slices")
    how = (f"In rawproof's bias probe ({n} slices, {fam} masks at R = {_g(R)}, "
           f"L1-wavelet compressed-sensing reconstruction), the NRMSE was {_g(nd)} on the "
           f"images as delivered and {_g(nc)} on the support-cropped k-space")
    if gap > 0.03:
        return how + f": naive use flatters the NRMSE by {100 * gap:.0f} %."
    if gap < -0.03:
        return how + f": the delivered images made the problem harder by {-100 * gap:.0f} %."
    return how + ": the two routes agree within 3 %, as for raw data."


def plain_answer(report: dict[str, Any], *, effective: dict[str, Any] | None = None,
                 probe: dict[str, Any] | None = None) -> dict[str, Any]:
    """What a report means for a reconstruction study, in plain sentences.

    The verdict panel at the top of a dataset page, the printable record and the
    ``rawproof analyse`` summary show these sentences.

    Parameters
    ----------
    report : dict
        A ``rawproof.report/1`` object.
    effective : dict, optional
        :func:`usual_effective` (or the calculator's default answer).
    probe : dict, optional
        A ``rawproof.probe/1`` result, when the bias probe was run.

    Returns
    -------
    dict
        ``headline``; ``findings`` (one dict per present processing trace:
        ``trace_id``, ``label``, ``text``, ``confidence``); ``acquisition`` (the
        same for findings that are properties of the acquisition); ``undecided``
        (labels); ``meaning``, ``effective``, ``must_report``, ``way_forward``,
        ``probe`` (sentences or None); ``confidence_meaning``; ``text`` (all of
        it as plain lines).
    """
    inp = report.get("input") or {}
    shape = [int(s) for s in inp.get("shape") or []]
    traces = report.get("traces") or {}

    def item(tid: str, t: dict[str, Any]) -> dict[str, Any]:
        return {"trace_id": tid, "label": trace_label(tid),
                "text": finding_text(tid, t, shape), "confidence": _num(t.get("confidence"))}

    found = [item(t, d) for t, d in traces.items()
             if d.get("status") == "present" and _origin(d) == "processing"]
    acq = [item(t, d) for t, d in traces.items()
           if d.get("status") == "present" and _origin(d) == "acquisition"]
    undecided = [trace_label(t) for t, d in traces.items() if d.get("status") == "inconclusive"]
    ids = {f["trace_id"] for f in found}
    verdict = report.get("verdict")
    if found:
        names = [trace_name(f["trace_id"]) for f in found]
        listed = names[0] if len(names) == 1 else ", ".join(names[:-1]) + " and " + names[-1]
        headline = f"Processed: these data went through {listed} before they were distributed."
    elif verdict == "raw-like":
        headline = "Raw-like: no trace of processing was found" + (
            "; what was found is a property of the acquisition." if acq else ".")
    else:
        headline = ("Inconclusive: no processing was found, but "
                    + ", ".join(undecided).lower() + " could not be decided.")
    spectral = ids & {"zero_filling", "kspace_filtering", "partial_fourier", "resampling",
                      "lossy_compression", "magnitude_only", "coil_combination",
                      "kspace_synthesis", "intensity_quantization", "background_masking"}
    if spectral:
        meaning = ("For a reconstruction study, the FFT of these images is not measured "
                   "k-space: retrospective undersampling of it simulates an easier problem "
                   "than a real accelerated acquisition, so every method looks better than "
                   "it would on measured data.")
    elif verdict == "raw-like":
        meaning = ("For a reconstruction study, the data are consistent with raw "
                   "acquisitions within the sensitivity of these analysers"
                   + ("; the acquisition's own properties above must still be modelled."
                      if acq else "."))
    else:
        meaning = ("For a reconstruction study, it is not settled whether the FFT of these "
                   "images behaves like measured k-space; review the undecided findings "
                   "before using them for undersampling experiments.")
    eff = None
    if effective and ({"zero_filling", "partial_fourier"} & ids):
        nominal = _num(effective.get("acceleration"))
        e = _num(effective.get("effective_acceleration"))
        if nominal is not None and e is not None:
            eff = (f"At the lab's usual nominal acceleration R = {_g(nominal)} "
                   f"({effective.get('family', 'variable-density masks')}), the samples kept "
                   f"on the acquired k-space support correspond to R_eff = {_g(e)}.")
    must = None
    if found:
        parts = [f["text"].rstrip(".") for f in found]
        must = ("A paper using these data must report: " + "; ".join(
            p if p.startswith("k-space") else p[0].lower() + p[1:] for p in parts)
            + ("; and every acceleration as R_eff on the acquired support, not R."
               if eff else "."))
    way = []
    if {"zero_filling", "partial_fourier"} & ids:
        way.append("Support-cropped route: download the k-space cropped to the measured "
                   "support from this page (or `rawproof crop`); it removes the zero "
                   "padding, but cannot undo magnitude or coil combination, quantisation "
                   "or compression.")
    if ids & {"magnitude_only", "coil_combination", "lossy_compression",
              "intensity_quantization", "kspace_synthesis"}:
        way.append("For reconstruction research, look for a source that distributes the "
                   "measured (raw, multi-coil, complex) k-space; these data can still serve "
                   "downstream tasks.")
    ptext = probe_sentence(probe)
    text_lines = [headline]
    text_lines += [f"- {f['label']} (present"
                   + (f", confidence {f['confidence']:.2f}" if f["confidence"] is not None
                      else "") + f"): {f['text']}" for f in found]
    text_lines += [f"- Property of the acquisition: {f['label']}: {f['text']}" for f in acq]
    if undecided:
        text_lines.append("- Inconclusive: " + ", ".join(undecided) + ".")
    text_lines += [x for x in (meaning, eff, ptext, must, *way) if x]
    if found or acq:
        text_lines.append(CONFIDENCE_MEANING)
    return {"headline": headline, "findings": found, "acquisition": acq,
            "undecided": undecided, "meaning": meaning, "effective": eff,
            "must_report": must, "way_forward": way, "probe": ptext,
            "confidence_meaning": CONFIDENCE_MEANING, "text": "\n".join(text_lines)}
