"""rawproof's performance benchmark: ratios against the physical floor, in one run.

``python -m bench [--quick] [--only analysis,series,upload,pages,probe] [--out FILE]``
prints a table and writes it as JSON (default ``bench/results/latest.json``).
Every row is measured in this run; each measurement is repeated and the median
reported, so machine-to-machine differences cancel in the ratios.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from bench import volumes

ROOT = Path(__file__).resolve().parent.parent
SIZES = [(256, 256, 32), (256, 256, 128), (256, 256, 512), (512, 512, 64)]


def _measure(kind: str, path: Path) -> dict:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    out = subprocess.run(
        [sys.executable, "-m", "bench._measure", kind, str(path)],
        capture_output=True,
        text=True,
        check=True,
        env=env,
        cwd=ROOT,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def _median_of(kind: str, path: Path, repeats: int) -> dict:
    runs = [_measure(kind, path) for _ in range(repeats)]
    best = dict(runs[0])
    best["seconds"] = statistics.median(r["seconds"] for r in runs)
    best["peak_rss_bytes"] = max(r["peak_rss_bytes"] for r in runs)
    return best


def bench_analysis(work: Path, repeats: int, sizes: list[tuple[int, int, int]]) -> list[dict]:
    rows = []
    for r, c, s in sizes:
        vol = volumes.magnitude_volume(r, c, s)
        nbytes = vol.nbytes
        nii = volumes.write_nifti(vol, work / f"v_{r}x{c}x{s}.nii")
        dcm = work / f"dcm_{r}x{c}x{s}"
        volumes.write_dicom_series(vol, dcm)
        del vol
        for fmt, path in (("nifti", nii), ("dicom", dcm)):
            floor = _median_of("floor", path, repeats)
            full = _median_of("analyse", path, repeats)
            rows.append(
                {
                    "row": "analysis",
                    "format": fmt,
                    "shape": [s, r, c],
                    "volume_bytes": nbytes,
                    "floor_s": round(floor["seconds"], 3),
                    "analyse_s": round(full["seconds"], 3),
                    "ratio": round(full["seconds"] / floor["seconds"], 2),
                    "peak_rss_mb": round(full["peak_rss_bytes"] / 2**20, 1),
                    "memory_budget_mb": round((2 * nbytes + 300 * 2**20) / 2**20, 1),
                    "memory_ok": full["peak_rss_bytes"] < 2 * nbytes + 300 * 2**20,
                    "verdict": full.get("verdict"),
                    "present": full.get("present"),
                    "warnings": full.get("warnings"),
                }
            )
            print(_fmt_row(rows[-1]), flush=True)
    return rows


def scaling(rows: list[dict]) -> list[dict]:
    """Fit log(time) and log(memory) against log(slices) for the 256 x 256 rows."""
    out = []
    for fmt in ("nifti", "dicom"):
        pts = [
            (r["shape"][0], r["analyse_s"], r["peak_rss_mb"], r["floor_s"])
            for r in rows
            if r["format"] == fmt and r["shape"][1:] == [256, 256]
        ]
        if len(pts) < 2:
            continue
        n = np.log([p[0] for p in pts])
        t_exp = float(np.polyfit(n, np.log([p[1] for p in pts]), 1)[0])
        m_exp = float(np.polyfit(n, np.log([p[2] for p in pts]), 1)[0])
        # the floor's own exponent: read-plus-FFT has a fixed part too, so a constant
        # ratio to it gives this exponent, not 1
        f_exp = float(np.polyfit(n, np.log([p[3] for p in pts]), 1)[0])
        same = [r for r in rows if r["format"] == fmt]
        out.append(
            {
                "row": "scaling",
                "format": fmt,
                "slices": [p[0] for p in pts],
                "time_exponent": round(t_exp, 3),
                "floor_time_exponent": round(f_exp, 3),
                "memory_exponent": round(m_exp, 3),
                "verdicts_agree": len({r["verdict"] for r in same}) == 1,
                "findings_agree": len({tuple(r["present"] or ()) for r in same}) == 1,
            }
        )
        print(_fmt_row(out[-1]), flush=True)
    return out


def bench_series_read(work: Path, repeats: int, n_files: int = 500) -> dict:
    import pydicom

    folder = work / "series500"
    volumes.write_dicom_series(volumes.magnitude_volume(256, 256, n_files), folder)
    files = sorted(folder.glob("*.dcm"))

    def plain() -> None:
        for f in files:
            pydicom.dcmread(f).pixel_array  # noqa: B018 - the read is the work

    from app.io import open_input

    def ours() -> None:
        # the reader stacks every slice's stored values into one array: that is the
        # work comparable to the loop's pixel_array per file (no further copy)
        with open_input(folder) as loaded:
            for vol in loaded.volumes:
                np.asarray(vol.data)

    t_plain, t_ours = [], []
    for _ in range(repeats):
        for fn, acc in ((plain, t_plain), (ours, t_ours)):
            t0 = time.perf_counter()
            fn()
            acc.append(time.perf_counter() - t0)
    row = {
        "row": "series_read",
        "files": n_files,
        "pydicom_loop_s": round(statistics.median(t_plain), 3),
        "rawproof_s": round(statistics.median(t_ours), 3),
    }
    row["ratio"] = round(row["rawproof_s"] / row["pydicom_loop_s"], 2)
    print(_fmt_row(row), flush=True)
    return row


def _fmt_row(row: dict) -> str:
    keys = [k for k in row if k not in ("warnings",)]
    return "  ".join(f"{k}={row[k]}" for k in keys)


def markdown_table(result: dict) -> str:
    lines = [f"cores: {result['cores']}; command: `{result['command']}`", ""]
    ana = [r for r in result["rows"] if r["row"] == "analysis"]
    if ana:
        lines += [
            "| volume | format | floor s | analyse s | ratio (target <= 5) | peak RSS MB "
            "| budget MB | verdict |",
            "|---|---|---|---|---|---|---|---|",
        ]
        for r in ana:
            lines.append(
                f"| {'x'.join(map(str, r['shape']))} | {r['format']} | {r['floor_s']} | "
                f"{r['analyse_s']} | {r['ratio']} | {r['peak_rss_mb']} | {r['memory_budget_mb']} | "
                f"{r['verdict']} |"
            )
        lines.append("")
    for r in result["rows"]:
        if r["row"] == "scaling":
            lines.append(
                f"- scaling ({r['format']}, slices {r['slices']}): time exponent "
                f"{r['time_exponent']} (the floor's own: {r.get('floor_time_exponent')}), "
                f"memory exponent {r['memory_exponent']} (target 0.9-1.1 for time); "
                f"verdicts agree: {r['verdicts_agree']}, findings agree: "
                f"{r.get('findings_agree')}"
            )
        elif r["row"] == "series_read":
            lines.append(
                f"- DICOM series read, {r['files']} files: rawproof {r['rawproof_s']} s vs "
                f"pydicom loop {r['pydicom_loop_s']} s, ratio {r['ratio']} (target <= 1.3)"
            )
        elif r["row"] == "upload":
            lines.append(
                f"- upload {r['megabytes']} MB: {r['upload_mb_s']} MB/s vs disk write "
                f"{r['disk_mb_s']} MB/s, ratio {r['ratio']} (target >= 0.5); server peak RSS "
                f"{r['server_peak_rss_mb']} MB (target < 200)"
            )
        elif r["row"] == "probe":
            lines.append(
                f"- bias probe, {'x'.join(map(str, r['shape']))} at R = {r['acceleration']:g} "
                f"({r['family']} lines): {r['seconds']} s (target < {r['target_s']:g} s), "
                f"NRMSE gap {r['gap_nrmse']}"
            )
        elif r["row"] == "pages":
            lines.append(
                f"- {r['page']} ({r['datasets']} datasets, {r['clients']} clients, "
                f"{r.get('processes', 1)} server process(es), {r['requests']} "
                f"requests): median {r['median_ms']} ms, p95 {r['p95_ms']} ms (target p95 < 200)"
            )
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m bench")
    ap.add_argument("--quick", action="store_true", help="small sizes, one repeat (a smoke run)")
    ap.add_argument("--only", default="analysis,series,upload,pages,probe")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--out", default=str(ROOT / "bench" / "results" / "latest.json"))
    args = ap.parse_args(argv)
    parts = set(args.only.split(","))
    repeats = 1 if args.quick else args.repeats
    result = {
        "cores": os.cpu_count(),
        "command": "python -m bench " + " ".join(argv or sys.argv[1:]),
        "rows": [],
    }
    print(f"cores: {result['cores']}", flush=True)
    with tempfile.TemporaryDirectory(prefix="rawproof-bench-") as tmp:
        work = Path(tmp)
        if "analysis" in parts:
            sizes = [(128, 128, 16), (128, 128, 64)] if args.quick else SIZES
            ana = bench_analysis(work, repeats, sizes)
            result["rows"] += ana + scaling(ana)
        if "series" in parts:
            result["rows"].append(bench_series_read(work, repeats, 50 if args.quick else 500))
        if "upload" in parts or "pages" in parts:
            from bench import web_bench

            if "upload" in parts:
                result["rows"].append(web_bench.bench_upload(work, 64 if args.quick else 1024))
            if "pages" in parts:
                result["rows"] += web_bench.bench_pages(
                    work, 50 if args.quick else 1000, requests_per_client=10 if args.quick else 40
                )
        if "probe" in parts:
            from bench.probe_bench import bench_probe

            result["rows"].append(bench_probe(work, repeats))
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(result, indent=2))
    print()
    print(markdown_table(result))
    print(f"\nwritten: {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
