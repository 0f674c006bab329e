"""Generate the demo lab: an invented group, its members and its candidate sources.

Everything here is invented: the Larchmere University computational imaging
group, its members, and eight candidate datasets a member "found online", each
simulated from demo_data/synth.py with a known processing history and written
in the format such a set would arrive in. ``manifest.json`` records each
source's truth (the processing the generator applied and its parameters), the
members, comments and decisions; the tests and ``rawproof demo`` read it.

Run ``python -m demo_data.generate [OUT]`` (default demo_data/out/larchmere).
"""

from __future__ import annotations

import json
import shutil
import sys
from pathlib import Path
from typing import Any

import numpy as np
import scipy.ndimage as ndi

from demo_data import synth, writers

DEFAULT_OUT = Path(__file__).resolve().parent / "out" / "larchmere"
MANIFEST = "manifest.json"

LAB = {
    "name": "Larchmere University computational imaging group",
    "short": "Larchmere CIG",
    "note": "An invented lab for the rawproof demo; every person, source and URL is fictional.",
}

MEMBERS = [
    {"username": "okafor", "display_name": "Ines Okafor (group lead)", "admin": True,
     "password": "larchmere-okafor-demo"},
    {"username": "brandt", "display_name": "Tomasz Brandt (postdoc)", "admin": False,
     "password": "larchmere-brandt-demo"},
    {"username": "zhou", "display_name": "Mei Ling Zhou (PhD student)", "admin": False,
     "password": "larchmere-zhou-demo"},
    {"username": "quintero", "display_name": "Rafael Quintero (MSc student)", "admin": False,
     "password": "larchmere-quintero-demo"},
]

ALL_TRACES = ("zero_filling", "magnitude_only", "coil_combination", "background_masking",
              "lossy_compression", "intensity_quantization", "resampling",
              "kspace_filtering", "partial_fourier")


def _u16(mag: np.ndarray, peak: float = 4000.0) -> np.ndarray:
    return np.round(mag / float(mag.max()) * peak).astype(np.uint16)


def _raw_multicoil(out: Path, rng: np.random.Generator) -> dict[str, Any]:
    imgs = synth.acquire((128, 128), n_coils=8, n_slices=3, sigma=0.01, seed=rng)
    k = synth.to_kspace(imgs).astype(np.complex64)
    files = writers.write_npz(out / "phantom_kspace.npz", sidecar={"coil_axis": 1}, kspace=k)
    return {
        "path": "phantom_kspace.npz", "files": files, "format": "npz",
        "truth": {"present": {}, "absent": list(ALL_TRACES), "processing": []},
    }


def _zero_filled(out: Path, rng: np.random.Generator) -> dict[str, Any]:
    mag, shape = synth.zero_filled_magnitude((128, 128), (2.0, 2.0), n_coils=8, n_slices=4,
                                             sigma=0.012, seed=rng)
    files = writers.write_dicom_series(out / "series", _u16(mag), series_description="T2 AX",
                                       pixel_spacing=(0.9, 0.9), seed=11)
    return {
        "path": "series", "files": files, "format": "dicom",
        "truth": {
            "present": {
                "zero_filling": {"rows": {"support_fraction": 0.5, "padding_factor": 2.0},
                                 "cols": {"support_fraction": 0.5, "padding_factor": 2.0}},
                "coil_combination": {"noise_model": "noncentral_chi", "effective_channels": 8},
                "magnitude_only": {"domain": "magnitude"},
            },
            "absent": ["lossy_compression", "resampling", "background_masking"],
            "processing": ["8-coil acquisition at 128 x 128", "k-space zero-filled to 256 x 256",
                           "root-sum-of-squares coil combination", "uint16 DICOM"],
        },
    }


def _jpeg(out: Path, rng: np.random.Generator) -> dict[str, Any]:
    imgs = synth.acquire((192, 192), n_coils=1, n_slices=5, sigma=0.01, seed=rng)[:, 0]
    mag = np.abs(imgs)
    stack = np.round(np.clip(mag / np.percentile(mag, 99.8), 0, 1) * 255).astype(np.uint8)
    files = writers.write_raster_stack(out / "jpeg", stack, fmt="jpeg", quality=75, stem="case")
    return {
        "path": "jpeg", "files": files, "format": "jpeg",
        "truth": {
            "present": {
                "lossy_compression": {"method": "jpeg_dct", "quality": 75, "block_origin": [0, 0]},
                "magnitude_only": {"domain": "magnitude"},
            },
            "absent": ["zero_filling", "resampling", "partial_fourier"],
            "processing": ["single-coil magnitude", "windowed to 8 bits",
                           "baseline JPEG at quality 75 (Pillow / libjpeg)"],
        },
    }


