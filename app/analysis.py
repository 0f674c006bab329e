"""The analysis entry point: a file, folder or zip in, one contract report out.

What an entry point does before and around the pure analysis lives here, not in
:mod:`app.traces`: opening the input (:func:`app.io.open_input`), the header-only
report for pixels no installed decoder reads, the slice previews of the web
app's viewer, and the process's allocator tuning. ``rawproof analyse``, the
worker, the benchmarks and the validation all call :func:`analyse_path`.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from app.io import open_input
from app.io.dicom import UndecodablePixelsError
from app.io.volume import Volume
from app.perf import tune_allocator
from app.traces.previews import make_previews
from app.traces.report import ProgressFn, analyse_volume, combine_groups


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
                previews[rep["group"]] = make_previews(vol)
        report = combine_groups(group_reports, path=path, fmt=loaded.format, n_files=loaded.n_files)
        report["warnings"] = list(loaded.warnings) + report["warnings"]
    return report
