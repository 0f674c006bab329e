"""Run every registered analyser over a dataset and assemble the report contract.

The contract is in ``shared/REPORT_CONTRACT.md`` (schema ``rawproof.report/1``);
``app/schema/report.schema.json`` is its machine-checkable form.
"""

from __future__ import annotations

import functools
import importlib
import math
import pkgutil
import threading
import time
import traceback
from collections import deque
from collections.abc import Callable
from typing import Any

import numpy as np

import app
from app.io.volume import Volume
from app.perf import tune_allocator
from app.traces import base
from app.traces.context import AnalysisContext, SharedStepBusy, waiting_allowed

SCHEMA = "rawproof.report/1"
_SKIP = {"base", "context", "report", "previews", "jpeg_tables", "header"}
_SEVERITY = {"present": 2, "inconclusive": 1, "absent": 0}

ProgressFn = Callable[[str], None]


def analysers() -> dict[str, base.Analyser]:
    """Import every module of ``app.traces`` once and return the registry.

    A new analyser is one new module that calls :func:`app.traces.base.register`;
    nothing else needs to change.
    """
    _discover()
    return base.registered()


@functools.cache
def _discover() -> None:
    """Import the analyser modules (once per process: the package does not change)."""
    import app.traces as pkg

    for info in pkgutil.iter_modules(pkg.__path__):
        if info.name not in _SKIP and not info.name.startswith("_"):
            importlib.import_module(f"app.traces.{info.name}")


def analyser_versions() -> dict[str, str]:
    """Trace id -> analyser version, stored beside each report."""
    return {tid: a.version for tid, a in analysers().items()}


def verdict_of(traces: dict[str, dict]) -> str:
    """The contract's verdict rule.

    ``processed`` when any trace is present, ``raw-like`` when every trace is
    absent, else ``inconclusive``.
    """
    statuses = [t["status"] for t in traces.values()]
    if any(s == "present" for s in statuses):
        return "processed"
    if statuses and all(s == "absent" for s in statuses):
        return "raw-like"
    return "inconclusive"


_PLAIN = (int, str, bool, type(None))


def _jsonable(obj: Any) -> Any:
    """Turn numpy scalars/arrays and tuples into plain JSON values (NaN -> None)."""
    t = type(obj)
    if t is float:
        return obj if math.isfinite(obj) else None
    if t in _PLAIN:
        return obj
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        # evidence holds long lists of plain numbers: those skip the recursion
        out = []
        for v in obj:
            tv = type(v)
            if tv is float:
                out.append(v if math.isfinite(v) else None)
            elif tv in _PLAIN:
                out.append(v)
            else:
                out.append(_jsonable(v))
        return out
    if isinstance(obj, np.ndarray):
        if obj.dtype.kind in "biu":
            return obj.tolist()
        if obj.dtype.kind == "f" and np.isfinite(obj).all():
            return obj.tolist()
        return _jsonable(obj.tolist())
    if isinstance(obj, np.bool_ | bool):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating | float):
        f = float(obj)
        return None if not np.isfinite(f) else f
    if isinstance(obj, np.complexfloating | complex):
        return [float(obj.real), float(obj.imag)]
    return obj


def _header_section(volume: Volume) -> dict[str, Any]:
    from app.traces import header as header_mod

    declared, notes = header_mod.provenance(volume)
    return {"declared": declared, "notes": notes}


def _input_section(volume: Volume, path: str, fmt: str, n_files: int) -> dict[str, Any]:
    return {
        "path": path,
        "format": fmt,
        "n_files": int(n_files),
        "shape": list(volume.shape),
        "dtype": str(volume.dtype),
        "domain": volume.domain,
        "value_type": volume.value_type,
    }


def _run_threaded(registry: dict[str, Any], run_one: Callable[[str, Any], Any],
                  threads: int) -> dict[str, Any]:
    """Run ``run_one(tid, analyser)`` for every analyser on ``threads`` threads."""
    queue: deque[tuple[str, Any, bool]] = deque((t, a, False) for t, a in registry.items())
    lock = threading.Lock()
    done: dict[str, Any] = {}
    failure: list[BaseException] = []

    def lane() -> None:
        while True:
            with lock:
                if not queue or failure:
                    return
                tid, an, deferred = queue.popleft()
            waiting_allowed(deferred)
            try:
                done[tid] = run_one(tid, an)
            except SharedStepBusy:
                with lock:
                    queue.append((tid, an, True))
            except BaseException as exc:  # noqa: BLE001 - re-raised in the caller's thread
                with lock:
                    failure.append(exc)
            finally:
                waiting_allowed(True)

    pool = [threading.Thread(target=lane, name=f"analyser-{i}", daemon=True)
            for i in range(threads)]
    for th in pool:
        th.start()
    for th in pool:
        th.join()
    if failure:
        raise failure[0]
    return done