def _resliced(out: Path, rng: np.random.Generator) -> dict[str, Any]:
    imgs = synth.acquire((160, 160), n_coils=1, n_slices=4, sigma=0.01, seed=rng)[:, 0]
    mag = np.abs(imgs).astype(np.float64)
    factor = 1.25
    res = np.stack([ndi.zoom(m, factor, order=3, mode="nearest") for m in mag]).astype(np.float32)
    files = [writers.write_nifti(out / "registered.nii.gz", res, spacing=(3.0, 0.8, 0.8),
                                 description="resampled to template grid")]
    return {
        "path": "registered.nii.gz", "files": files, "format": "nifti",
        "truth": {
            "present": {"resampling": {"rows": {"factor": factor}, "cols": {"factor": factor}},
                        "magnitude_only": {"domain": "magnitude"}},
            "absent": ["lossy_compression", "background_masking"],
            "processing": ["single-coil magnitude at 160 x 160",
                           "cubic-spline resampling by 1.25 to 200 x 200", "float32 NIfTI"],
        },
    }


def _quantised(out: Path, rng: np.random.Generator) -> dict[str, Any]:
    imgs = synth.acquire((160, 160), n_coils=4, n_slices=4, sigma=0.01, seed=rng)
    mag = synth.rss(imgs, axis=1).astype(np.float64)
    lo, hi = np.percentile(mag, 3.0), np.percentile(mag, 99.0)
    levels = np.round(np.clip((mag - lo) / (hi - lo), 0, 1) * 255)
    clipped_low, clipped_high = float(np.mean(mag <= lo)), float(np.mean(mag >= hi))
    stack = (levels * 257).astype(np.uint16)  # 8-bit levels spread over the 16-bit range
    files = writers.write_raster_stack(out / "png16", stack, fmt="png", stem="export")
    return {
        "path": "png16", "files": files, "format": "png",
        "truth": {
            "present": {"intensity_quantization": {
                "distinct_levels": int(len(np.unique(levels))),
                "effective_bits": round(float(np.log2(len(np.unique(levels)))), 3),
                "clipped_fraction": round(clipped_low + clipped_high, 4),
                "clipped_low_fraction": round(clipped_low, 4),
                "clipped_high_fraction": round(clipped_high, 4)},
                "magnitude_only": {"domain": "magnitude"}},
            "absent": ["lossy_compression", "resampling"],
            "processing": ["4-coil root-sum-of-squares magnitude",
                           "window 3rd-99th percentile, rounded to 256 levels",
                           "stored as 16-bit PNG"],
        },
    }


def _masked(out: Path, rng: np.random.Generator) -> dict[str, Any]:
    imgs = synth.acquire((176, 176), n_coils=4, n_slices=4, sigma=0.012, seed=rng)
    mag = synth.rss(imgs, axis=1).astype(np.float32)
    smooth = ndi.gaussian_filter(mag, sigma=(0, 3, 3))
    mask = smooth > 0.2 * smooth.max()
    mask = np.stack([ndi.binary_fill_holes(ndi.binary_dilation(m, iterations=2)) for m in mask])
    masked = np.where(mask, mag, 0.0).astype(np.float32)
    files = [writers.write_nifti(out / "brain_masked.nii.gz", masked, spacing=(3.0, 1.0, 1.0),
                                 description="skull stripped")]
    return {
        "path": "brain_masked.nii.gz", "files": files, "format": "nifti",
        "truth": {
            "present": {"background_masking": {
                # every background sample outside the mask was set to 0
                "zero_background_fraction": 1.0,
                "fraction_of_image_zeroed": round(float(1 - mask.mean()), 4)},
                "magnitude_only": {"domain": "magnitude"}},
            "absent": ["lossy_compression", "resampling", "zero_filling"],
            "processing": ["4-coil root-sum-of-squares magnitude",
                           "background outside a dilated object mask set to 0", "float32 NIfTI"],
        },
    }


