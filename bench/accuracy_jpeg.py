"""Accuracy of the ``lossy_compression`` analyser on synthetic cases with known truth.

``python -m bench.accuracy_jpeg [--per-quality N] [--uncompressed N] [--seed S]``

JPEG cases: simulated magnitude MR images (demo_data/synth.py, root-sum-of-squares
of 1-8 coils at several noise levels, scaled to 8 bits) compressed by Pillow's
JPEG encoder (libjpeg) at qualities 10 to 95 in steps of 5, decoded, then
delivered one of three ways in turn: re-saved as PNG, cropped by 0-7 rows and
columns and re-saved as PNG, or linearly rescaled to uint16 (``round(a k + b)``).
Uncompressed cases: the same kind of images never JPEG-compressed, delivered as
float32, as uint16, quantised to 8 bits, zero-filled 2x (float and 8-bit), and
resampled with ``scipy.ndimage.zoom``.

JPEG 2000 cases: the same kind of images through Pillow's JPEG 2000 encoder
(OpenJPEG, irreversible 9/7, 10:1 and 20:1), re-saved as PNG: from the pixels
alone they must never be called JPEG; the table shows how many the wavelet
deadzone rule calls inconclusive.

Prints detection rates by quality, the quality error, the share with the right
block origin, the table entries measured per case (steps above 1) and the share
of them equal to libjpeg's table, and the false detections on uncompressed images.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy import ndimage

from app.io.volume import Volume
from app.traces.jpeg_tables import scaled_table
from app.traces.plan import trace_of
from demo_data import synth
from demo_data.synth import jpeg2000_round_trip as _jpeg2000
from demo_data.synth import jpeg_round_trip as _jpeg
from demo_data.synth import png_round_trip as _png

QUALITIES = list(range(10, 96, 5))
J2K_RATES = [10, 20]
SHAPES = [(128, 128), (160, 192), (192, 160), (256, 256)]


def _magnitude(rng: np.random.Generator) -> np.ndarray:
    shape = SHAPES[int(rng.integers(len(SHAPES)))]
    coils = int(rng.choice([1, 4, 8]))
    sigma = float(rng.choice([0.005, 0.01, 0.02, 0.04]))
    img = synth.rss(synth.acquire(shape, n_coils=coils, sigma=sigma, seed=rng), axis=1)[0]
    return img.astype(np.float64)


def _to8(img: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    peak = float(rng.uniform(180, 255))
    return np.clip(np.round(img / img.max() * peak), 0, 255).astype(np.uint8)





def _analyse(arr: np.ndarray) -> dict:
    vol = Volume.from_array(arr)
    return trace_of("lossy_compression", vol, workers=1).to_dict()


def _entries_ok(table: list | None, quality: int) -> tuple[int, int]:
    """(measured entries > 1, of which equal to libjpeg's table at ``quality``)."""
    if table is None:
        return 0, 0
    est = np.array([[np.nan if v is None else v for v in row] for row in table], dtype=float)
    m = np.isfinite(est) & (est > 1)
    return int(m.sum()), int(np.sum(est[m] == scaled_table(quality)[m]))


def run(per_quality: int, n_uncompressed: int, seed: int, n_j2k: int = 0
        ) -> tuple[list[dict], list[dict]]:
    rng = np.random.default_rng(seed)
    jpeg_rows = []
    for q in QUALITIES:
        for i in range(per_quality):
            dec = _jpeg(_to8(_magnitude(rng), rng), q)
            way = ("png", "crop+png", "uint16")[i % 3]
            origin = [0, 0]
            if way == "png":
                arr = _png(dec)
            elif way == "crop+png":
                dr, dc = (int(v) for v in rng.integers(0, 8, size=2))
                arr = _png(np.ascontiguousarray(dec[dr:, dc:]))
                origin = [(8 - dr) % 8, (8 - dc) % 8]
            else:
                a = float(rng.choice([4095 / 255, 65535 / 255, 7.3]))
                b = float(rng.integers(0, int(65535 - 255 * a) + 1))
                arr = np.round(a * dec.astype(np.float64) + b).astype(np.uint16)
            t = _analyse(arr)
            est = t["estimates"]
            jpeg_rows.append({
                "quality": q, "way": way, "detected": t["status"] == "present",
                "q_est": est["quality"], "origin_ok": est["block_origin"] == origin,
                "entries": _entries_ok(t["evidence"].get("estimated_table"), q),
            })
    kinds = ["float32", "uint16", "8-bit", "zero-filled float", "zero-filled 8-bit", "zoom 8-bit"]
    unc_rows = []
    for i in range(n_uncompressed):
        kind = kinds[i % len(kinds)]
        img = _magnitude(rng)
        if kind == "float32":
            arr = img.astype(np.float32)
        elif kind == "uint16":
            arr = np.round(img / img.max() * 4000).astype(np.uint16)
        elif kind == "8-bit":
            arr = _to8(img, rng)
        elif kind.startswith("zero-filled"):
            n = int(rng.choice([64, 96, 128]))
            mag, _ = synth.zero_filled_magnitude((n, n), (2.0, 2.0), n_coils=4, n_slices=1,
                                                 seed=rng)
            arr = mag[0] if kind.endswith("float") else _to8(mag[0].astype(np.float64), rng)
        else:
            z = float(rng.choice([1.5, 2.0, 0.75, 1.3]))
            arr = _to8(np.clip(ndimage.zoom(img, z, order=3), 0, None), rng)
        t = _analyse(arr)
        unc_rows.append({"kind": kind, "detected": t["status"] == "present",
                         "status": t["status"]})
    for i in range(n_j2k):
        rate = J2K_RATES[i % len(J2K_RATES)]
        t = _analyse(_png(_jpeg2000(_to8(_magnitude(rng), rng), rate)))
        unc_rows.append({"kind": f"JPEG 2000 {rate}:1", "detected": t["status"] == "present",
                         "status": t["status"]})
    return jpeg_rows, unc_rows


def _entries_cell(rows: list[dict]) -> str:
    n = sum(r["entries"][0] for r in rows)
    ok = sum(r["entries"][1] for r in rows)
    return f"{n / max(len(rows), 1):.1f}/{100 * ok / max(n, 1):.1f}%"


def report(jpeg_rows: list[dict], unc_rows: list[dict]) -> str:
    lines = ["JPEG cases (Pillow/libjpeg, greyscale; delivered as PNG, cropped PNG, "
             "uint16 rescale)",
             f"{'quality':>7} {'n':>4} {'detected':>9} {'q_found':>8} {'|dq| mean':>9} "
             f"{'|dq| max':>8} {'origin ok':>9} {'entries measured/ok':>20}"]
    for q in QUALITIES:
        rows = [r for r in jpeg_rows if r["quality"] == q]
        det = [r for r in rows if r["detected"]]
        qs = [r for r in det if r["q_est"] is not None]
        err = [abs(r["q_est"] - q) for r in qs]
        lines.append(
            f"{q:>7} {len(rows):>4} {100 * len(det) / len(rows):>8.1f}% "
            f"{len(qs):>8} {np.mean(err) if err else float('nan'):>9.2f} "
            f"{max(err) if err else float('nan'):>8} "
            f"{100 * np.mean([r['origin_ok'] for r in det]) if det else float('nan'):>8.1f}% "
            f"{_entries_cell(det):>20}")
    le90 = [r for r in jpeg_rows if r["quality"] <= 90]
    at95 = [r for r in jpeg_rows if r["quality"] == 95]
    lines.append(f"detected at quality <= 90: {sum(r['detected'] for r in le90)}/{len(le90)} "
                 f"({100 * np.mean([r['detected'] for r in le90]):.1f}%); at 95: "
                 f"{sum(r['detected'] for r in at95)}/{len(at95)} "
                 f"({100 * np.mean([r['detected'] for r in at95]):.1f}%)")
    lines.append("")
    lines.append("Uncompressed cases (must not be called JPEG); JPEG 2000 cases (Pillow/OpenJPEG, "
                 "from pixels alone: inconclusive or absent, never JPEG)")
    lines.append(f"{'kind':>18} {'n':>4} {'false det.':>10} {'absent':>7} {'inconcl.':>8}")
    for kind in dict.fromkeys(r["kind"] for r in unc_rows):
        rows = [r for r in unc_rows if r["kind"] == kind]
        lines.append(f"{kind:>18} {len(rows):>4} {sum(r['detected'] for r in rows):>10} "
                     f"{sum(r['status'] == 'absent' for r in rows):>7} "
                     f"{sum(r['status'] == 'inconclusive' for r in rows):>8}")
    unc = [r for r in unc_rows if not r["kind"].startswith("JPEG 2000")]
    fd = sum(r["detected"] for r in unc)
    lines.append(f"false detections on uncompressed: {fd}/{len(unc)} "
                 f"({100 * fd / len(unc):.1f}%); not absent: "
                 f"{sum(r['status'] != 'absent' for r in unc)}/{len(unc)}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--per-quality", type=int, default=12)
    ap.add_argument("--uncompressed", type=int, default=120)
    ap.add_argument("--jpeg2000", type=int, default=20)
    ap.add_argument("--seed", type=int, default=20261201)
    args = ap.parse_args(argv)
    t0 = time.perf_counter()
    jpeg_rows, unc_rows = run(args.per_quality, args.uncompressed, args.seed, args.jpeg2000)
    print(report(jpeg_rows, unc_rows))
    n = len(jpeg_rows) + len(unc_rows)
    print(f"{n} cases in {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