def analyse_volume(
    volume: Volume,
    *,
    path: str = "",
    fmt: str | None = None,
    n_files: int | None = None,
    workers: int = 2,
    max_frames: int | None = None,
    options: dict[str, Any] | None = None,
    progress: ProgressFn | None = None,
) -> dict[str, Any]:
    """Run every analyser over one Volume and return a contract report object.

    Parameters
    ----------
    volume : Volume
    path, fmt, n_files
        What the ``input`` section says; defaults from the Volume.
    workers : int
        Threads the analysers run on, and ``scipy.fft`` workers for the shared
        spectral step (1: one analyser after the other).
    max_frames : int, optional
        Analyse at most this many frames (evenly spaced); stated in ``warnings``.
    options : dict, optional
        Reader options passed on to analysers through the context.
    progress : callable, optional
        Called with one short line per analyser (the CLI prints it to stderr).

    Returns
    -------
    dict
        ``schema``, ``tool_version``, ``input``, ``verdict``, ``traces``,
        ``header``, ``warnings``, and ``timing`` (seconds per analyser).
    """
    ctx = AnalysisContext(
        volume, workers=workers, max_frames=max_frames, options=dict(options or {})
    )
    warnings: list[str] = []
    try:
        header = _header_section(volume)
    except Exception as exc:  # noqa: BLE001 - a header we cannot interpret is not fatal
        header = {"declared": {}, "notes": [f"header could not be interpreted: {exc}"]}
    ctx.options.setdefault("header_declared", header["declared"])
    registry = analysers()
    progress_lock = threading.Lock()
    started: set[str] = set()

    def run_one(tid: str, an: Any) -> tuple[dict, float]:
        if progress:
            with progress_lock:  # one line per analyser, also when it is run again
                if tid not in started:
                    started.add(tid)
                    progress(f"{volume.name or path}: {tid}")
        t0 = time.perf_counter()
        try:
            trace = an.func(volume, ctx)
            if trace.id != tid:
                raise RuntimeError(f"analyser returned trace id {trace.id!r}")
            missing = set(an.default_estimates) - set(trace.estimates)
            if missing:
                raise RuntimeError(f"analyser left out required estimates {sorted(missing)}")
        except Exception as exc:  # noqa: BLE001 - one failing analyser never sinks a report
            trace = base.inconclusive(
                tid,
                f"The {tid} analyser failed on this input: {exc}",
                error=f"{type(exc).__name__}: {exc}",
                traceback=traceback.format_exc(limit=4)[-2000:],
            )
        return _jsonable(trace.to_dict()), round(time.perf_counter() - t0, 4)

    # analysers are independent except for the shared steps behind ctx.cached, which
    # computes each once; numpy and scipy release the GIL in their array work, so a
    # second thread uses the second core. A thread does not wait for a shared step
    # that the other thread is computing: the analyser goes to the back of the
    # queue and is run again (waiting) after the rest.
    threads = max(1, min(int(workers), len(registry)))
    if threads > 1:
        done = _run_threaded(registry, run_one, threads)
    else:
        done = {tid: run_one(tid, an) for tid, an in registry.items()}
    traces = {tid: done[tid][0] for tid in registry}
    timing = {tid: done[tid][1] for tid in registry}
    # sorted: with analysers in threads, the order notes are added in is not fixed
    warnings.extend(sorted(ctx.notes))
    report = {
        "schema": SCHEMA,
        "tool_version": app.__version__,
        "input": _input_section(
            volume, path, fmt or volume.format, n_files or max(1, len(volume.source_files))
        ),
        "verdict": verdict_of(traces),
        "traces": traces,
        "header": _jsonable(header),
        "warnings": warnings,
        "caution": app.CAUTION,
        "analyser_versions": {tid: a.version for tid, a in registry.items()},
        "timing": timing,
    }
    return report


def combine_groups(
    group_reports: list[dict[str, Any]], *, path: str, fmt: str, n_files: int
) -> dict[str, Any]:
    """Merge per-group reports of a folder or archive into one contract report.

    Each top-level trace is the most severe one across groups (present over
    inconclusive over absent), with the group named in its summary and evidence,
    so the verdict rule still holds; every group's full report is kept under
    ``groups``.
    """
    if len(group_reports) == 1:
        rep = dict(group_reports[0])
        rep["input"] = dict(rep["input"], path=path, format=fmt, n_files=n_files)
        return rep
    traces: dict[str, dict] = {}
    for g in group_reports:
        gname = g.get("group", "")
        for tid, t in g["traces"].items():
            best = traces.get(tid)
            if (
                best is None
                or _SEVERITY[t["status"]] > _SEVERITY[best["status"]]
                or (
                    _SEVERITY[t["status"]] == _SEVERITY[best["status"]]
                    and t["confidence"] > best["confidence"]
                )
            ):
                merged = dict(t)
                merged["summary"] = f"[{gname}] {t['summary']}" if gname else t["summary"]
                merged["evidence"] = dict(t["evidence"], group=gname)
                traces[tid] = merged
    first = max(group_reports, key=lambda g: int(np.prod(g["input"]["shape"])))
    warnings = [f"[{g.get('group', '')}] {w}" for g in group_reports for w in g["warnings"]]
    notes = [f"[{g.get('group', '')}] {n}" for g in group_reports for n in g["header"]["notes"]]
    declared = {
        g.get("group", str(i)): g["header"]["declared"] for i, g in enumerate(group_reports)
    }
    return {
        "schema": SCHEMA,
        "tool_version": app.__version__,
        "input": dict(first["input"], path=path, format=fmt, n_files=n_files),
        "verdict": verdict_of(traces),
        "traces": traces,
        "header": {"declared": declared, "notes": notes},
        "warnings": warnings,
        "caution": app.CAUTION,
        "analyser_versions": first.get("analyser_versions", {}),
        "groups": group_reports,
    }


