"""Accuracy of the spectral traces on synthetic cases with a known truth.

Run: ``python -m bench.accuracy_spectral`` (about 1-3 minutes on two cores).

Every case is simulated with demo_data/synth.py (multi-coil complex acquisitions of
a head-like phantom with white k-space noise, sigma 0.005-0.03 of the peak, 1, 4 or
8 coils), processed with a known step, and analysed from its pixels. One pool of
raw-like cases (nothing applied; complex coil images or root-sum-of-squares
magnitudes) is the negative set of every trace; each trace has its own positives:

- zero_filling: k-space zero-padded by 1.25-4 (isotropic or per axis), RSS or
  single-coil magnitude. Estimate correct when each axis's padding factor is within
  5 %; the width error in k-space samples is reported too.
- kspace_filtering: a separable window (Hann, Hamming, Tukey 0.25-1, Fermi radius
  0.6-0.9, Gaussian 0.3-0.6) applied to k-space, with or without 2x zero-filling;
  complex or RSS. Estimate correct when the family is named.
- partial_fourier: one side removed beyond k_c for fractions 5/8, 6/8, 7/8 along
  rows or cols, with or without 2x zero-filling; complex or RSS. Estimate correct
  when the fraction is within 0.02.
- zero_filling false positives are also counted on 25 larger raw-like RSS images
  (160-256 samples, 1 or 4 frames), where the phantom's smooth texture roll-off
  near 0.2 cycles/sample can pass for an edge.
- resampling: scipy.ndimage.zoom by 1.1-2.0 on one or both axes, or
  scipy.ndimage.rotate by 5-45 degrees, orders 1 and 3, of RSS images. Estimate
  correct (zooms only) when each axis's factor is within 2 %.

The thresholds of the analysers were chosen on cases drawn with seed 2026; the
table is printed for seed 7, cases none of them was tuned on. The table it prints
is the one in the README.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import ndimage

from app.io.volume import Volume
from app.traces import kspace_filtering as kf
from app.traces import plan
from demo_data import synth

N_RAW = 100
N_POS = 100
N_LARGE = 25
SEED = 7


@dataclass
class Tally:
    """Counts of one trace's calls."""

    tp: int = 0
    fn: int = 0
    fp: int = 0
    tn: int = 0
    est_ok: int = 0
    est_n: int = 0
    groups: dict[str, list[int]] = field(default_factory=dict)
    extra: list[float] = field(default_factory=list)

    def positive(self, called: bool, group: str, est_ok: bool | None = None) -> None:
        self.tp += called
        self.fn += not called
        g = self.groups.setdefault(group, [0, 0])
        g[0] += called
        g[1] += 1
        if called and est_ok is not None:
            self.est_n += 1
            self.est_ok += bool(est_ok)

    def negative(self, called: bool) -> None:
        self.fp += called
        self.tn += not called


def _case_rng(i: int, salt: int) -> np.random.Generator:
    return np.random.default_rng([SEED, salt, i])


def _acquire(rng: np.random.Generator) -> tuple[np.ndarray, dict[str, Any]]:
    shape = (int(rng.integers(64, 129)), int(rng.integers(64, 129)))
    coils = int(rng.choice([1, 4, 8]))
    sigma = float(rng.uniform(0.005, 0.03))
    img = synth.acquire(shape, n_coils=coils, n_slices=4, sigma=sigma, seed=rng)
    return img, {"shape": shape, "coils": coils, "sigma": sigma}


def _volume(images: np.ndarray, complex_out: bool) -> Volume:
    if complex_out:
        return Volume.from_array(images.astype(np.complex64), coil_axis=1)
    return Volume.from_array(synth.rss(images, axis=1))


def _analyse(vol: Volume) -> dict[str, Any]:
    """The three spectral analysers through the analysis plan (with the shared
    spectrum, support and noise reference steps they declare), as a report runs
    them, before calibration and header reconciliation."""
    res = plan.execute(vol, only=["zero_filling", "kspace_filtering", "partial_fourier"],
                       extra_steps=["spectrum"])
    return {"spec": res.steps["spectrum"], "zf": res.traces["zero_filling"],
            "kf": res.traces["kspace_filtering"], "pf": res.traces["partial_fourier"]}


def _resampling_call(vol: Volume) -> Any:
    return plan.trace_of("resampling", vol)


def run_raw(tallies: dict[str, Tally]) -> None:
    for i in range(N_RAW):
        rng = _case_rng(i, 0)
        img, _ = _acquire(rng)
        vol = _volume(img, complex_out=bool(i % 3 == 0))
        res = _analyse(vol)
        tallies["zero_filling"].negative(res["zf"].status == "present")
        tallies["kspace_filtering"].negative(res["kf"].status == "present")
        tallies["partial_fourier"].negative(res["pf"].status == "present")
        tallies["resampling"].negative(_resampling_call(vol).status == "present")


