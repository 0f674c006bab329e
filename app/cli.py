"""The ``rawproof`` command.

Sub-commands: ``analyse`` (headless report), ``sampling`` (effective sampling
rate), ``serve``, ``worker``, ``users``, ``demo``, ``backup``, ``restore``.
Sub-commands register themselves in :data:`COMMANDS` from their modules.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable
from typing import Any

import app
from app.errors import InputError

EXIT_OK = 0
EXIT_BAD_INPUT = 2

# name -> (add_arguments(parser), run(args) -> int); filled by _load_commands
COMMANDS: dict[str, tuple[Callable[[argparse.ArgumentParser], None], Callable[[Any], int]]] = {}


def _error_object(exc: InputError) -> dict:
    return {"schema": "rawproof.report/1", "error": exc.to_dict()}


def _summary_table(report: dict) -> str:
    lines = [
        f"rawproof {report['tool_version']}  {report['input']['path']}",
        f"format {report['input']['format']}, {report['input']['n_files']} file(s), "
        f"shape {report['input']['shape']}, {report['input']['dtype']}, "
        f"{report['input']['domain']}, {report['input']['value_type']}",
        f"verdict: {report['verdict']}",
        "",
        f"{'trace':<24}{'status':<14}{'conf':>6}  summary",
    ]
    for tid, t in report["traces"].items():
        lines.append(f"{tid:<24}{t['status']:<14}{t['confidence']:>6.2f}  {t['summary']}")
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
    from app.traces.report import analyse_path

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
        if args.json:
            print(text)
        where = f" ({exc.path})" if exc.path else ""
        print(f"rawproof: cannot read input{where}: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    text = json.dumps(report, indent=2)
    if args.output:
        with open(args.output, "w", encoding="utf-8") as fh:
            fh.write(text + "\n")
    if args.json:
        print(text)
    elif not args.output:
        print(_summary_table(report))
    return EXIT_OK


COMMANDS["analyse"] = (_add_analyse, _run_analyse)


def _load_commands() -> None:
    """Import the modules that add further sub-commands (if they exist yet)."""
    import importlib

    for mod in (
        "app.sampling_cli",
        "app.web.cli",
        "app.store.cli",
        "app.demo_cli",
        "app.backup_cli",
    ):
        try:
            importlib.import_module(mod)
        except ModuleNotFoundError as exc:
            if exc.name != mod:
                raise


def build_parser() -> argparse.ArgumentParser:
    _load_commands()
    parser = argparse.ArgumentParser(
        prog="rawproof",
        description="Find traces of hidden processing in candidate MRI datasets. " + app.CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"rawproof {app.__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    for name, (add, _run) in COMMANDS.items():
        sp = sub.add_parser(name)
        add(sp)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    _add, run = COMMANDS[args.command]
    try:
        return int(run(args) or 0)
    except InputError as exc:
        print(f"rawproof: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # the reader of stdout went away (for example `| head`): not an error of ours
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":
    # Under ``python -m app.cli`` this file runs as ``__main__``, a second copy;
    # sub-command modules register into ``app.cli``, so run that one.
    from app.cli import main as _main

    sys.exit(_main())
