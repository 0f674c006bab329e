"""The in-sample set: cases from the development generator (demo_data/synth.py).

The case kinds follow the builders of bench/accuracy_spectral.py,
bench/accuracy_noise.py and bench/accuracy_jpeg.py (head-like ellipse phantom,
smooth coil maps, white k-space noise), written as files through
demo_data/writers.py and wrapped in the shared :class:`bench.validate.Case` API.
This is the family the analysers' thresholds were tuned on: its figures are
in-sample by construction, and calibration maps may be fitted on it.

Each case states the truth it was built with. Every trace a kind does not touch
is ``absent`` (the step was not applied); ``unknown`` is used where the built
data leave a trace undefined (the noise law of a masked background).
"""

from __future__ import annotations

import functools
import sys
from pathlib import Path
from typing import Any

import numpy as np
from scipy import ndimage

from bench.cases import TRACE_IDS, Case, make_truth

SEED = 2026


def _rng(kind: str, i: int) -> np.random.Generator:
    return np.random.default_rng([SEED, sum(map(ord, kind)), i])


def _truth(params: dict | None = None, *, origin: dict[str, str] | None = None,
           **present: str) -> dict:
    traces = {tid: "absent" for tid in TRACE_IDS}
    traces.update(present)
    return make_truth(traces, params=params, origin=origin)


def _acquire(rng: np.random.Generator, coils: int, slices: int = 3,
             shape: tuple[int, int] | None = None, sigma: float | None = None) -> np.ndarray:
    from demo_data import synth

    shape = shape or (int(rng.integers(80, 129)), int(rng.integers(80, 129)))
    sigma = float(rng.uniform(0.006, 0.025)) if sigma is None else sigma
    return synth.acquire(shape, n_coils=coils, n_slices=slices, sigma=sigma, seed=rng)


def _save_npy(folder: Path, arr: np.ndarray, **kwargs: Any) -> tuple[str, dict]:
    from demo_data.writers import write_npy

    path = folder / "case.npy"
    write_npy(path, np.ascontiguousarray(arr))
    return str(path), kwargs


