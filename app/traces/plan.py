"""The analysis plan: which shared steps exist, which analyser needs which, in what order.

A newcomer reads the whole analysis here. Shared steps are pure functions computed
once per Volume; analysers are pure functions ``analyse(volume, *, <needs>) -> Trace``.
Each names what it needs by its keyword-only parameters, and the plan hands it
those results:

==================  ===========================================  =======================
step                function                                     needs
==================  ===========================================  =======================
``header``          :func:`app.traces.header.header_step`        volume
``spectrum``        :func:`app.traces.spectrum.spectrum_step`    volume, scope, notes
``support``         :func:`app.traces.support.support_step`      spectrum, noise_reference?
``background``      :func:`app.traces.background.background_step`  volume, scope, notes
``value_kind``      :func:`app.traces.value_kind.value_kind_step`  volume, background
``jpeg_pixels``     :func:`app.traces.jpeg_pixels.jpeg_pixels_step`  volume, scope, notes
``noise_reference`` :func:`app.traces.noise_reference.noise_reference_step`  spectrum, background?
==================  ===========================================  =======================

``volume``, ``scope`` (the frames read, batch size, FFT workers, reader options)
and ``notes`` (sentences for the report's warnings) are the plan's own inputs.
The analysers, in report order, are listed in :data:`ANALYSERS`; their needs are
printed by ``python -m app.traces.plan``.

A step that cannot be computed for an input raises
:class:`~app.traces.base.StepUnavailableError` with a reason; analysers that need it
come out ``inconclusive`` with that reason. A need declared with a default of
``None`` is optional: the analyser gets ``None`` when the step failed.

Steps and analysers run on ``scope.workers`` threads (numpy and scipy release the
GIL in their array work): a task is started once every step it needs is done,
steps before analysers, so no task ever waits inside a thread.
"""

from __future__ import annotations

import inspect
import time
import traceback
from collections.abc import Callable, Mapping
from concurrent.futures import FIRST_COMPLETED, Future, ThreadPoolExecutor, wait
from dataclasses import dataclass
from typing import Any

from app.io.volume import Volume
from app.traces import (
    background,
    background_masking,
    base,
    coil_combination,
    header,
    intensity_quantization,
    jpeg_pixels,
    kspace_filtering,
    kspace_synthesis,
    lossy_compression,
    magnitude_only,
    noise_reference,
    partial_fourier,
    resampling,
    spectrum,
    support,
    value_kind,
    zero_filling,
)
from app.traces.context import Notes, Scope

#: The plan's own inputs: every step and analyser may name them.
INPUTS = ("volume", "scope", "notes")

#: Shared steps by name (see the module docstring's table).
STEPS: dict[str, Callable[..., Any]] = {
    "header": header.header_step,
    "spectrum": spectrum.spectrum_step,
    "support": support.support_step,
    "background": background.background_step,
    "value_kind": value_kind.value_kind_step,
    "jpeg_pixels": jpeg_pixels.jpeg_pixels_step,
    "noise_reference": noise_reference.noise_reference_step,
}

#: The analyser modules, in report order; each registers its ``analyse`` function.
ANALYSERS = (
    zero_filling,
    magnitude_only,
    coil_combination,
    background_masking,
    intensity_quantization,
    lossy_compression,
    resampling,
    kspace_filtering,
    partial_fourier,
    kspace_synthesis,
)


@dataclass(frozen=True)
class Need:
    """One thing a step or analyser takes: an input or a step, required or optional."""

    name: str
    optional: bool


def needs_of(func: Callable[..., Any]) -> tuple[Need, ...]:
    """What ``func`` takes, read from its signature (every parameter is a need).

    Raises
    ------
    ValueError
        When a parameter names neither an input nor a step.
    """
    out = []
    for name, par in inspect.signature(func).parameters.items():
        if name not in STEPS and name not in INPUTS:
            raise ValueError(f"{func.__module__}.{func.__name__} needs {name!r}, which is "
                             "neither a shared step nor a plan input")
        out.append(Need(name, par.default is None))
    return tuple(out)