def _apodized(out: Path, rng: np.random.Generator) -> dict[str, Any]:
    imgs = synth.acquire((192, 192), n_coils=1, n_slices=4, sigma=0.004, seed=rng)[:, 0]
    k = synth.to_kspace(imgs)
    w = np.outer(np.hanning(192), np.hanning(192))
    mag = np.abs(synth.to_image(k * w))
    files = writers.write_dicom_series(out / "series", _u16(mag, 3000.0),
                                       series_description="FLAIR filtered", seed=23)
    return {
        "path": "series", "files": files, "format": "dicom",
        "truth": {
            "present": {"kspace_filtering": {"window": "hann"},
                        "magnitude_only": {"domain": "magnitude"}},
            "absent": ["lossy_compression", "resampling", "background_masking"],
            "processing": ["single-coil acquisition at 192 x 192",
                           "Hann window applied in k-space along both axes", "uint16 DICOM"],
        },
    }


def _partial_fourier(out: Path, rng: np.random.Generator) -> dict[str, Any]:
    imgs = synth.acquire((160, 160), n_coils=1, n_slices=4, sigma=0.01, seed=rng)[:, 0]
    k = synth.to_kspace(imgs)
    fraction = 0.625
    keep = int(round(160 * fraction))
    k[..., keep:, :] = 0  # the last rows of centred k-space were never acquired
    img = synth.to_image(k).astype(np.complex64)
    files = writers.write_npy(out / "half_fourier.npy", img)
    return {
        "path": "half_fourier.npy", "files": files, "format": "npy",
        "truth": {
            "present": {"partial_fourier": {"rows": {"fraction": fraction}}},
            "absent": ["lossy_compression", "magnitude_only", "background_masking"],
            "processing": ["single-coil complex acquisition at 160 x 160",
                           "partial Fourier: 100 of 160 phase-encoding rows acquired, "
                           "the rest zero", "complex64 npy"],
        },
    }


SOURCES: list[dict[str, Any]] = [
    {"slug": "raw-phantom-kspace", "build": _raw_multicoil,
     "name": "Larchmere multi-coil phantom k-space (raw)",
     "source": "Acquired in-house on the group's test bench; https://data.larchmere.example/raw",
     "licence": "CC BY 4.0 (group data)",
     "description": "Three slices of an 8-channel phantom acquisition stored as complex k-space.",
     "intended_use": "Reference raw data for undersampling experiments.",
     "uploader": "brandt",
     "comments": [("zhou", "Coil axis is 1 in the npz; the sidecar says so.", None)],
     "decision": ("okafor", "fit_for_reconstruction",
                  "Complex multi-coil k-space with noise to the edges; no processing found.")},
    {"slug": "openbrain-magnitude", "build": _zero_filled,
     "name": "OpenBrain T2 magnitude archive",
     "source": "Downloaded from https://openbrain.example/t2-axial (fictional portal)",
     "licence": "CC BY-NC 4.0",
     "description": "Axial T2 DICOM series at 256 x 256 advertised as 'raw scanner images'.",
     "intended_use": "Training set for a 4x undersampled reconstruction network.",
     "uploader": "zhou",
     "comments": [
         ("brandt", "The spectrum is empty outside the central half on both axes: these are "
                    "zero-filled from 128 x 128. Undersampling at 4x here is really 1x-2x on "
                    "the acquired support.", "zero_filling"),
         ("zhou", "Agreed. Background looks like root-sum-of-squares of about 8 coils too.",
          "coil_combination"),
     ],
     "history": [("okafor", "fit_for_reconstruction",
                  "Provisional, from the portal's description ('raw scanner images'), before "
                  "the analysis finished.")],
     "decision": ("brandt", "downstream_only",
                  "Zero-filled 2x and coil-combined magnitude: not usable as k-space; fine for "
                  "segmentation work.")},
    {"slug": "teaching-jpeg", "build": _jpeg,
     "name": "Radiology teaching collection (JPEG)",
     "source": "https://teaching-cases.example/mri (fictional)",
     "licence": "Educational use only",
     "description": "Five JPEG slices from an online teaching collection.",
     "intended_use": "Quick pretraining images.",
     "uploader": "quintero",
     "comments": [("okafor", "Blocking at 8 pixels is obvious in the signature figure.",
                   "lossy_compression")],
     "decision": ("okafor", "rejected", "JPEG compressed at about quality 75; 8-bit magnitude.")},
    {"slug": "registered-atlas", "build": _resliced,
     "name": "Template-registered cohort (NIfTI)",
     "source": "https://cohort-share.example/registered (fictional)",
     "licence": "Data-use agreement required",
     "description": "Volumes registered to a template grid before sharing.",
     "intended_use": "Benchmark for super-resolution.",
     "uploader": "brandt",
     "comments": [("quintero", "Is 1.25x resampling a problem for super-resolution work?",
                   "resampling")],
     "decision": None},
    {"slug": "windowed-png16", "build": _quantised,
     "name": "Windowed 16-bit PNG export",
     "source": "Exported from a viewer by a collaborator (fictional)",
     "licence": "Collaboration agreement",
     "description": "16-bit PNG files exported after display windowing.",
     "intended_use": "Denoising experiments.",
     "uploader": "quintero",
     "comments": [("brandt", "Only 256 distinct levels in a 16-bit file, with both ends clipped.",
                   "intensity_quantization")],
     "decision": ("brandt", "rejected",
                  "Display-windowed and quantised to 8 bits; noise statistics destroyed.")},
    {"slug": "skullstripped", "build": _masked,
     "name": "Skull-stripped brain set",
     "source": "https://neuro-preproc.example/stripped (fictional)",
     "licence": "CC BY 4.0",
     "description": "Preprocessed brain volumes with background removed.",
     "intended_use": "Segmentation pretraining.",
     "uploader": "zhou",
     "comments": [],
     "decision": ("okafor", "downstream_only",
                  "Background replaced by zeros; noise-based checks impossible.")},
    {"slug": "filtered-flair", "build": _apodized,
     "name": "Scanner export with k-space filter",
     "source": "Shared by a partner site (fictional)",
     "licence": "Partner agreement",
     "description": "FLAIR series exported with the vendor's default k-space filter on.",
     "intended_use": "Reconstruction test set.",
     "uploader": "brandt",
     "comments": [("okafor", "The profile tapers smoothly to the edges; that is apodization.",
                   "kspace_filtering")],
     "decision": None},
    {"slug": "half-fourier", "build": _partial_fourier,
     "name": "Half-Fourier research archive",
     "source": "https://pf-archive.example (fictional)",
     "licence": "CC0",
     "description": "Complex images from a partial Fourier protocol, zero-filled before sharing.",
     "intended_use": "Phase-constrained reconstruction experiments.",
     "uploader": "zhou",
     "comments": [],
     "decision": None},
]


