"""Case recipes: each route draws its parameters and truth cheaply, and builds its files on demand.

A recipe is a plain dict (JSON-able): the acquisition (anatomy, matrix, channels,
SNR, readout oversampling, seeds) and the processing steps. ``sample(route, rng,
quick)`` returns ``(variant, recipe, truth)``; ``build(route, recipe, folder)``
writes the files and returns ``(path, analyse_path kwargs)``.

Where a truth is ``unknown`` a comment says why. Effective channel counts of a
root-sum-of-squares with correlated noise use ``(tr Psi)**2 / ||Psi||_F**2``
(recalled from memory after S. Aja-Fernandez and A. Tristan-Vega, "Influence of
noise correlation in multiple-coil statistical models with sum of squares
reconstruction", Magn. Reson. Med. 67 (2012) 580-585).
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from bench.sim2 import pipeline, recon, writers
from bench.sim2.acquisition import Acquisition, acquire
from bench.sim2.anatomy import KINDS, draw_anatomy
from bench.sim2.coils import draw_array, noise_covariance
from bench.sim2.fourier import WINDOWS, to_image, to_kspace, window_2d, zero_pad
from bench.sim2.truth import make_truth

Recipe = dict[str, Any]

# ---------------------------------------------------------------- acquisition


def _acq_recipe(rng: np.random.Generator, quick: bool, *, is_3d: bool = False,
                max_px: int = 256, os_choices: tuple[str, ...] = ("none", "cropped", "rolloff",
                                                                  "kept"),
                kinds: tuple[str, ...] = KINDS, divisible: int = 1) -> Recipe:
    if quick:
        sizes = [(64, 64), (96, 96), (96, 80), (80, 96), (128, 112), (112, 128)]
    elif is_3d:
        sizes = [(80, 80), (96, 96), (96, 112), (112, 96)]
    else:
        sizes = [(96, 128), (128, 128), (128, 96), (144, 160), (160, 160), (192, 160),
                 (192, 192), (192, 256), (256, 224), (256, 256)]
        if max_px > 256 and rng.random() < 0.25:
            sizes = [(320, 320), (384, 320), (512, 448), (448, 512), (512, 512)]
    sizes = [s for s in sizes if max(s) <= max_px and s[0] % divisible == 0] or [(96, 96)]
    ny, nx = sizes[int(rng.integers(len(sizes)))]
    os_mode = str(rng.choice(os_choices))
    if max(ny, nx) > 256 or is_3d:
        os_mode = "none"
    os_factor = 2 if os_mode != "none" else 1
    n_slices = int(rng.integers(8, 13)) if is_3d else int(rng.integers(1, 3))
    if max(ny, nx) > 256:
        n_slices = 1
    # channels x pixels x oversampling x slices bounded: each case builds in about a second
    budget = 12 * 128 * 128 * 2 * (3 if is_3d else 1)
    chans = [c for c in (4, 6, 8, 12, 16, 20, 24, 32)
             if c * ny * nx * os_factor * n_slices <= budget] or [4]
    if quick:
        chans = [c for c in chans if c <= 12]
    n_coils = int(chans[int(rng.integers(len(chans)))])
    seeds = rng.integers(2**31, size=3)
    rec = {"kind": str(rng.choice(kinds)), "matrix": [ny, nx], "n_coils": n_coils,
           "n_slices": n_slices, "is_3d": is_3d, "snr": float(np.exp(rng.uniform(np.log(5),
                                                                                np.log(80)))),
           "readout_os": os_mode, "fill": float(rng.uniform(0.7, 0.88)),
           "fov_mm": float(rng.uniform(180, 260)),
           "seed_anatomy": int(seeds[0]), "seed_array": int(seeds[1]), "seed_noise": int(seeds[2])}
    psi = _psi(rec)
    rec["effective_channels"] = round(float(np.trace(psi).real ** 2 / np.sum(np.abs(psi) ** 2)), 2)
    return rec


def _array_and_psi(rec: Recipe) -> tuple[Any, np.ndarray]:
    rng = np.random.default_rng(rec["seed_array"])
    array = draw_array(rec["n_coils"], rng)
    return array, noise_covariance(array, rng)


def _psi(rec: Recipe) -> np.ndarray:
    return _array_and_psi(rec)[1]


def _acquire(rec: Recipe) -> Acquisition:
    array, psi = _array_and_psi(rec)
    anatomy = draw_anatomy(rec["kind"], np.random.default_rng(rec["seed_anatomy"]))
    return acquire(anatomy, array, tuple(rec["matrix"]), n_slices=rec["n_slices"],
                   is_3d=rec["is_3d"], snr=rec["snr"], rng=np.random.default_rng(rec["seed_noise"]),
                   readout_os=rec["readout_os"], fill=rec["fill"], fov_mm=rec["fov_mm"], psi=psi)


def _grid_shape(rec: Recipe) -> tuple[int, int]:
    ny, nx = rec["matrix"]
    return ny, nx * (2 if rec["readout_os"] == "kept" else 1)


# ---------------------------------------------------------------- deliveries


def _squeeze(arr: np.ndarray, axis: int) -> np.ndarray:
    return arr[(slice(None),) * axis + (0,)] if arr.shape[axis] == 1 else arr


def _deliver_coils(folder: Path, name: str, data: np.ndarray, domain: str, fmt: str
                   ) -> tuple[str, dict]:
    """Multi-channel complex data (L, Z, ny, nx), channel axis 0 (slice axis dropped if 1)."""
    arr = _squeeze(data, 1).astype(np.complex64)
    side = {"domain": domain, "coil_axis": 0}
    if fmt == "npz":
        key = "kspace" if domain == "kspace" else "image"
        path = writers.write_npz(folder / f"{name}.npz", key, arr, side)
    elif fmt == "h5":
        path = writers.write_h5(folder / f"{name}.h5", arr, 0)
    else:
        path = writers.write_npy(folder / f"{name}.npy", arr, side)
    return str(path), {"domain": domain, "coil_axis": 0}


def _deliver_image(folder: Path, name: str, vol: np.ndarray, fmt: str, rec: Recipe, *,
                   voxel: tuple[float, float, float], derived: bool,
                   acquired: tuple[int, int] | None = None) -> tuple[str, dict]:
    """One image volume (Z, ny, nx): DICOM (uint16, non-negative only), NIfTI or NPY."""
    if fmt == "dicom":
        path = writers.write_dicom_series(folder / name, np.abs(vol), voxel_mm=voxel,
                                          acquisition_matrix=acquired, derived=derived,
                                          description=f"sim2 {name}", seed=rec["seed_noise"])
        return str(path), {}
    if fmt == "nifti":
        path = writers.write_nifti(folder / f"{name}.nii.gz",
                                   vol.astype(np.float32 if not np.iscomplexobj(vol)
                                              else np.complex64), voxel)
        return str(path), {}
    path = writers.write_npy(folder / f"{name}.npy", _squeeze(vol, 0), {"domain": "image"})
    return str(path), {"domain": "image"}


def _mag_status(comb: str, rec: Recipe) -> tuple[dict, dict]:
    """Status and params of a magnitude image made by combination ``comb``."""
    status = {"magnitude_only": "present",
              "coil_combination": "absent" if comb == "single" else "present"}
    eff = rec["effective_channels"] if comb == "rss" else 1
    params = {"magnitude_only.domain": "magnitude", "coil_combination.combination": comb,
              "coil_combination.effective_channels": eff, "coil_combination.channels":
              rec["n_coils"]}
    return status, params


def _combine(acq: Acquisition, comb: str, imgs: np.ndarray | None = None) -> np.ndarray:
    """Combined (Z, ny, nx) image: rss/single magnitudes or complex linear (Roemer)."""
    imgs = to_image(acq.kspace, axes=acq.axes) if imgs is None else imgs
    if comb == "rss":
        return recon.rss(imgs)
    if comb == "single":
        return np.abs(imgs[int(np.argmax(np.abs(imgs).mean(axis=(1, 2, 3))))])
    if comb == "walsh":
        return np.stack([recon.walsh_combine(imgs[:, z], acq.psi) for z in range(imgs.shape[1])])
    k = to_kspace(imgs, axes=(-2, -1))
    return np.stack([recon.roemer_combine(imgs[:, z], recon.low_res_sensitivities(k[:, z]),
                                          acq.psi) for z in range(imgs.shape[1])])


def _voxel(rec: Recipe, acq: Acquisition, pad: tuple[float, float] = (1.0, 1.0)
           ) -> tuple[float, float, float]:
    return (acq.voxel_mm[0], acq.voxel_mm[1] / pad[0], acq.voxel_mm[2] / pad[1])


# ---------------------------------------------------------------- routes


def _s_raw_control(rng, quick):
    fmt = str(rng.choice(["npz", "npy", "h5", "coil_images"]))
    rec = _acq_recipe(rng, quick)
    rec["fmt"] = fmt
    # nothing applied: multi-channel complex data with correlated thermal noise; kept readout
    # oversampling or the receiver's roll-off leave no trace of the ten.
    return f"{fmt}_os-{rec['readout_os']}", rec, make_truth()


def _b_raw_control(rec, folder):
    acq = _acquire(rec)
    if rec["fmt"] == "coil_images":
        return _deliver_coils(folder, "coils", to_image(acq.kspace, axes=acq.axes), "image", "npy")
    return _deliver_coils(folder, "raw", acq.kspace, "kspace", rec["fmt"])


def _pad_factors(rng):
    f = float(rng.choice([1.5, 2.0, 2.0, 2.5, 3.0]))
    which = str(rng.choice(["rows", "cols", "both"]))
    g = float(rng.choice([1.5, 2.0, 3.0])) if which == "both" else f
    return ([f if which != "cols" else 1.0, f if which == "rows" else g] if which == "both"
            else [f if which == "rows" else 1.0, f if which == "cols" else 1.0])


def _padded_shape(shape, pad):
    return tuple(int(round(n * p / 2) * 2) if p != 1 else n for n, p in zip(shape, pad,
                                                                           strict=True))


def _s_zero_fill(rng, quick):
    is_3d = (not quick) and rng.random() < 0.25
    rec = _acq_recipe(rng, quick, is_3d=is_3d, max_px=128 if quick else 192)
    pad = _pad_factors(rng)
    rec["pad"] = pad
    rec["fmt"] = "kspace" if rng.random() < 0.3 else str(rng.choice(["dicom", "nifti"]))
    status: dict[str, str] = {"zero_filling": "present"}
    shape = _grid_shape(rec)
    out = _padded_shape(shape, pad)
    params = {"zero_filling.rows.padding_factor": out[0] / shape[0],
              "zero_filling.cols.padding_factor": out[1] / shape[1]}
    if is_3d:
        rec["pad_slices"] = float(rng.choice([1.5, 2.0]))
        nz = int(round(rec["n_slices"] * rec["pad_slices"]))
        params["zero_filling.slices.padding_factor"] = nz / rec["n_slices"]
    if rec["fmt"] != "kspace":
        s, p = _mag_status("rss", rec)
        status.update(s)
        params.update(p)
    return f"{'3d_' if is_3d else ''}{rec['fmt']}", rec, make_truth(status, params=params)


def _apply_zero_fill(rec, acq, k):
    out = _padded_shape(k.shape[-2:], rec["pad"])
    kz = zero_pad(k, out)
    if rec.get("pad_slices"):
        nz = int(round(k.shape[1] * rec["pad_slices"]))
        kz = zero_pad(kz, (nz,) + out)
    return kz


def _b_zero_fill(rec, folder):
    acq = _acquire(rec)
    k = acq.kspace
    if rec.get("window"):
        k = k * window_2d(rec["window"], k.shape[-2:], shape_kind=rec["window_shape"])
    if rec.get("pad"):
        k = _apply_zero_fill(rec, acq, k)
    if rec["fmt"] == "kspace":
        return _deliver_coils(folder, "kspace", k, "kspace", "npz")
    mag = recon.rss(to_image(k, axes=acq.axes))
    pad = rec.get("pad", [1.0, 1.0])
    vox = _voxel(rec, acq, tuple(pad))
    if rec.get("pad_slices"):
        vox = (vox[0] / rec["pad_slices"], vox[1], vox[2])
    return _deliver_image(folder, "scan", mag, rec["fmt"], rec, voxel=vox, derived=False,
                          acquired=_grid_shape(rec))


def _s_raw_filter(rng, quick):
    rec = _acq_recipe(rng, quick, max_px=128 if quick else 256)
    rec["window"] = str(rng.choice(WINDOWS))
    rec["window_shape"] = str(rng.choice(["separable", "radial"]))
    status = {"kspace_filtering": "present"}
    params: dict[str, Any] = {"kspace_filtering.window": rec["window"],
                              "kspace_filtering.shape": rec["window_shape"]}
    if rng.random() < 0.6:
        pad = _pad_factors(rng)
        rec["pad"] = pad
        shape = _grid_shape(rec)
        out = _padded_shape(shape, pad)
        status["zero_filling"] = "present"
        params.update({"zero_filling.rows.padding_factor": out[0] / shape[0],
                       "zero_filling.cols.padding_factor": out[1] / shape[1]})
    rec["fmt"] = "kspace" if rng.random() < 0.3 else str(rng.choice(["dicom", "nifti"]))
    if rec["fmt"] != "kspace":
        s, p = _mag_status("rss", rec)
        status.update(s)
        params.update(p)
    zf = "_zf" if rec.get("pad") else ""
    return (f"{rec['window']}-{rec['window_shape']}{zf}_{rec['fmt']}", rec,
            make_truth(status, params=params))


def _s_combine(rng, quick):
    comb = str(rng.choice(["rss", "walsh", "roemer", "single"]))
    rec = _acq_recipe(rng, quick, max_px=128 if quick else (512 if comb == "rss" else 256))
    rec["comb"] = comb
    complex_out = comb in ("walsh", "roemer") and rng.random() < 0.5
    rec["fmt"] = "npy" if complex_out else str(rng.choice(["dicom", "nifti"]))
    label = {"rss": "rss", "walsh": "linear", "roemer": "linear", "single": "single"}[comb]
    status, params = _mag_status(label, rec)
    if complex_out:
        status["magnitude_only"] = "absent"
        params["magnitude_only.domain"] = "complex"
    return f"{comb}_{rec['fmt']}", rec, make_truth(status, params=params)


def _b_combine(rec, folder):
    acq = _acquire(rec)
    img = _combine(acq, rec["comb"])
    if rec["fmt"] != "npy":
        img = np.abs(img)
    return _deliver_image(folder, "combined", img, rec["fmt"], rec, voxel=_voxel(rec, acq),
                          derived=rec["comb"] in ("walsh", "single"),
                          acquired=_grid_shape(rec))


def _s_grappa(rng, quick):
    rec = _acq_recipe(rng, quick, max_px=128 if quick else 256, os_choices=("none", "rolloff"))
    rec["n_slices"] = 1
    rec["R"] = int(rng.integers(2, 5))
    rec["n_acs"] = int(rng.choice([20, 24, 32]))
    rec["fmt"] = str(rng.choice(["npz", "h5", "dicom"]))
    ny = rec["matrix"][0]
    keep = recon.undersampling_rows(ny, rec["R"], rec["n_acs"])
    status = {"kspace_synthesis": "present"}
    params: dict[str, Any] = {"kspace_synthesis.method": "parallel_imaging",
                              "kspace_synthesis.acceleration": rec["R"],
                              "kspace_synthesis.filled_fraction": float(1 - keep.mean())}
    if rec["fmt"] == "dicom":
        s, p = _mag_status("rss", rec)
        # RSS of GRAPPA channels: noise is no longer the chi law of independent channels
        # (amplified, spatially varying); the combination happened but its law is uncertain.
        status.update(s)
        params.update(p)
        params["coil_combination.effective_channels"] = None
    return f"R{rec['R']}_{rec['fmt']}", rec, make_truth(status, params=params)


def _b_grappa(rec, folder):
    acq = _acquire(rec)
    k = acq.kspace[:, 0]
    ny = k.shape[1]
    keep = recon.undersampling_rows(ny, rec["R"], rec["n_acs"])
    c0 = ny // 2 - rec["n_acs"] // 2
    w = recon.grappa_fit(k[:, c0:c0 + rec["n_acs"]], rec["R"])
    full = recon.grappa_fill(k * keep[:, None], keep, rec["R"], w)[:, None]
    if rec["fmt"] == "dicom":
        mag = recon.rss(to_image(full, axes=(2, 3)))
        return _deliver_image(folder, "grappa", mag, "dicom", rec, voxel=_voxel(rec, acq),
                              derived=False, acquired=_grid_shape(rec))
    return _deliver_coils(folder, "grappa", full, "kspace", rec["fmt"])


def _s_sense(rng, quick):
    R = int(rng.integers(2, 5))
    rec = _acq_recipe(rng, quick, max_px=128 if quick else 256, os_choices=("none", "rolloff"),
                      divisible=R)
    rec["n_slices"] = 1
    rec["R"] = R
    rec["fmt"] = str(rng.choice(["npy", "dicom", "nifti"]))
    status, params = _mag_status("linear", rec)
    status["kspace_synthesis"] = "present"
    params.update({"kspace_synthesis.method": "parallel_imaging",
                   "kspace_synthesis.acceleration": R})
    if rec["fmt"] == "npy":
        status["magnitude_only"] = "absent"
        params["magnitude_only.domain"] = "complex"
    return f"R{R}_{rec['fmt']}", rec, make_truth(status, params=params)


def _b_sense(rec, folder):
    acq = _acquire(rec)
    k = acq.kspace[:, 0]
    R = rec["R"]
    # sensitivities from 24 fully sampled central lines (a separate reference scan)
    sens = recon.low_res_sensitivities(k)
    img = recon.sense_unfold(recon.alias(k, R), sens, acq.psi, R)[None]
    if rec["fmt"] != "npy":
        img = np.abs(img)
    return _deliver_image(folder, "sense", img, rec["fmt"], rec, voxel=_voxel(rec, acq),
                          derived=False, acquired=_grid_shape(rec))


def _s_partial_fourier(rng, quick, fill):
    rec = _acq_recipe(rng, quick, max_px=128 if quick else 256, os_choices=("none", "rolloff"))
    rec["fraction"] = float(rng.choice([0.625, 0.6875, 0.75, 0.8125, 0.875]))
    rec["pf_fill"] = fill
    fmts = ["kspace", "coil_images", "rss_dicom"] if fill == "zeros" else ["kspace", "rss_dicom",
                                                                           "rss_nifti"]
    rec["fmt"] = str(rng.choice(fmts))
    ny = rec["matrix"][0]
    frac = float(recon.pf_rows(ny, rec["fraction"]).mean())
    status = {"partial_fourier": "present"}
    params: dict[str, Any] = {"partial_fourier.rows.fraction": frac,
                              "partial_fourier.fill": {"zeros": "zeros", "conjugate": "conjugate",
                                                       "pocs": "iterative"}[fill]}
    origin = {}
    if fill != "zeros":
        status["kspace_synthesis"] = "present"
        params["kspace_synthesis.method"] = "partial_fourier_fill"
        params["kspace_synthesis.filled_fraction"] = 1 - frac
    elif rec["fmt"] in ("kspace", "coil_images"):
        # the scanner delivered what it measured: the missing rows are zeros
        origin["partial_fourier"] = "acquisition"
    if rec["fmt"].startswith("rss"):
        s, p = _mag_status("rss", rec)
        status.update(s)
        params.update(p)
    return f"{rec['fmt']}", rec, make_truth(status, origin=origin, params=params)


def _b_partial_fourier(rec, folder):
    acq = _acquire(rec)
    ny = acq.kspace.shape[2]
    keep = recon.pf_rows(ny, rec["fraction"])
    k = acq.kspace * keep[:, None]
    if rec["pf_fill"] == "conjugate":
        k = np.stack([recon.pf_conjugate(k[:, z], keep) for z in range(k.shape[1])], axis=1)
    elif rec["pf_fill"] == "pocs":
        k = np.stack([recon.pf_pocs(k[:, z], keep) for z in range(k.shape[1])], axis=1)
    if rec["fmt"] == "kspace":
        return _deliver_coils(folder, "pf", k, "kspace", "npz")
    imgs = to_image(k, axes=acq.axes)
    if rec["fmt"] == "coil_images":
        return _deliver_coils(folder, "pf", imgs, "image", "npy")
    fmt = rec["fmt"].split("_")[1]
    return _deliver_image(folder, "pf", recon.rss(imgs), fmt, rec, voxel=_voxel(rec, acq),
                          derived=False, acquired=_grid_shape(rec))


def _s_research(rng, quick, step):
    is_3d = step == "reslice"
    kinds = ("head",) if step == "skull_strip" else KINDS
    rec = _acq_recipe(rng, quick, is_3d=is_3d, max_px=128 if quick else 256, kinds=kinds,
                      os_choices=("none", "cropped", "rolloff"))
    rec["step"] = step
    status, params = _mag_status("rss", rec)
    rec["fmt"] = "nifti"
    if step == "register":
        rec["angle"] = float(rng.choice([0.0, 0.0, rng.uniform(-12, 12)]))
        rec["order"] = int(rng.choice([1, 3]))
        status["resampling"] = "present"
        # interpolation mixes neighbouring chi-distributed samples: not a chi law any more
        status["coil_combination"] = "unknown"
        if rec["angle"] != 0.0:
            # zeros written outside the rotated input field of view: a constant region that is
            # neither masking nor raw background
            status["background_masking"] = "unknown"
    elif step == "reslice":
        rec["order"] = int(rng.choice([1, 3]))
        status["resampling"] = "present"
        status["coil_combination"] = "unknown"
    elif step == "skull_strip":
        status["background_masking"] = "present"
        status["coil_combination"] = "unknown"       # no background noise left to show a law
        rec["fmt"] = str(rng.choice(["nifti", "dicom"]))
    elif step == "bias_correct":
        status["coil_combination"] = "unknown"       # noise scaled by a varying field
    elif step in ("zscore", "minmax"):
        rec["mask"] = bool(step == "zscore" and rng.random() < 0.5)
        status["coil_combination"] = "unknown"       # offset removes the chi law's zero origin
        status["background_masking"] = "present" if rec["mask"] else "absent"
        # the input is a 12-bit scanner export: floats on a comb of levels, or not, depending
        # on how one counts levels of a rescaled float
        status["intensity_quantization"] = "unknown"
        if step == "zscore":
            params.pop("magnitude_only.domain")      # shifted magnitudes, signed values
    elif step == "real_part":
        status, params = _mag_status("linear", rec)
        params["magnitude_only.domain"] = "real_signed"
    return rec["fmt"], rec, make_truth(status, params=params)


def _b_research(rec, folder):
    acq = _acquire(rec)
    step = rec["step"]
    vox = _voxel(rec, acq)
    support = acq.support
    if step == "real_part":
        img = _combine(acq, "roemer")
        ph = np.angle(to_image(to_kspace(img) * window_2d("hann", img.shape[-2:])))
        vol = (img * np.exp(-1j * ph)).real
        return _deliver_image(folder, "real", vol.astype(np.float32), "nifti", rec, voxel=vox,
                              derived=True)
    mag = recon.rss(to_image(acq.kspace, axes=acq.axes))
    if step == "register":
        out = pipeline.register_to_grid(mag, vox[1:], angle_deg=rec["angle"], order=rec["order"])
        return _deliver_image(folder, "registered", out.astype(np.float32), "nifti", rec,
                              voxel=(vox[0], 1.0, 1.0), derived=True)
    if step == "reslice":
        out = pipeline.reslice_coronal(mag, vox, order=rec["order"])
        return _deliver_image(folder, "resliced", out.astype(np.float32), "nifti", rec,
                              voxel=(vox[1], 1.0, vox[2]), derived=True)
    if step == "skull_strip":
        out = pipeline.skull_strip(mag, support, erode=max(2, mag.shape[-1] // 40))
        return _deliver_image(folder, "stripped", out.astype(np.float32), rec["fmt"], rec,
                              voxel=vox, derived=True)
    if step == "bias_correct":
        out = pipeline.bias_correct(mag, support, sigma_px=mag.shape[-1] / 10)
        return _deliver_image(folder, "biascorr", out, "nifti", rec, voxel=vox, derived=True)
    # z-score / min-max of a 12-bit scanner export
    q = np.round(mag / mag.max() * 4095.0)
    if rec.get("mask"):
        q = pipeline.skull_strip(q, support, erode=1)
    # a masked z-score leaves the background at the constant -mean / sd
    out = pipeline.zscore(q, support) if step == "zscore" else pipeline.minmax(q)
    return _deliver_image(folder, step, out, "nifti", rec, voxel=vox, derived=True)


def _s_archive(rng, quick, fmt):
    rec = _acq_recipe(rng, quick, max_px=128 if quick else 256,
                      os_choices=("none", "cropped", "rolloff"))
    rec["n_slices"] = int(min(rec["n_slices"], 2))
    rec["archive"] = fmt
    rec["quality"] = int(rng.integers(50, 96))
    rec["resize"] = float(rng.choice([1.0, 1.0, 0.5, 0.75, 1.5, 2.0]))
    rec["resample"] = str(rng.choice(["bilinear", "bicubic", "lanczos"]))
    rec["zf"] = bool(rec["resize"] == 1.0 and rng.random() < 0.3)
    status, params = _mag_status("rss", rec)
    status["intensity_quantization"] = "present"
    # 8-bit windowing with clipping leaves too few background levels to judge the noise law
    status["coil_combination"] = "unknown"
    if fmt == "jpeg":
        status["lossy_compression"] = "present"
        params["lossy_compression.quality"] = rec["quality"]
    if rec["resize"] != 1.0:
        status["resampling"] = "present"
        ny, nx = _grid_shape(rec)
        params["resampling.rows.factor"] = int(round(ny * rec["resize"])) / ny
        params["resampling.cols.factor"] = int(round(nx * rec["resize"])) / nx
    if rec["zf"]:
        status["zero_filling"] = "present"
        params["zero_filling.rows.padding_factor"] = 2.0
        params["zero_filling.cols.padding_factor"] = 2.0
    tag = f"q{rec['quality']}" if fmt == "jpeg" else "png"
    size = f"_x{rec['resize']:g}" if rec["resize"] != 1.0 else ("_zf2" if rec["zf"] else "")
    return f"{tag}{size}", rec, make_truth(status, params=params)


def _b_archive(rec, folder):
    acq = _acquire(rec)
    k = acq.kspace
    if rec["zf"]:
        k = zero_pad(k, tuple(2 * n for n in k.shape[-2:]))
    mag = recon.rss(to_image(k, axes=acq.axes))
    img8 = pipeline.to_uint8(mag)
    ext = "jpg" if rec["archive"] == "jpeg" else "png"
    size = None
    if rec["resize"] != 1.0:
        size = tuple(int(round(n * rec["resize"])) for n in img8.shape[-2:])
    paths = []
    for z, sl in enumerate(img8):
        data = pipeline.pillow_archive(sl, fmt=rec["archive"], quality=rec["quality"], size=size,
                                       resample=rec["resample"])
        p = folder / f"slice_{z:03d}.{ext}"
        p.write_bytes(data)
        paths.append(p)
    return (str(paths[0]) if len(paths) == 1 else str(folder)), {}


def _partial(fn, *args):
    return lambda rng, quick: fn(rng, quick, *args)


#: route name -> (sampler, builder, weight in a full split)
ROUTES: dict[str, tuple[Callable, Callable, int]] = {
    "raw_control": (_s_raw_control, _b_raw_control, 16),
    "zero_fill": (_s_zero_fill, _b_zero_fill, 14),
    "kspace_filter": (_s_raw_filter, _b_zero_fill, 10),
    "coil_combine": (_s_combine, _b_combine, 14),
    "grappa": (_s_grappa, _b_grappa, 9),
    "sense": (_s_sense, _b_sense, 8),
    "pf_zeros": (_partial(_s_partial_fourier, "zeros"), _b_partial_fourier, 7),
    "pf_conjugate": (_partial(_s_partial_fourier, "conjugate"), _b_partial_fourier, 5),
    "pf_pocs": (_partial(_s_partial_fourier, "pocs"), _b_partial_fourier, 6),
    "register": (_partial(_s_research, "register"), _b_research, 6),
    "reslice": (_partial(_s_research, "reslice"), _b_research, 4),
    "skull_strip": (_partial(_s_research, "skull_strip"), _b_research, 5),
    "bias_correct": (_partial(_s_research, "bias_correct"), _b_research, 3),
    "zscore": (_partial(_s_research, "zscore"), _b_research, 4),
    "minmax": (_partial(_s_research, "minmax"), _b_research, 3),
    "real_part": (_partial(_s_research, "real_part"), _b_research, 4),
    "png_archive": (_partial(_s_archive, "png"), _b_archive, 8),
    "jpeg_archive": (_partial(_s_archive, "jpeg"), _b_archive, 12),
}

#: the routes of the quick set, one case each (two for raw controls and JPEG)
QUICK_ROUTES = ("raw_control", "raw_control", "zero_fill", "kspace_filter", "coil_combine",
                "grappa", "sense", "pf_zeros", "pf_pocs", "register", "skull_strip",
                "real_part", "png_archive", "jpeg_archive")


def sample(route: str, rng: np.random.Generator, quick: bool) -> tuple[str, Recipe, dict]:
    """Draw a case of ``route``: (variant label, recipe, truth)."""
    return ROUTES[route][0](rng, quick)


def build(route: str, recipe: Recipe, folder: Path) -> tuple[str, dict]:
    """Write the files of a case into ``folder``; return (path, analyse_path kwargs)."""
    folder.mkdir(parents=True, exist_ok=True)
    return ROUTES[route][1](recipe, folder)