def run_large_raw(calls: list[bool]) -> None:
    """Raw-like RSS images of 160-256 samples: zero-filling false positives at that size."""
    for i in range(N_LARGE):
        rng = _case_rng(i, 5)
        shape = (int(rng.integers(160, 257)),) * 2
        coils = int(rng.choice([1, 4, 8]))
        img = synth.acquire(shape, n_coils=coils, n_slices=int(rng.choice([1, 4])),
                            sigma=float(rng.uniform(0.005, 0.03)), seed=rng)
        calls.append(_analyse(_volume(img, complex_out=False))["zf"].status == "present")


def run_zero_filling(t: Tally, resampled_zf: list[bool], filtered_zf: list[bool]) -> None:
    for i in range(N_POS):
        rng = _case_rng(i, 1)
        img, meta = _acquire(rng)
        if i % 2:
            pad = (float(rng.uniform(1.25, 4.0)),) * 2
        else:
            pad = (float(rng.uniform(1.25, 4.0)), float(rng.uniform(1.25, 4.0)))
        acq = meta["shape"]
        out = (int(round(acq[0] * pad[0])), int(round(acq[1] * pad[1])))
        zfimg = synth.to_image(synth.zero_fill(synth.to_kspace(img), out))
        vol = _volume(zfimg, complex_out=False)
        res = _analyse(vol)
        tr = res["zf"]
        filtered_zf.append(res["kf"].status == "present")
        if i % 4 == 0:
            resampled_zf.append(_resampling_call(vol).status == "present")
        ok = True
        for k, ax in enumerate(("rows", "cols")):
            true_pad = out[k] / acq[k]
            est = tr.estimates[ax]["padding_factor"]
            ok &= abs(est - true_pad) <= 0.05 * true_pad
            if tr.status == "present":
                t.extra.append(abs(tr.estimates[ax]["support_fraction"] * out[k] - acq[k]))
        t.positive(tr.status == "present", "isotropic" if i % 2 else "per axis", ok)


def _window_case(rng: np.random.Generator) -> tuple[str, float | None]:
    fam = str(rng.choice(["hann", "hamming", "tukey", "fermi", "gaussian"]))
    par = {"hann": None, "hamming": None,
           "tukey": float(rng.uniform(0.25, 1.0)),
           "fermi": float(rng.uniform(0.6, 0.9)),
           "gaussian": float(rng.uniform(0.3, 0.6))}[fam]
    return fam, par


