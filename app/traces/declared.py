"""Header and pixels in one call: each trace joins what the header declares.

The analysers measure the pixels; the shared ``header`` step
(:func:`app.traces.header.header_step`) states what the file headers declare.
:func:`reconcile` runs after the plan and, for every trace with a declaration,
combines the two and records which one the call rests on in
``evidence["basis"]``:

``"measured"``
    no declaration bears on the trace; the analyser's call stands.
``"declared"``
    the header declares the step and the pixels could not tell (inconclusive).
``"declared and measured"``
    both say the same.
``"conflict"``
    they disagree; the summary says so, with the declared value, and
    ``evidence["conflict"]`` keeps both sides. Conflicts are never silent.

The combination treats the declaration and the pixel call as independent
evidence about the same yes/no question, starting from even odds:
``logit P(present) = logit P_declared + logit P_measured`` (naive Bayes), where
``P_declared`` is how strongly the rule's attribute implies the step (the
``strength`` of each rule below, a stated prior, not a fitted value) and
``P_measured`` is the analyser's calibrated confidence turned into a probability
of ``present`` (0.5 when it was inconclusive), with the base rate of the data its
calibration map was fitted on divided out (so that only the pixels' likelihood
ratio is added). The status is the side with
``P >= 0.65``; between 0.35 and 0.65 the call is ``inconclusive``.

Before any of this, a cheap signal statistic (:func:`signal_statistic`) checks
that the pixels hold a signal: a blank, constant or near-constant input makes
every trace ``inconclusive`` with a "no signal" reason and a report warning.

Rules (trace: attribute -> declaration; section of NEMA PS3.3 or the NIfTI-1
header; strengths are priors recalled from common practice, no source):

- ``zero_filling``: AcquisitionMatrix with InPlanePhaseEncodingDirection and
  PercentPhaseFieldOfView against Rows / Columns (C.8.3.1.1.x, MR Image Module;
  Enhanced MR: MRAcquisitionFrequencyEncodingSteps /
  MRAcquisitionPhaseEncodingStepsInPlane, C.8.13.5): more pixels than acquired
  samples on an axis, on an image that is not reformatted -> present with the
  padding factor per axis (strength 0.8: scanners interpolate by zero-filling
  k-space, though image-domain interpolation also exists).
- ``resampling``: ImageType MPR / CSA MPR / REFORMATTED / RESAMPLED /
  CSA RESAMPLED / CURVED / DIS2D / DIS3D (C.7.6.1.1.2, C.8.16.1.1) -> present
  (0.95); PROJECTION / MIP (0.8); DerivationDescription naming a resampling
  (C.7.6.1.1.2 companion attribute of C.7.6.1, 0.9); NIfTI sform/qform code 3-5
  (template space, ``nifti1.h``, 0.85); NIfTI ``descrip`` naming a registration
  or reslicing step (0.8); fewer pixels than acquired samples (C.8.3.1; 0.6:
  downsampled, or a cropped field of view). NIfTI code 2 is nibabel's default
  and is no evidence.
- ``partial_fourier``: ScanOptions PFP / PFF (C.8.3.1) or Enhanced MR
  PartialFourier YES with PartialFourierDirection (C.8.13.5, MR Modifier macro)
  -> present, origin ``acquisition`` (0.9); PartialFourier NO -> absent (0.85).
- ``kspace_filtering``: Enhanced MR KSpaceFiltering other than NONE (C.8.13.5)
  -> present with the window named (0.9); NONE -> absent (0.75).
- ``magnitude_only``: ImageType value M / P / R / I (C.8.3.1.1.1) or Enhanced MR
  ComplexImageComponent (C.8.13.3): magnitude -> present (0.95); real or
  imaginary -> absent (0.9); phase -> a phase map (see :func:`_phase_rule`).
- ``lossy_compression`` reads the header itself; its basis is only labelled.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from app.io.volume import Volume
from app.traces.base import Trace
from app.traces.context import evenly_spaced
from app.traces.header import HeaderFacts

#: Posterior probability needed to call a side; in between the call is inconclusive.
DECIDE = 0.65
#: Share of samples holding one value above which an input is near-constant.
NO_SIGNAL_MODE_FRACTION = 0.995
#: Frames read for the signal statistic (evenly spaced).
SIGNAL_FRAMES = 8
#: The contract's pixel traces (shared/REPORT_CONTRACT.md): each measures a signal,
#: so a blank input makes them inconclusive. A plug-in trace outside this list is
#: left as its analyser called it.
PIXEL_TRACES = ("zero_filling", "magnitude_only", "coil_combination", "background_masking",
                "lossy_compression", "intensity_quantization", "resampling",
                "kspace_filtering", "partial_fourier", "kspace_synthesis")


@dataclass(frozen=True)
class Declaration:
    """What the header declares about one trace.

    Attributes
    ----------
    status : {"present", "absent"}
    strength : float
        Probability that ``status`` holds given the attribute (a stated prior).
    rule : str
        The attribute and its value, in words, for the summary.
    section : str
        Where the attribute is defined (PS3.3 section or NIfTI-1 header field).
    value : dict
        The declared values (JSON-able), shown to the reviewer on a conflict.
    estimates : dict
        Estimates to report when the trace is present by declaration alone.
    origin : {"processing", "acquisition"}
    """

    status: str
    strength: float
    rule: str
    section: str
    value: dict[str, Any] = field(default_factory=dict)
    estimates: dict[str, Any] = field(default_factory=dict)
    origin: str = "processing"


@dataclass(frozen=True)
class SignalCheck:
    """The cheap signal statistic of :func:`signal_statistic`."""

    has_signal: bool
    mode_fraction: float
    value_range: float
    reason: str
    phase_like: bool = False
    physical_range: tuple[float, float] | None = None


def declarations(declared: dict[str, Any]) -> dict[str, Declaration]:
    """Per-trace declarations from the header step's ``declared`` facts.

    Parameters
    ----------
    declared : dict
        :attr:`app.traces.header.HeaderFacts.declared`.

    Returns
    -------
    dict
        Trace id -> :class:`Declaration` for the traces the header speaks to.

    References
    ----------
    NEMA PS3.3 C.7.6.1.1.2, C.8.3.1, C.8.13, C.8.16.1.1; NIfTI-1 ``nifti1.h``.
    """
    out: dict[str, Declaration] = {}
    _resampling_rule(declared, out)
    _zero_filling_rule(declared, out)
    _partial_fourier_rule(declared, out)
    _kspace_filtering_rule(declared, out)
    _magnitude_rule(declared, out)
    return out


def _resampling_rule(d: dict[str, Any], out: dict[str, Declaration]) -> None:
    further = [str(v).upper() for v in d.get("image_type_values") or []]
    strong = [v for v in further if v in ("MPR", "CSA MPR", "REFORMATTED", "RESAMPLED",
                                           "CSA RESAMPLED", "CURVED", "DIS2D", "DIS3D")]
    proj = [v for v in further if v in ("PROJECTION", "PROJECTION IMAGE", "MIP", "CSA MIP",
                                         "MINIP")]
    factors = d.get("interpolation_factor") or {}
    est = {"rows": {"factor": None}, "cols": {"factor": None}}
    if strong:
        out["resampling"] = Declaration("present", 0.95, f"ImageType {'/'.join(strong)}",
                                        "PS3.3 C.7.6.1.1.2, C.8.16.1.1",
                                        {"image_type": d.get("image_type")}, est)
        return
    desc = str(d.get("derivation_description") or "")
    if d.get("reformatted") and desc:
        out["resampling"] = Declaration("present", 0.9, f"DerivationDescription \"{desc}\"",
                                        "PS3.3 C.7.6.1", {"derivation_description": desc}, est)
        return
    if proj:
        out["resampling"] = Declaration("present", 0.8, f"ImageType {'/'.join(proj)}",
                                        "PS3.3 C.7.6.1.1.2", {"image_type": d.get("image_type")},
                                        est)
        return
    if d.get("template_space"):
        code = d.get("sform_code") if d.get("sform_code") in (3, 4, 5) else d.get("qform_code")
        out["resampling"] = Declaration("present", 0.85, f"NIfTI xform code {code} "
                                        f"({d['template_space']} space)", "NIfTI-1 nifti1.h "
                                        "sform_code/qform_code",
                                        {"sform_code": d.get("sform_code"),
                                         "qform_code": d.get("qform_code")}, est)
        return
    if d.get("descrip_resampling_words"):
        out["resampling"] = Declaration("present", 0.8, f"NIfTI descrip \"{d.get('descrip')}\"",
                                        "NIfTI-1 nifti1.h descrip",
                                        {"descrip": d.get("descrip")}, est)
        return
    if factors and min(factors.values()) < 0.95:
        fest = {ax: {"factor": float(factors[ax])} for ax in ("rows", "cols")}
        out["resampling"] = Declaration(
            "present", 0.6, f"AcquisitionMatrix {d.get('acquired')} acquired on fewer pixels "
            "(downsampled, or a cropped field of view)", "PS3.3 C.8.3.1",
            {"acquired": d.get("acquired"), "factor": factors}, fest)


def _zero_filling_rule(d: dict[str, Any], out: dict[str, Declaration]) -> None:
    factors = d.get("interpolation_factor") or {}
    if not factors or d.get("reformatted") or "resampling" in out and \
            out["resampling"].strength >= 0.8:
        return
    if max(factors.values()) <= 1.05:
        return
    est = {ax: {"support_fraction": round(1.0 / max(float(f), 1e-6), 4),
                "padding_factor": float(f)} for ax, f in factors.items()}
    out["zero_filling"] = Declaration(
        "present", 0.8, f"AcquisitionMatrix {d.get('acquired')} acquired shown on more pixels "
        f"(about {factors.get('rows', 1):.2f} x {factors.get('cols', 1):.2f})",
        "PS3.3 C.8.3.1 (AcquisitionMatrix, InPlanePhaseEncodingDirection, "
        "PercentPhaseFieldOfView)", {"acquired": d.get("acquired"), "factor": factors}, est)


def _partial_fourier_rule(d: dict[str, Any], out: dict[str, Declaration]) -> None:
    pf = d.get("partial_fourier")
    if pf is None:
        return
    dirs = d.get("partial_fourier_direction") or []
    est = {"rows": {"fraction": None}, "cols": {"fraction": None}, "fill": None}
    ismrmrd = d.get("ismrmrd_encoding_limits") is not None
    if pf and ismrmrd:
        frac = d.get("partial_fourier_fraction")
        est = dict(est, rows={"fraction": frac}, fill="zeros")
        lim = d["ismrmrd_encoding_limits"] or {}
        out["partial_fourier"] = Declaration(
            "present", 0.9, f"ISMRMRD encoding limits: lines {lim.get('minimum')}.."
            f"{lim.get('maximum')} about centre {lim.get('center')} (fraction {frac:g} of the "
            "phase-encode extent)",
            "ISMRMRD header (Inati et al. 2017): encodingLimits kspace_encoding_step_1",
            {"partial_fourier": True, "fraction": frac}, est, origin="acquisition")
    elif pf:
        src = "ScanOptions PFP/PFF" if d.get("scan_options") else "PartialFourier YES"
        out["partial_fourier"] = Declaration(
            "present", 0.9, f"{src} ({', '.join(dirs) or 'direction not given'})",
            "PS3.3 C.8.3.1 (ScanOptions), C.8.13.5 (MR Modifier: PartialFourier)",
            {"partial_fourier": True, "direction": dirs}, est, origin="acquisition")
    elif ismrmrd:
        out["partial_fourier"] = Declaration(
            "absent", 0.85, "ISMRMRD encoding limits symmetric about the centre",
            "ISMRMRD header (Inati et al. 2017): encodingLimits kspace_encoding_step_1",
            {"partial_fourier": False}, est)
    else:
        out["partial_fourier"] = Declaration("absent", 0.85, "PartialFourier NO",
                                             "PS3.3 C.8.13.5 (MR Modifier)",
                                             {"partial_fourier": False}, est)


def _kspace_filtering_rule(d: dict[str, Any], out: dict[str, Declaration]) -> None:
    kf = d.get("kspace_filtering")
    if not kf:
        return
    if kf == "NONE":
        out["kspace_filtering"] = Declaration("absent", 0.75, "KSpaceFiltering NONE",
                                              "PS3.3 C.8.13.5", {"kspace_filtering": kf},
                                              {"window": None})
    else:
        out["kspace_filtering"] = Declaration("present", 0.9, f"KSpaceFiltering {kf}",
                                              "PS3.3 C.8.13.5", {"kspace_filtering": kf},
                                              {"window": kf.lower()})


def _magnitude_rule(d: dict[str, Any], out: dict[str, Declaration]) -> None:
    kind = d.get("image_kind")
    sec = "PS3.3 C.8.3.1.1.1 (ImageType value 3), C.8.13.3 (ComplexImageComponent)"
    if kind == "magnitude":
        out["magnitude_only"] = Declaration("present", 0.95, "image component MAGNITUDE", sec,
                                            {"image_kind": kind}, {"domain": "magnitude"})
    elif kind in ("real", "imaginary"):
        out["magnitude_only"] = Declaration("absent", 0.9, f"image component {kind.upper()}",
                                            sec, {"image_kind": kind},
                                            {"domain": "real_signed"})
    elif kind == "phase":
        out["magnitude_only"] = Declaration("present", 0.95, "image component PHASE", sec,
                                            {"image_kind": kind}, {"domain": "real_signed"})


# --------------------------------------------------------------------------- signal

def signal_statistic(volume: Volume, *, frames: int = SIGNAL_FRAMES) -> SignalCheck | None:
    """Whether the pixels hold a signal, from a few evenly spaced frames.

    The statistic is the share of finite samples holding the single most common
    value (``mode_fraction``) and the range of the finite values. No finite
    sample, a zero range, or ``mode_fraction >= 0.995`` is "no signal". The
    physical value range also tells whether the values span -pi..pi or the
    -4096..4095 range in which scanners store phase (common practice, no source).

    Returns None when the pixels cannot be read (header-only reports).
    """
    if volume.domain != "image":
        return None
    n = int(volume.n_slices)
    idx = evenly_spaced(np.arange(n), min(frames, n))
    counts: dict[float, int] = {}
    total = 0
    lo, hi = math.inf, -math.inf
    try:
        for _, block in volume.iter_slices(4, indices=idx):
            b = np.asarray(block)
            if np.iscomplexobj(b):
                b = np.abs(b)
            b = b[np.isfinite(b)]
            if b.size == 0:
                continue
            total += b.size
            lo, hi = min(lo, float(b.min())), max(hi, float(b.max()))
            vals, cnt = np.unique(b, return_counts=True)
            top = int(np.argmax(cnt))
            counts[float(vals[top])] = counts.get(float(vals[top]), 0) + int(cnt[top])
    except Exception:  # noqa: BLE001 - pixels that cannot be read are judged elsewhere
        return None
    if total == 0:
        return SignalCheck(False, 1.0, 0.0, "no finite sample in the frames read")
    mode_fraction = max(counts.values()) / total
    rng = hi - lo
    if rng <= 0:
        return SignalCheck(False, 1.0, 0.0, f"every sample holds the one value {lo:g}",
                           physical_range=(lo, hi))
    if mode_fraction >= NO_SIGNAL_MODE_FRACTION:
        return SignalCheck(False, mode_fraction, rng,
                           f"{mode_fraction:.2%} of the samples hold one value",
                           physical_range=(lo, hi))
    pi_span = abs(lo + math.pi) <= 0.05 * math.pi and abs(hi - math.pi) <= 0.05 * math.pi
    stored_span = -4097 <= lo <= -3800 and 3800 <= hi <= 4096
    return SignalCheck(True, mode_fraction, rng, "", pi_span or stored_span, (lo, hi))


# --------------------------------------------------------------------------- combining

def _logit(p: float) -> float:
    p = min(max(p, 1e-4), 1 - 1e-4)
    return math.log(p / (1 - p))


def _p_present(trace: Trace) -> float:
    if trace.status == "present":
        return float(trace.confidence)
    if trace.status == "absent":
        return 1.0 - float(trace.confidence)
    return 0.5


def _base_rate(trace: Trace) -> float:
    """Share of present cases in the data the trace's calibration map was fitted on
    (0.5, even odds, when its confidence did not come from a map)."""
    from app.traces import calibration

    dec = trace.evidence.get("decision") if isinstance(trace.evidence, dict) else None
    if not isinstance(dec, dict) or not str(trace.evidence.get("confidence_basis", "")
                                           ).startswith("calibration map"):
        return 0.5
    maps = calibration.load_maps()
    m = maps.get(calibration.map_key(trace.id, str(dec.get("statistic", "")))) or \
        maps.get(trace.id)
    if m is None or m.n <= 0:
        return 0.5
    return (m.n_present + 1) / (m.n + 2)


def combine(declaration: Declaration, trace: Trace) -> Trace:
    """One trace's call from its declaration and its measured call (see module docstring).

    Parameters
    ----------
    declaration : Declaration
    trace : Trace
        The analyser's (pixel) call.

    Returns
    -------
    Trace
        A new Trace with ``evidence["basis"]`` and ``evidence["declared"]`` set.
    """
    p_decl = declaration.strength if declaration.status == "present" else 1 - declaration.strength
    p_meas = _p_present(trace)
    # a calibrated pixel probability carries the base rate of the development data it
    # was fitted on: divide it out, so that only the pixels' likelihood ratio is added
    # to the declaration's odds (naive Bayes from even odds)
    base_logit = _logit(_base_rate(trace)) if trace.status != "inconclusive" else 0.0
    p = 1.0 / (1.0 + math.exp(-(_logit(p_decl) + _logit(p_meas) - base_logit)))
    status = "present" if p >= DECIDE else "absent" if p <= 1 - DECIDE else "inconclusive"
    measured_said = trace.status
    if measured_said == "inconclusive":
        basis = "declared"
    elif measured_said == declaration.status:
        basis = "declared and measured"
    else:
        basis = "conflict"
    evidence = dict(trace.evidence)
    evidence["basis"] = basis
    evidence["declared"] = {"status": declaration.status, "rule": declaration.rule,
                            "section": declaration.section, "strength": declaration.strength,
                            "value": declaration.value}
    evidence["measured"] = {"status": trace.status, "confidence": round(trace.confidence, 4)}
    evidence["p_present"] = round(p, 4)
    evidence["confidence_basis"] = ("the header's declaration combined with the "
                                    + str(trace.evidence.get("confidence_basis",
                                                             "analyser's own probability")))
    estimates = dict(trace.estimates)
    origin = trace.origin
    if status == "present" and trace.status != "present":
        for k, v in declaration.estimates.items():
            if v is not None or k not in estimates:
                estimates[k] = v
        origin = declaration.origin
    said = f"the header declares {declaration.rule} ({declaration.section})"
    if basis == "declared":
        summary = (f"Declared, not measured: {said}; the pixels could not tell "
                   f"({_first_sentence(trace.summary)})")
    elif basis == "declared and measured":
        summary = f"{trace.summary} The header agrees: {said}."
    else:
        evidence["conflict"] = {"declared": declaration.status,
                                "declared_value": declaration.value,
                                "measured": trace.status,
                                "measured_confidence": round(trace.confidence, 4)}
        summary = (f"Conflict: {said}, but the pixels say {trace.status} "
                   f"({_first_sentence(trace.summary)}); {_resolved(status)}")
    # inconclusive: the probability of the less likely side, as the analysers'
    # own inconclusive calls carry a low number
    conf = p if status == "present" else (1 - p if status == "absent" else min(p, 1 - p))
    return Trace(trace.id, status, conf, summary, estimates, evidence, origin)


def _first_sentence(text: str) -> str:
    s = text.strip().rstrip(".")
    return s


def _resolved(status: str) -> str:
    return {"present": "taken as present on the strength of the header.",
            "absent": "taken as absent on the strength of the pixels.",
            "inconclusive": "the two cannot be reconciled here: inconclusive."}[status]


def _phase_rule(trace: Trace, facts: dict[str, Any], sig: SignalCheck | None) -> Trace:
    """A phase image: one component of the complex image; its FFT is not k-space.

    Declared by ImageType P or ComplexImageComponent PHASE (PS3.3 C.8.3.1.1.1,
    C.8.13.3); measured when the values span -pi..pi or the stored -4096..4095
    range. Either makes ``magnitude_only`` present (the complex data were reduced
    to one real component) with ``evidence["image_kind"] = "phase"``.
    """
    declared = facts.get("image_kind") == "phase"
    measured = bool(sig is not None and sig.phase_like)
    if not declared and not measured:
        return trace
    basis = ("declared and measured" if declared and measured else
             "declared" if declared else "measured")
    p = 1 - (1 - (0.95 if declared else 0.0)) * (1 - (0.8 if measured else 0.0))
    evidence = dict(trace.evidence, basis=basis, image_kind="phase",
                    measured={"status": trace.status, "confidence": round(trace.confidence, 4)})
    if sig is not None and sig.physical_range is not None:
        evidence["value_range"] = [round(v, 4) for v in sig.physical_range]
    if declared:
        evidence["declared"] = {"status": "present", "rule": "image component PHASE",
                                "section": "PS3.3 C.8.3.1.1.1, C.8.13.3", "strength": 0.95,
                                "value": {"image_kind": "phase"}}
    how = ("the header declares a phase image (ImageType P / ComplexImageComponent PHASE)"
           if declared else "the values span the range of a phase map (-pi..pi or -4096..4095)")
    summary = (f"A phase map: {how}. Only the phase of the complex image was kept, so its "
               "FFT is not k-space.")
    if trace.status == "present" and not declared:
        summary += f" (Pixel test: {_first_sentence(trace.summary)}.)"
    return Trace(trace.id, "present", p, summary, dict(trace.estimates, domain="real_signed"),
                 evidence, "processing")


def reconcile(traces: dict[str, Trace], facts: HeaderFacts | Any,
              volume: Volume | None = None) -> tuple[dict[str, Trace], list[str]]:
    """Join each trace with what the header declares; blank inputs become inconclusive.

    Parameters
    ----------
    traces : dict
        Trace id -> Trace from :func:`app.traces.plan.execute`.
    facts : HeaderFacts
        The ``header`` step's result (anything else, such as the exception the step
        raised, counts as no declarations).
    volume : Volume, optional
        For the signal statistic; without it the check is skipped.

    Returns
    -------
    traces : dict
        The reconciled traces, same keys and order.
    warnings : list of str
        Sentences for the report's warnings (no signal, conflicts).

    References
    ----------
    NEMA PS3.3 C.7.6.1.1.2, C.8.3.1, C.8.13, C.8.16.1.1; NIfTI-1 ``nifti1.h``.
    """
    declared = facts.declared if isinstance(facts, HeaderFacts) else {}
    warnings: list[str] = []
    sig = signal_statistic(volume) if volume is not None else None
    if sig is not None and not sig.has_signal:
        reason = f"No signal: {sig.reason}; nothing can be measured in these pixels."
        warnings.append(f"no signal: {sig.reason}; every trace is inconclusive")
        out = {}
        for tid, t in traces.items():
            if tid not in PIXEL_TRACES:
                out[tid] = t
                continue
            ev = dict(t.evidence, basis="measured", no_signal=True,
                      mode_fraction=round(sig.mode_fraction, 6), value_range=sig.value_range,
                      measured={"status": t.status, "confidence": round(t.confidence, 4)})
            # confidence: the probability that "cannot tell" is right, the share of
            # samples that hold one value
            out[tid] = Trace(tid, "inconclusive", sig.mode_fraction, reason, dict(t.estimates),
                             ev, "processing")
        return out, warnings
    decl = declarations(declared)
    out = {}
    for tid, t in traces.items():
        if tid == "magnitude_only":
            phased = _phase_rule(t, declared, sig)
            if phased is not t:
                out[tid] = phased
                continue
        if tid == "lossy_compression":
            out[tid] = _label_lossy(t, declared)
            continue
        d = decl.get(tid)
        if d is None:
            ev = dict(t.evidence)
            ev.setdefault("basis", "measured")
            out[tid] = Trace(t.id, t.status, t.confidence, t.summary, t.estimates, ev, t.origin)
            continue
        new = combine(d, t)
        if new.evidence["basis"] == "conflict":
            warnings.append(f"{tid}: header and pixels disagree: the header declares "
                            f"{d.rule} ({d.section}); the pixels say {t.status}.")
        out[tid] = new
    return out, warnings


def _label_lossy(t: Trace, declared: dict[str, Any]) -> Trace:
    """``lossy_compression`` joins the header itself; only its basis is labelled."""
    ev = dict(t.evidence)
    method = t.estimates.get("method")
    header_lossy = declared.get("lossy_compression")
    if method == "declared":
        basis = "declared"
    elif t.status == "present" and header_lossy:
        basis = "declared and measured"
    elif t.status == "present" and header_lossy is False:
        basis = "conflict"
    else:
        basis = "measured"
    ev.setdefault("basis", basis)
    return Trace(t.id, t.status, t.confidence, t.summary, t.estimates, ev, t.origin)