def _step_closure(names: list[str]) -> list[str]:
    """``names`` and every step they need, dependencies first."""
    order: list[str] = []

    def visit(n: str, trail: tuple[str, ...]) -> None:
        if n in order or n in INPUTS:
            return
        if n in trail:
            raise ValueError(f"shared steps form a circle: {' -> '.join(trail + (n,))}")
        for need in needs_of(STEPS[n]):
            visit(need.name, trail + (n,))
        order.append(n)

    for n in names:
        visit(n, ())
    return order


def describe() -> str:
    """The plan as text: each step and analyser with what it needs."""
    lines = ["shared steps:"]
    for name, fn in STEPS.items():
        lines.append(f"  {name:<14} <- {', '.join(n.name for n in needs_of(fn))}")
    lines.append("analysers (report order):")
    for tid, an in analysers().items():
        needs = ", ".join(n.name + ("?" if n.optional else "") for n in needs_of(an.func))
        lines.append(f"  {tid:<24} <- {needs}")
    lines.append("(? marks an optional need: None when that step failed)")
    return "\n".join(lines)


def analysers() -> dict[str, base.Analyser]:
    """The registered analysers by trace id, in report order."""
    return base.registered()


class _Failed:
    """A step that raised: kept so that every analyser needing it says why."""

    def __init__(self, name: str, exc: BaseException) -> None:
        self.name = name
        self.exc = exc


def _call(func: Callable[..., Any], values: Mapping[str, Any]) -> Any:
    kwargs = {}
    for need in needs_of(func):
        v = values[need.name]
        if isinstance(v, _Failed):
            if not need.optional:
                raise v.exc
            v = None
        kwargs[need.name] = v
    return func(**kwargs)


def _failed_trace(tid: str, an: base.Analyser, exc: BaseException,
                  step: str | None = None) -> base.Trace:
    if isinstance(exc, base.StepUnavailableError):
        return base.inconclusive(tid, exc.reason)
    where = f"the shared step {step!r}" if step else f"the {tid} analyser"
    return base.inconclusive(
        tid, f"{where[0].upper()}{where[1:]} failed on this input: {exc}",
        error=f"{type(exc).__name__}: {exc}",
        traceback="".join(traceback.format_exception(exc, limit=4))[-2000:],
    )


def _checked(tid: str, an: base.Analyser, trace: base.Trace) -> base.Trace:
    if trace.id != tid:
        raise RuntimeError(f"analyser returned trace id {trace.id!r}")
    missing = set(an.default_estimates) - set(trace.estimates)
    if missing:
        raise RuntimeError(f"analyser left out required estimates {sorted(missing)}")
    return trace