def run_kspace_filtering(t: Tally) -> None:
    for i in range(N_POS):
        rng = _case_rng(i, 2)
        img, meta = _acquire(rng)
        fam, par = _window_case(rng)
        shape = meta["shape"]
        k = synth.to_kspace(img)
        wy = kf.window_curve(fam, par, (np.arange(shape[0]) - shape[0] // 2) / (shape[0] / 2))
        wx = kf.window_curve(fam, par, (np.arange(shape[1]) - shape[1] // 2) / (shape[1] / 2))
        k = k * (wy[:, None] * wx[None, :])
        pad = 2.0 if i % 2 else 1.0
        out = (int(shape[0] * pad), int(shape[1] * pad))
        complex_out = i % 3 == 0
        res = _analyse(_volume(synth.to_image(synth.zero_fill(k, out)), complex_out))
        tr = res["kf"]
        group = ("complex" if complex_out else "RSS/magnitude")
        t.positive(tr.status == "present", group, tr.estimates["window"] == fam)


def run_partial_fourier(t: Tally) -> None:
    for i in range(N_POS):
        rng = _case_rng(i, 3)
        img, meta = _acquire(rng)
        frac = [5 / 8, 6 / 8, 7 / 8][i % 3]
        axis = int(rng.integers(0, 2))
        shape = meta["shape"]
        k = synth.to_kspace(img)
        n = shape[axis]
        c, kc = n // 2, int(round((frac - 0.5) * n))
        sel = [slice(None)] * 4
        low = rng.random() < 0.5
        sel[2 + axis] = slice(0, c - kc) if low else slice(c + kc + 1, None)
        k[tuple(sel)] = 0
        true_frac = (n - (c - kc) if low else c + kc + 1) / n
        pad = 2.0 if i % 4 >= 2 else 1.0
        out = (int(shape[0] * pad), int(shape[1] * pad))
        complex_out = i % 2 == 0
        res = _analyse(_volume(synth.to_image(synth.zero_fill(k, out)), complex_out))
        tr = res["pf"]
        ax = ("rows", "cols")[axis]
        ok = abs(tr.estimates[ax]["fraction"] - true_frac) <= 0.02
        t.positive(tr.status == "present", "complex" if complex_out else "RSS/magnitude", ok)
        if not complex_out and pad == 1.0:
            t.extra.append(float(res["zf"].status == "present"))


def run_resampling(t: Tally) -> None:
    for i in range(N_POS):
        rng = _case_rng(i, 4)
        img, _ = _acquire(rng)
        frames = list(synth.rss(img, axis=1))
        order = [1, 3][i % 2]
        if i % 4 < 2:
            both = rng.random() < 0.5
            z = float(rng.uniform(1.1, 2.0))
            zoom = (z, z) if both else ((1.0, z) if rng.random() < 0.5 else (z, 1.0))
            out = [ndimage.zoom(f, zoom, order=order) for f in frames]
            tr = _resampling_call(Volume.from_array(np.stack(out)))
            ok = True
            for k, ax in enumerate(("rows", "cols")):
                real = (out[0].shape[k] - 1) / (frames[0].shape[k] - 1) if zoom[k] != 1 else 1.0
                ok &= abs(tr.estimates[ax]["factor"] - real) <= 0.02 * real
            t.positive(tr.status == "present", f"zoom, order {order}", ok)
        else:
            angle = float(rng.uniform(5, 45))
            out = [ndimage.rotate(f, angle, order=order, reshape=False) for f in frames]
            tr = _resampling_call(Volume.from_array(np.stack(out)))
            t.positive(tr.status == "present", f"rotation, order {order}", None)


def _rate(a: int, b: int) -> str:
    return f"{a / b:6.1%} ({a}/{b})" if b else "   n/a"


def format_table(tallies: dict[str, Tally], resampled_zf: list[bool], filtered_zf: list[bool],
                 large_raw: list[bool], seconds: float) -> str:
    lines = [
        "Spectral traces on synthetic cases (bench/accuracy_spectral.py, seed "
        f"{SEED}; {N_RAW} shared raw-like negatives, {N_POS} positives per trace)",
        "",
        f"{'trace':<18}{'cases':>6}  {'true positives':<18}{'false positives':<18}"
        f"{'estimate correct (of called)':<30}",
    ]
    for name, t in tallies.items():
        n = t.tp + t.fn + t.fp + t.tn
        lines.append(f"{name:<18}{n:>6}  {_rate(t.tp, t.tp + t.fn):<18}"
                     f"{_rate(t.fp, t.fp + t.tn):<18}{_rate(t.est_ok, t.est_n):<30}")
        for g, (hit, tot) in t.groups.items():
            lines.append(f"{'':<18}{'':>6}    {g:<24}{_rate(hit, tot)}")
    zt = tallies["zero_filling"]
    if zt.extra:
        e = np.asarray(zt.extra)
        lines.append("")
        lines.append(f"zero_filling width error (k-space samples, per axis): median "
                     f"{np.median(e):.2f}, within 1 sample {np.mean(e <= 1):.1%}, "
                     f"within 3 samples {np.mean(e <= 3):.1%}")
    pt = tallies["partial_fourier"]
    if pt.extra:
        lines.append(f"zero_filling called present on unpadded partial-Fourier RSS images: "
                     f"{np.mean(pt.extra):.1%} ({int(np.sum(pt.extra))}/{len(pt.extra)})")
    if large_raw:
        lines.append(f"zero_filling called present on raw-like RSS images of 160-256 samples "
                     f"(1 or 4 frames): {np.mean(large_raw):.1%} ({int(np.sum(large_raw))}/"
                     f"{len(large_raw)})")
    if filtered_zf:
        lines.append(f"kspace_filtering called present on zero-filled unfiltered RSS images: "
                     f"{np.mean(filtered_zf):.1%} ({int(np.sum(filtered_zf))}/{len(filtered_zf)})")
    if resampled_zf:
        lines.append(f"resampling called present on zero-filled RSS images: "
                     f"{np.mean(resampled_zf):.1%} ({int(np.sum(resampled_zf))}/"
                     f"{len(resampled_zf)})")
    lines.append("partial_fourier on RSS/magnitude images without a strong step is "
                 "inconclusive (not counted as a positive call)")
    lines.append(f"run time {seconds:.0f} s")
    return "\n".join(lines)


def main() -> int:
    t0 = time.perf_counter()
    resampled_zf: list[bool] = []
    filtered_zf: list[bool] = []
    large_raw: list[bool] = []
    tallies = {name: Tally() for name in
               ("zero_filling", "kspace_filtering", "partial_fourier", "resampling")}
    steps: list[tuple[str, Callable[[], None]]] = [
        ("raw-like", lambda: run_raw(tallies)),
        ("zero_filling", lambda: run_zero_filling(tallies["zero_filling"], resampled_zf,
                                                  filtered_zf)),
        ("kspace_filtering", lambda: run_kspace_filtering(tallies["kspace_filtering"])),
        ("partial_fourier", lambda: run_partial_fourier(tallies["partial_fourier"])),
        ("resampling", lambda: run_resampling(tallies["resampling"])),
        ("large raw-like", lambda: run_large_raw(large_raw)),
    ]
    for name, step in steps:
        print(f"bench: {name} ...", file=sys.stderr, flush=True)
        step()
    print(format_table(tallies, resampled_zf, filtered_zf, large_raw,
                       time.perf_counter() - t0))
    return 0


if __name__ == "__main__":
    sys.exit(main())