def _window(family: str, param: float | None, n: int) -> np.ndarray:
    """A 1-D apodisation window over centred k-space indices (common practice, no source)."""
    x = np.abs((np.arange(n) - n // 2) / (n / 2))
    if family == "hann":
        return 0.5 * (1 + np.cos(np.pi * np.clip(x, 0, 1)))
    if family == "hamming":
        return 0.54 + 0.46 * np.cos(np.pi * np.clip(x, 0, 1))
    if family == "tukey":
        a = float(param)
        flat = 1 - a
        return np.where(x <= flat, 1.0, 0.5 * (1 + np.cos(np.pi * np.clip(x - flat, 0, a) / a)))
    if family == "fermi":
        return 1.0 / (1.0 + np.exp((x - float(param)) / 0.04))
    if family == "gaussian":
        return np.exp(-(x**2) / (2 * float(param) ** 2))
    raise ValueError(family)


def _rss(img: np.ndarray) -> np.ndarray:
    from demo_data import synth

    return synth.rss(img, axis=1)


def _object_mask(mag: np.ndarray) -> np.ndarray:
    out = np.empty(mag.shape, dtype=bool)
    for i, m in enumerate(mag):
        sm = ndimage.gaussian_filter(m.astype(np.float64), 2.0)
        obj = ndimage.binary_fill_holes(sm > 0.12 * float(sm.max()))
        out[i] = ndimage.binary_dilation(obj, iterations=2)
    return out


# --------------------------------------------------------------------------- builders
# Each builder is (kind, index, folder) -> (path, kwargs); the truth is computed
# by the matching ``_truth_*`` from the same random draws (see ``_KINDS``).

def _b_raw_complex(i: int, folder: Path) -> tuple[str, dict]:
    rng = _rng("raw_complex", i)
    coils = int(rng.choice([4, 8]))
    return _save_npy(folder, _acquire(rng, coils).astype(np.complex64), coil_axis=1)


def _b_raw_single(i: int, folder: Path) -> tuple[str, dict]:
    rng = _rng("raw_single", i)
    return _save_npy(folder, _acquire(rng, 1)[:, 0].astype(np.complex64))


def _b_raw_kspace(i: int, folder: Path) -> tuple[str, dict]:
    from demo_data import synth

    rng = _rng("raw_kspace", i)
    coils = int(rng.choice([4, 8]))
    k = synth.to_kspace(_acquire(rng, coils)).astype(np.complex64)
    return _save_npy(folder, k, domain="kspace", coil_axis=1)


def _b_real_signed(i: int, folder: Path) -> tuple[str, dict]:
    from demo_data import synth

    rng = _rng("real_signed", i)
    shape = (int(rng.integers(80, 129)),) * 2
    obj = np.stack([synth.phantom(shape, seed=rng, smooth_phase=False).real for _ in range(3)])
    noise = synth.complex_noise(obj.shape, float(rng.uniform(0.006, 0.025)), rng)
    return _save_npy(folder, (obj + noise).real.astype(np.float32))


def _zf_draw(i: int) -> tuple[np.random.Generator, int, tuple[float, float], bool]:
    rng = _rng("zero_filling", i)
    coils = int(rng.choice([1, 4, 8]))
    if i % 2:
        pad = (float(rng.uniform(1.25, 3.0)),) * 2
    else:
        pad = (float(rng.uniform(1.25, 3.0)), float(rng.uniform(1.25, 3.0)))
    return rng, coils, pad, i % 4 == 3


def _zf_shapes(acq: tuple[int, int], pad: tuple[float, float]) -> tuple[int, int]:
    return (int(round(acq[0] * pad[0])), int(round(acq[1] * pad[1])))


def _b_zero_filling(i: int, folder: Path) -> tuple[str, dict]:
    from demo_data import synth

    rng, coils, pad, complex_out = _zf_draw(i)
    acq = (int(rng.integers(56, 97)), int(rng.integers(56, 97)))
    img = _acquire(rng, coils, shape=acq)
    zf = synth.to_image(synth.zero_fill(synth.to_kspace(img), _zf_shapes(acq, pad)))
    if complex_out:
        return _save_npy(folder, zf.astype(np.complex64), coil_axis=1)
    return _save_npy(folder, _rss(zf))


def _t_zero_filling(i: int) -> dict:
    rng, coils, pad, complex_out = _zf_draw(i)
    acq = (int(rng.integers(56, 97)), int(rng.integers(56, 97)))
    out = _zf_shapes(acq, pad)
    params = {"zero_filling.rows.padding_factor": out[0] / acq[0],
              "zero_filling.cols.padding_factor": out[1] / acq[1]}
    if complex_out:
        return _truth(params, zero_filling="present")
    return _truth(params, zero_filling="present", magnitude_only="present",
                  coil_combination="present" if coils > 1 else "absent")


_WINDOWS = ("hann", "hamming", "tukey", "fermi", "gaussian")


def _kf_draw(i: int) -> tuple[np.random.Generator, str, float | None, float, bool, int]:
    rng = _rng("kspace_filtering", i)
    fam = _WINDOWS[i % len(_WINDOWS)]
    par = {"hann": None, "hamming": None, "tukey": float(rng.uniform(0.3, 1.0)),
           "fermi": float(rng.uniform(0.6, 0.9)), "gaussian": float(rng.uniform(0.3, 0.6))}[fam]
    pad = 2.0 if i % 2 else 1.0
    complex_out = i % 3 == 0
    coils = int(rng.choice([1, 4, 8]))
    return rng, fam, par, pad, complex_out, coils


def _b_kspace_filtering(i: int, folder: Path) -> tuple[str, dict]:
    from demo_data import synth

    rng, fam, par, pad, complex_out, coils = _kf_draw(i)
    img = _acquire(rng, coils)
    ny, nx = img.shape[-2:]
    k = synth.to_kspace(img) * (_window(fam, par, ny)[:, None] * _window(fam, par, nx)[None, :])
    out = synth.to_image(synth.zero_fill(k, (int(ny * pad), int(nx * pad))))
    if complex_out:
        return _save_npy(folder, out.astype(np.complex64), coil_axis=1)
    return _save_npy(folder, _rss(out))


def _t_kspace_filtering(i: int) -> dict:
    _, fam, _, pad, complex_out, coils = _kf_draw(i)
    present = {"kspace_filtering": "present"}
    params: dict[str, Any] = {"kspace_filtering.window": fam}
    if pad > 1:
        present["zero_filling"] = "present"
        params["zero_filling.rows.padding_factor"] = pad
        params["zero_filling.cols.padding_factor"] = pad
    if not complex_out:
        present["magnitude_only"] = "present"
        present["coil_combination"] = "present" if coils > 1 else "absent"
    return _truth(params, **present)


def _pf_draw(i: int) -> tuple[np.random.Generator, float, int, bool, float, bool, int]:
    rng = _rng("partial_fourier", i)
    frac = (5 / 8, 6 / 8, 7 / 8)[i % 3]
    axis = int(rng.integers(0, 2))
    low = bool(rng.random() < 0.5)
    pad = 2.0 if i % 4 >= 2 else 1.0
    complex_out = i % 2 == 0
    coils = int(rng.choice([1, 4, 8]))
    return rng, frac, axis, low, pad, complex_out, coils


def _pf_cut(n: int, frac: float, low: bool) -> tuple[slice, float]:
    c, kc = n // 2, int(round((frac - 0.5) * n))
    sel = slice(0, c - kc) if low else slice(c + kc + 1, None)
    kept = n - (c - kc) if low else c + kc + 1
    return sel, kept / n


def _b_partial_fourier(i: int, folder: Path) -> tuple[str, dict]:
    from demo_data import synth

    rng, frac, axis, low, pad, complex_out, coils = _pf_draw(i)
    img = _acquire(rng, coils)
    k = synth.to_kspace(img)
    sel = [slice(None)] * 4
    sel[2 + axis], _ = _pf_cut(k.shape[2 + axis], frac, low)
    k[tuple(sel)] = 0
    ny, nx = k.shape[-2:]
    out = synth.to_image(synth.zero_fill(k, (int(ny * pad), int(nx * pad))))
    if complex_out:
        return _save_npy(folder, out.astype(np.complex64), coil_axis=1)
    return _save_npy(folder, _rss(out))


def _t_partial_fourier(i: int) -> dict:
    rng, frac, axis, low, pad, complex_out, coils = _pf_draw(i)
    shape = (int(rng.integers(80, 129)), int(rng.integers(80, 129)))
    _, true_frac = _pf_cut(shape[axis], frac, low)
    ax = ("rows", "cols")[axis]
    present = {"partial_fourier": "present"}
    params: dict[str, Any] = {f"partial_fourier.{ax}.fraction": true_frac,
                              "partial_fourier.fill": "zeros"}
    if pad > 1:
        present["zero_filling"] = "present"
        params["zero_filling.rows.padding_factor"] = pad
        params["zero_filling.cols.padding_factor"] = pad
    if not complex_out:
        present["magnitude_only"] = "present"
        present["coil_combination"] = "present" if coils > 1 else "absent"
    # complex data whose missing part is zeros is what a scanner delivers from a
    # partial-Fourier acquisition (shared/REPORT_CONTRACT.md, origin)
    origin = {"partial_fourier": "acquisition"} if complex_out else None
    return _truth(params, origin=origin, **present)


def _rs_draw(i: int) -> tuple[np.random.Generator, int, int, tuple[float, float] | None, float]:
    rng = _rng("resampling", i)
    coils = int(rng.choice([1, 4, 8]))
    order = (1, 3)[i % 2]
    if i % 4 < 3:
        z = float(rng.uniform(1.2, 2.0))
        zoom = [(z, z), (1.0, z), (z, 1.0)][int(rng.integers(3))]
        return rng, coils, order, zoom, 0.0
    return rng, coils, order, None, float(rng.uniform(5, 40))


def _b_resampling(i: int, folder: Path) -> tuple[str, dict]:
    rng, coils, order, zoom, angle = _rs_draw(i)
    frames = _rss(_acquire(rng, coils))
    if zoom is not None:
        out = np.stack([ndimage.zoom(f, zoom, order=order) for f in frames])
    else:
        out = np.stack([ndimage.rotate(f, angle, order=order, reshape=False) for f in frames])
    return _save_npy(folder, out.astype(np.float32))


def _t_resampling(i: int) -> dict:
    rng, coils, order, zoom, _ = _rs_draw(i)
    params: dict[str, Any] = {}
    if zoom is not None:
        shape = (int(rng.integers(80, 129)), int(rng.integers(80, 129)))
        for k, ax in enumerate(("rows", "cols")):
            n_out = int(round(shape[k] * zoom[k]))
            # scipy.ndimage.zoom maps the corner samples onto each other
            params[f"resampling.{ax}.factor"] = (n_out - 1) / (shape[k] - 1) if zoom[k] != 1 \
                else 1.0
    return _truth(params, resampling="present", magnitude_only="present",
                  coil_combination="present" if coils > 1 else "absent")


def _coil_draw(i: int) -> tuple[np.random.Generator, int, float]:
    rng = _rng("coils", i)
    coils = [1, 2, 4, 8, 12, 16, 1, 8, 4, 8][i % 10]
    rho = 0.3 if i % 10 >= 8 else 0.0
    return rng, coils, rho


def _b_coils(i: int, folder: Path) -> tuple[str, dict]:
    rng, coils, rho = _coil_draw(i)
    corr = None
    if rho:
        corr = np.full((coils, coils), rho) + (1 - rho) * np.eye(coils)
    from demo_data import synth

    shape = (int(rng.integers(80, 129)), int(rng.integers(80, 129)))
    img = synth.acquire(shape, n_coils=coils, n_slices=3, sigma=float(rng.uniform(0.006, 0.025)),
                        seed=rng, correlation=corr)
    mag = _rss(img) if coils > 1 else np.abs(img[:, 0]).astype(np.float32)
    return _save_npy(folder, mag)


def _t_coils(i: int) -> dict:
    _, coils, _ = _coil_draw(i)
    return _truth(magnitude_only="present",
                  coil_combination="present" if coils > 1 else "absent")


def _mask_draw(i: int) -> tuple[np.random.Generator, int, bool]:
    rng = _rng("masking", i)
    return rng, int(rng.choice([1, 4, 8])), i % 3 == 2


def _b_masking(i: int, folder: Path) -> tuple[str, dict]:
    rng, coils, threshold = _mask_draw(i)
    sigma = float(rng.uniform(0.006, 0.025))
    mag = _rss(_acquire(rng, coils, sigma=sigma))
    if threshold:
        t = float(rng.uniform(2.0, 4.0)) * sigma * np.sqrt(2 * coils)
        mag = np.where(mag < t, 0, mag)
    else:
        mag = np.where(_object_mask(mag), mag, 0)
    return _save_npy(folder, mag.astype(np.float32))


def _t_masking(i: int) -> dict:
    return _truth(background_masking="present", magnitude_only="present",
                  coil_combination="unknown")


def _q_draw(i: int) -> tuple[np.random.Generator, str]:
    rng = _rng("quantisation", i)
    return rng, ("uint8 png", "comb16", "clipped", "uint8 png", "float lattice", "comb16",
                 "clipped", "uint8 png")[i % 8]


def _b_quantisation(i: int, folder: Path) -> tuple[str, dict]:
    rng, how = _q_draw(i)
    mag = _rss(_acquire(rng, 8, sigma=float(rng.uniform(0.015, 0.03))))
    if how == "uint8 png":
        from demo_data.writers import write_raster_stack

        u8 = np.round(np.clip(mag, 0, None) / mag.max() * 255).astype(np.uint8)
        write_raster_stack(folder / "stack", u8, fmt="png")
        return str(folder / "stack"), {}
    if how == "comb16":
        u = (np.round(mag / mag.max() * 255).astype(np.uint16) * 16).astype(np.uint16)
        return _save_npy(folder, u)
    if how == "clipped":
        top = float(np.quantile(mag, float(rng.uniform(0.90, 0.98))))
        return _save_npy(folder, np.round(np.clip(mag / top * 4095, 0, 4095)).astype(np.uint16))
    lat = (np.round(mag / mag.max() * 255) * np.float32(1000.0 / 255.0)).astype(np.float32)
    return _save_npy(folder, lat)


def _t_quantisation(i: int) -> dict:
    return _truth(intensity_quantization="present", magnitude_only="present",
                  coil_combination="present")


def _j_draw(i: int) -> tuple[np.random.Generator, int, str]:
    rng = _rng("jpeg", i)
    quality = int(rng.choice([30, 45, 60, 75, 85, 90]))
    return rng, quality, ("jpeg file", "decoded png")[i % 2]


def _b_jpeg(i: int, folder: Path) -> tuple[str, dict]:
    from demo_data import synth
    from demo_data.writers import write_raster_stack

    rng, quality, how = _j_draw(i)
    coils = int(rng.choice([1, 4, 8]))
    mag = _rss(_acquire(rng, coils, slices=2, shape=(128, 128)))
    u8 = np.round(np.clip(mag, 0, None) / mag.max() * float(rng.uniform(180, 255))
                  ).astype(np.uint8)
    if how == "jpeg file":
        write_raster_stack(folder / "stack", u8, fmt="jpeg", quality=quality)
    else:
        dec = np.stack([synth.jpeg_round_trip(f, quality) for f in u8])
        write_raster_stack(folder / "stack", dec, fmt="png")
    return str(folder / "stack"), {}


def _t_jpeg(i: int) -> dict:
    rng, quality, _ = _j_draw(i)
    coils = int(rng.choice([1, 4, 8]))
    return _truth({"lossy_compression.quality": quality}, lossy_compression="present",
                  intensity_quantization="present", magnitude_only="present",
                  coil_combination="present" if coils > 1 else "absent")


def _raw_truth(i: int) -> dict:
    return _truth()


# kind -> (builder, truth, count, count in --quick, route)
_KINDS: dict[str, tuple[Any, Any, int, int, str]] = {
    "raw_complex": (_b_raw_complex, _raw_truth, 6, 1, "npy image complex coils"),
    "raw_single": (_b_raw_single, _raw_truth, 4, 0, "npy image complex"),
    "raw_kspace": (_b_raw_kspace, _raw_truth, 6, 1, "npy kspace coils"),
    # a real-valued image has Hermitian-symmetric k-space whatever its sign: processed
    # (shared/REPORT_CONTRACT.md, magnitude_only domain real_signed)
    "real_signed": (_b_real_signed,
                    lambda i: _truth({"magnitude_only.domain": "real_signed"},
                                     magnitude_only="present"), 2, 0, "npy image real"),
    "zero_filling": (_b_zero_filling, _t_zero_filling, 12, 1, "npy"),
    "kspace_filtering": (_b_kspace_filtering, _t_kspace_filtering, 10, 1, "npy"),
    "partial_fourier": (_b_partial_fourier, _t_partial_fourier, 9, 1, "npy"),
    "resampling": (_b_resampling, _t_resampling, 8, 1, "npy magnitude"),
    "coils": (_b_coils, _t_coils, 10, 1, "npy magnitude"),
    "masking": (_b_masking, _t_masking, 6, 1, "npy magnitude"),
    "quantisation": (_b_quantisation, _t_quantisation, 8, 1, "npy / png stack"),
    "jpeg": (_b_jpeg, _t_jpeg, 8, 1, "jpeg / png stack"),
}


def _call(builder: Any, i: int, folder: Path) -> tuple[str, dict]:
    return builder(i, folder)


def cases(*, quick: bool = False) -> list[Case]:
    """The in-sample cases (split ``insample``); ``quick``: one or none per kind."""
    out = []
    for kind, (builder, truth, n, n_quick, route) in _KINDS.items():
        for i in range(n_quick if quick else n):
            out.append(Case(name=f"insample/{kind}/{i}", split="insample", route=route,
                            truth=truth(i), build=functools.partial(_call, builder, i)))
    return out


def main() -> int:
    cs = cases()
    print(f"{len(cs)} in-sample cases")
    for c in cs:
        known = {t: s for t, s in c.truth["traces"].items() if s != "absent"}
        print(f"  {c.name:<32} {c.truth['verdict']:<10} {known} {c.truth['params']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
