"""``rawproof demo``: generate the invented demo lab and load it into a fresh data folder.

Writes the generated candidate files (demo_data/generate.py) under
``DATA/demo-sources``, creates the lab's accounts, registers each source as a
dataset through the store's service layer, runs every analysis synchronously,
then adds the lab's comments and decisions, so that the first page a newcomer
opens shows every kind of finding.
"""

from __future__ import annotations

import argparse
import importlib
import shutil
import sys
from pathlib import Path
from typing import Any

import app
from app.cli.common import Command
from app.errors import InputError


def _generator() -> Any:
    """Import demo_data.generate; in an editable install it sits beside the app package."""
    try:
        return importlib.import_module("demo_data.generate")
    except ModuleNotFoundError as exc:
        if exc.name not in ("demo_data", "demo_data.generate"):
            raise
    root = Path(app.__file__).resolve().parent.parent
    if not (root / "demo_data" / "generate.py").is_file():
        raise InputError("no_demo_data", "The demo generator (demo_data/) is not installed "
                         "with this copy of rawproof; run the command from a source checkout.")
    sys.path.insert(0, str(root))
    return importlib.import_module("demo_data.generate")


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("--data", default="rawproof-data",
                   help="data folder to create (default rawproof-data, as rawproof serve)")
    p.add_argument("--force", action="store_true",
                   help="delete an existing rawproof data folder there first")
    p.add_argument("--only", action="append", metavar="SLUG",
                   help="load only this demo source (repeatable; for quick trials)")
    p.add_argument("--quiet", action="store_true", help="print only the accounts at the end")


def _prepare_folder(data: Path, force: bool) -> None:
    if data.exists() and not data.is_dir():
        raise InputError("not_a_folder", f"{data} exists and is not a folder.", str(data))
    if data.is_dir() and any(data.iterdir()):
        if not force:
            raise InputError(
                "not_empty",
                f"The data folder {data} is not empty; choose another with --data, or add "
                "--force to delete it and start again.", str(data))
        if not ((data / "rawproof.sqlite3").is_file() or (data / "store").is_dir()):
            # --force replaces a rawproof data folder, never an arbitrary folder
            raise InputError(
                "not_a_data_folder",
                f"{data} is not empty and does not look like a rawproof data folder, so "
                "--force leaves it alone; choose an empty or new folder with --data.",
                str(data))
        from app.config import Settings
        from app.store.db import database

        # connections this process may hold to the old database file must not survive it
        database(Settings(data_dir=data.resolve())).engine.dispose()
        shutil.rmtree(data)
    data.mkdir(parents=True, exist_ok=True)


def load_demo(data_dir: Path, *, only: list[str] | None = None,
              say: Any = None) -> dict[str, Any]:
    """Generate the demo sources and load them into the (empty) data folder ``data_dir``.

    Returns the generator's manifest with each source's ``dataset_id`` and
    ``report_id`` added.
    """
    from app.config import Settings
    from app.store import migrate, service
    from app.store.db import session_scope
    from app.worker import run_inline

    say = say or (lambda _line: None)
    gen = _generator()
    settings = Settings(data_dir=data_dir.resolve())
    migrate.upgrade(settings)
    src_dir = settings.data_dir / "demo-sources"
    say(f"generating demo sources in {src_dir}")
    manifest = gen.generate(src_dir, only=only)
    with session_scope(settings) as s:
        users = {}
        for m in manifest["members"]:
            users[m["username"]] = service.create_user(
                s, m["username"], m["password"], admin=m["admin"], display_name=m["display_name"])
        for entry in manifest["sources"]:
            base = src_dir / entry["slug"]
            files = [(str(Path(f).relative_to(entry["slug"])), src_dir / f)
                     for f in entry["files"]]
            ds = service.create_dataset(
                s, settings, uploader=users[entry["uploader"]], name=entry["name"],
                source=entry["source"], licence=entry["licence"],
                description=entry["description"], intended_use=entry["intended_use"],
                files=files)
            entry["dataset_id"] = ds.id
            say(f"registered {entry['name']} ({len(files)} file(s) from {base})")
    say("running the analyses (synchronously)")
    ran = run_inline(settings)
    say(f"{ran} analysis job(s) finished")
    with session_scope(settings) as s:
        users = {m["username"]: service.get_user(s, m["username"]) for m in manifest["members"]}
        for entry in manifest["sources"]:
            ds = service.get_dataset(s, entry["dataset_id"])
            rep = service.get_current_report(s, ds.id)
            entry["report_id"] = rep.id if rep is not None else None
            if rep is not None:
                from app.web.evidence import warm_cache

                warm_cache(settings, rep.id, rep.data)
            for c in entry["comments"]:
                service.add_comment(s, dataset=ds, author=users[c["author"]], body=c["body"],
                                    trace_id=c["trace"])
            for dec in entry.get("earlier_decisions", []):
                service.record_decision(s, dataset=ds, reviewer=users[dec["reviewer"]],
                                        outcome=dec["outcome"], rationale=dec["rationale"])
            dec = entry["decision"]
            if dec is not None:
                service.record_decision(s, dataset=ds, reviewer=users[dec["reviewer"]],
                                        outcome=dec["outcome"], rationale=dec["rationale"])
    return manifest


def _run(args: Any) -> int:
    data = Path(args.data).expanduser()
    _prepare_folder(data, args.force)

    def say(line: str) -> None:
        if not args.quiet:
            print(f"rawproof demo: {line}", file=sys.stderr, flush=True)

    manifest = load_demo(data, only=args.only, say=say)
    lab = manifest["lab"]
    print(f"Demo lab loaded into {data.resolve()}: {lab['name']} (invented).")
    print(f"{len(manifest['sources'])} candidate datasets, analysed, with comments and decisions.")
    print("")
    print("Demo accounts (sign in with any of them):")
    for m in manifest["members"]:
        role = "lab admin" if m["admin"] else "member"
        print(f"  {m['username']:<10} password {m['password']:<26} {m['display_name']} [{role}]")
    print("")
    serve = "rawproof serve" + ("" if args.data == "rawproof-data" else f" --data {args.data}")
    print(f"Next: {serve}   and open the address it prints.")
    print(app.CAUTION)
    return 0


DEMO = Command("demo", "generate the invented demo lab into a fresh data folder", _add, _run)