def _rel(paths: list[Path], base: Path) -> list[str]:
    return [str(Path(p).relative_to(base)) for p in paths]


def generate(out: Path | str = DEFAULT_OUT, *, seed: int = 20261201,
             only: list[str] | None = None) -> dict[str, Any]:
    """Write every demo source under ``out`` and return (and write) the manifest.

    Parameters
    ----------
    out : path
        Output folder; one sub-folder per source (replaced if present).
    seed : int
        Seed of the generator (each source draws from its own child stream).
    only : list of str, optional
        Slugs of the sources to write (all by default).
    """
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    children = np.random.SeedSequence(seed).spawn(len(SOURCES))
    entries = []
    for spec, child in zip(SOURCES, children, strict=True):
        if only is not None and spec["slug"] not in only:
            continue
        folder = out / spec["slug"]
        if folder.exists():
            shutil.rmtree(folder)
        folder.mkdir(parents=True)
        built = spec["build"](folder, np.random.default_rng(child))
        entry = {k: v for k, v in spec.items() if k not in ("build", "history")}
        entry["path"] = f"{spec['slug']}/{built['path']}"
        entry["files"] = _rel(built["files"], out)
        entry["format"] = built["format"]
        entry["truth"] = built["truth"]
        entry["size_bytes"] = int(sum(Path(p).stat().st_size for p in built["files"]))
        entry["comments"] = [{"author": a, "body": b, "trace": t} for a, b, t in spec["comments"]]
        entry["earlier_decisions"] = [{"reviewer": r, "outcome": o, "rationale": t}
                                      for r, o, t in spec.get("history", [])]
        dec = spec["decision"]
        entry["decision"] = (None if dec is None else
                             {"reviewer": dec[0], "outcome": dec[1], "rationale": dec[2]})
        entries.append(entry)
    manifest = {"lab": LAB, "members": MEMBERS, "seed": seed, "sources": entries}
    (out / MANIFEST).write_text(json.dumps(manifest, indent=2), encoding="utf-8")
    return manifest


def load_manifest(out: Path | str = DEFAULT_OUT) -> dict[str, Any]:
    """Read a generated manifest."""
    return json.loads((Path(out) / MANIFEST).read_text(encoding="utf-8"))


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    out = Path(args[0]) if args else DEFAULT_OUT
    manifest = generate(out)
    for s in manifest["sources"]:
        print(f"{s['slug']:<22} {s['format']:<6} {s['size_bytes'] / 1e6:6.2f} MB  {s['path']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