def run(
    volume: Volume,
    scope: Scope,
    notes: Notes,
    *,
    only: list[str] | None = None,
    extra_steps: list[str] | None = None,
    progress: Callable[[str], None] | None = None,
) -> tuple[dict[str, base.Trace], dict[str, float], dict[str, Any]]:
    """Run the shared steps and the analysers over one Volume.

    Parameters
    ----------
    volume : Volume
    scope : Scope
    notes : Notes
    only : list of str, optional
        Trace ids to run (default: every registered analyser).
    extra_steps : list of str, optional
        Shared steps to compute and return even if no analyser run needs them.
    progress : callable, optional
        Called with each trace id when its analyser starts.

    Returns
    -------
    traces : dict
        Trace id -> :class:`~app.traces.base.Trace` (a failing analyser or step gives
        an ``inconclusive`` trace with the reason; nothing is raised).
    seconds : dict
        Trace id or step name -> seconds spent.
    steps : dict
        Step name -> result (or the exception it raised) for the steps computed.
    """
    registry = analysers()
    chosen = {tid: an for tid, an in registry.items() if only is None or tid in only}
    wanted = [n.name for an in chosen.values() for n in needs_of(an.func)]
    steps = _step_closure(wanted + list(extra_steps or []))
    values: dict[str, Any] = {"volume": volume, "scope": scope, "notes": notes}
    seconds: dict[str, float] = {}
    traces: dict[str, base.Trace] = {}

    def step_task(name: str) -> Any:
        t0 = time.perf_counter()
        try:
            return _call(STEPS[name], values)
        finally:
            seconds[name] = round(time.perf_counter() - t0, 4)

    def analyser_task(tid: str, an: base.Analyser) -> base.Trace:
        if progress:
            progress(tid)
        t0 = time.perf_counter()
        try:
            kwargs = {}
            for need in needs_of(an.func):
                v = values[need.name]
                if isinstance(v, _Failed):
                    if not need.optional:
                        return _failed_trace(tid, an, v.exc, v.name)
                    v = None
                kwargs[need.name] = v
            return _checked(tid, an, an.func(**kwargs))
        except Exception as exc:  # noqa: BLE001 - one failing analyser never sinks a report
            return _failed_trace(tid, an, exc)
        finally:
            seconds[tid] = round(time.perf_counter() - t0, 4)

    pending_steps = list(steps)
    pending_an = list(chosen)
    running: dict[Future, tuple[str, str]] = {}

    def ready(func: Callable[..., Any]) -> bool:
        return all(n.name in values for n in needs_of(func))

    with ThreadPoolExecutor(max_workers=max(1, scope.workers),
                            thread_name_prefix="analysis") as pool:
        while pending_steps or pending_an or running:
            # steps first: analysers wait for them, so they start as early as possible
            for name in [s for s in pending_steps if ready(STEPS[s])]:
                pending_steps.remove(name)
                running[pool.submit(step_task, name)] = ("step", name)
            for tid in [t for t in pending_an if ready(chosen[t].func)]:
                pending_an.remove(tid)
                running[pool.submit(analyser_task, tid, chosen[tid])] = ("trace", tid)
            if not running:  # cannot happen with a circle-free plan; never spin
                raise RuntimeError(f"plan stalled with {pending_steps + pending_an} pending")
            done, _ = wait(list(running), return_when=FIRST_COMPLETED)
            for fut in done:
                kind, name = running.pop(fut)
                if kind == "trace":
                    traces[name] = fut.result()
                    continue
                try:
                    values[name] = fut.result()
                except Exception as exc:  # noqa: BLE001 - kept for the analysers that need it
                    values[name] = _Failed(name, exc)
    ordered = {tid: traces[tid] for tid in chosen}
    return ordered, seconds, {s: (v.exc if isinstance(v, _Failed) else v)
                              for s, v in values.items() if s in steps}


@dataclass
class PlanResult:
    """What :func:`execute` computed for one Volume.

    Attributes
    ----------
    traces : dict
        Trace id -> Trace, in report order.
    notes : list of str
        The report's warnings (sorted).
    steps : dict
        Step name -> result, or the exception it raised.
    seconds : dict
        Trace id or step name -> seconds spent.
    """

    traces: dict[str, base.Trace]
    notes: list[str]
    steps: dict[str, Any]
    seconds: dict[str, float]


def execute(volume: Volume, *, only: list[str] | None = None,
            extra_steps: list[str] | None = None, workers: int = 1,
            max_frames: int | None = None, options: Mapping[str, Any] | None = None,
            progress: Callable[[str], None] | None = None) -> PlanResult:
    """Build the scope and notes of ``volume`` and :func:`run` the plan over it.

    For the report (:func:`app.traces.report.analyse_volume`), and for tests and
    scripts that look at some traces or steps only.
    """
    notes = Notes()
    scope = Scope.of(volume.n_slices, max_frames=max_frames, workers=workers,
                     options=options, notes=notes)
    traces, seconds, steps = run(volume, scope, notes, only=only, extra_steps=extra_steps,
                                 progress=progress)
    return PlanResult(traces, notes.sorted(), steps, seconds)


def trace_of(trace_id: str, volume: Volume, **kwargs: Any) -> base.Trace:
    """One analyser's trace for a Volume, with the shared steps it needs.

    Keyword arguments are those of :func:`execute`.
    """
    return execute(volume, only=[trace_id], **kwargs).traces[trace_id]


def step_of(name: str, volume: Volume, **kwargs: Any) -> Any:
    """One shared step's result for a Volume (raises what the step raised)."""
    out = execute(volume, only=[], extra_steps=[name], **kwargs).steps[name]
    if isinstance(out, BaseException):
        raise out
    return out


if __name__ == "__main__":  # pragma: no cover - a reading aid
    print(describe())