def analyse_path(
    path: str,
    *,
    domain: str | None = None,
    coil_axis: int | None = None,
    dataset: str | None = None,
    workers: int = 2,
    max_frames: int | None = None,
    limits: Any = None,
    progress: ProgressFn | None = None,
    previews: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """Read a file, folder or zip and return its contract report.

    With ``previews`` (a dict), each group's preview images (small uint8 slices
    and their log spectra, from :func:`app.traces.previews.make_previews`) are put
    in it under the group name, for the web app's slice viewer.

    Raises
    ------
    app.errors.InputError
        When the input cannot be read (the CLI turns it into exit code 2).
    """
    tune_allocator()
    from app.io import open_input
    from app.io.dicom import UndecodablePixelsError

    options = {"domain": domain, "coil_axis": coil_axis, "dataset": dataset}
    try:
        return _analyse_opened(
            open_input(path, domain=domain, coil_axis=coil_axis, dataset=dataset, limits=limits),
            path=path,
            workers=workers,
            max_frames=max_frames,
            options=options,
            progress=progress,
            previews=previews,
        )
    except UndecodablePixelsError as exc:
        return _header_only_report(exc, path=path, options=options, progress=progress)


class _UndecodedPixels:
    """Stands in for pixel data no installed decoder can read: any access raises."""

    def __init__(self, shape: tuple[int, ...], dtype: Any) -> None:
        self.shape = shape
        self.dtype = np.dtype(dtype)

    def __array__(self, *args: Any, **kwargs: Any) -> Any:
        return self[...]

    def __getitem__(self, item: Any) -> Any:
        raise RuntimeError(
            "the pixel data could not be decoded by the installed decoders; "
            "only the header was analysed"
        )


def _header_only_report(
    exc: Any, *, path: str, options: dict[str, Any], progress: ProgressFn | None
) -> dict[str, Any]:
    """A report from the header alone, for a file whose pixels cannot be decoded.

    Pixel analysers come out ``inconclusive`` (they cannot read a sample); the
    header's declarations (for example a lossy JPEG transfer syntax with its stored
    quantisation table) still reach the report.
    """
    fields = exc.header.fields
    rows, cols = int(fields.get("rows") or 1), int(fields.get("columns") or 1)
    frames = int(fields.get("number_of_frames") or 1)
    bits = int(fields.get("bits_allocated") or 16)
    dtype = np.uint8 if bits <= 8 else np.uint16
    shape = (frames, rows, cols) if frames > 1 else (rows, cols)
    vol = Volume.from_array(
        _UndecodedPixels(shape, dtype),
        format="dicom",
        source_files=[str(path)],
        header=exc.header,
        name=str(path).rsplit("/", 1)[-1],
    )
    rep = analyse_volume(
        vol,
        path=path,
        fmt="dicom",
        n_files=1,
        options={**options, "pixels_decoded": False},
        progress=progress,
    )
    rep["warnings"].insert(0, f"pixels not decoded: {exc.message}")
    return rep


def _analyse_opened(
    opened: Any,
    *,
    path: str,
    workers: int,
    max_frames: int | None,
    options: dict[str, Any],
    progress: ProgressFn | None,
    previews: dict[str, Any] | None,
) -> dict[str, Any]:
    with opened as loaded:
        group_reports = []
        for vol in loaded.volumes:
            rep = analyse_volume(
                vol,
                path=path,
                fmt=vol.format,
                n_files=max(1, len(vol.source_files)),
                workers=workers,
                max_frames=max_frames,
                options=options,
                progress=progress,
            )
            rep["group"] = vol.name or vol.format
            rep["source_files"] = [str(f) for f in vol.source_files[:50]]
            group_reports.append(rep)
            if previews is not None:
                from app.traces.previews import make_previews

                previews[rep["group"]] = make_previews(vol)
        report = combine_groups(group_reports, path=path, fmt=loaded.format, n_files=loaded.n_files)
        report["warnings"] = list(loaded.warnings) + report["warnings"]
    return report
