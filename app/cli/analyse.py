"""The ``analyse`` sub-command: the headless report of one file, folder or archive.

    rawproof analyse PATH [--json] [-o FILE] [--domain image|kspace] [--coil-axis N]
                     [--dataset KEY] [--workers N] [--max-frames N] [--quiet]

It runs the same readers and analysers as the web app, without the database.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

import app
from app.cli.common import EXIT_BAD_INPUT, EXIT_OK, Command
from app.errors import InputError


def _error_object(exc: InputError) -> dict:
    return {"schema": "rawproof.report/1", "error": exc.to_dict()}


def _summary_table(report: dict) -> str:
    from app.methods import plain_answer, status_word, trace_label, usual_effective

    lines = [
        f"rawproof {report['tool_version']}  {report['input']['path']}",
        f"format {report['input']['format']}, {report['input']['n_files']} file(s), "
        f"shape {report['input']['shape']}, {report['input']['dtype']}, "
        f"{report['input']['domain']}, {report['input']['value_type']}",
        f"verdict: {report['verdict']}",
        "",
        plain_answer(report, effective=usual_effective(report))["text"],
        "",
        f"{'trace':<24}{'id':<24}{'status':<14}{'conf':>6}  analyser's note",
    ]
    for tid, t in report["traces"].items():
        lines.append(f"{trace_label(tid):<24}{tid:<24}{status_word(t['status']):<14}"
                     f"{t['confidence']:>6.2f}  {t['summary']}")
    for note in report["header"].get("notes", []):
        lines.append(f"header: {note}")
    for w in report.get("warnings", []):
        lines.append(f"warning: {w}")
    if len(report.get("groups", [])) > 1:
        lines.append(f"groups: {', '.join(g.get('group', '?') for g in report['groups'])}")
    lines.append("")
    lines.append(app.CAUTION)
    return "\n".join(lines)


def _add_analyse(p: argparse.ArgumentParser) -> None:
    p.add_argument("path", help="file, folder or .zip")
    p.add_argument("--json", action="store_true", help="print the report contract as JSON")
    p.add_argument("-o", "--output", help="write the report to this file")
    p.add_argument("--domain", choices=["image", "kspace"], help="override the array domain")
    p.add_argument("--coil-axis", type=int, help="axis of a multi-coil array that holds channels")
    p.add_argument("--dataset", help="HDF5 dataset key")
    p.add_argument("--workers", type=int, default=2,
                   help="threads for the analysers and their FFTs (default 2)")
    p.add_argument("--max-frames", type=int, help="analyse at most N evenly spaced frames")
    p.add_argument("--quiet", action="store_true", help="no progress on stderr")


def _run_analyse(args: Any) -> int:
    from app.analysis import analyse_path

    def progress(line: str) -> None:
        if not args.quiet:
            print(f"rawproof: {line}", file=sys.stderr, flush=True)

    try:
        report = analyse_path(
            args.path,
            domain=args.domain,
            coil_axis=args.coil_axis,
            dataset=args.dataset,
            workers=args.workers,
            max_frames=args.max_frames,
            progress=progress,
        )
    except InputError as exc:
        obj = _error_object(exc)
        text = json.dumps(obj, indent=2)
        if args.output:
            with open(args.output, "w", encoding="utf-8") as fh:
                fh.write(text + "\n")
        if args.json and not args.output:
            print(text)
        where = f" ({exc.path})" if exc.path else ""
        print(f"rawproof: cannot read input{where}: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    text = json.dumps(report, indent=2)
    if args.output:
        with open(args.output, "w", encoding="utf-8") as fh:
            fh.write(text + "\n")
    if args.output:
        # the report goes to the file only; a short line says where
        print(f"rawproof: report written to {args.output} (verdict: {report['verdict']})",
              file=sys.stderr)
    elif args.json:
        print(text)
    else:
        print(_summary_table(report))
    return EXIT_OK


ANALYSE = Command("analyse", "the report of one file, folder or .zip (no database)",
                  _add_analyse, _run_analyse)
