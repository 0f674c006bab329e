"""The ``probe`` and ``crop`` sub-commands: what naive use would cost, and what to use instead.

    rawproof probe PATH [-R 4] [--family polynomial] [--slices 8] [--json]
    rawproof crop PATH -o OUT.npz|OUT.h5

``probe`` prints the ``rawproof.probe/1`` object documented in :mod:`app.probe`;
``crop`` writes the support-cropped k-space and its ``rawproof.crop/1`` sidecar
(:mod:`app.crop`). Progress goes to stderr.
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

import app
from app import sampling
from app.cli.common import EXIT_BAD_INPUT, EXIT_OK, Command
from app.errors import InputError


def _add_input(p: argparse.ArgumentParser) -> None:
    p.add_argument("path", help="file, folder or .zip (the first group is used)")
    p.add_argument("--domain", choices=["image", "kspace"], help="override the array domain")
    p.add_argument("--coil-axis", type=int, help="axis of a multi-coil array that holds channels")
    p.add_argument("--dataset", help="HDF5 dataset key")
    p.add_argument("--workers", type=int, default=2, help="threads for FFTs (default 2)")


def _add_probe(p: argparse.ArgumentParser) -> None:
    from app import probe

    _add_input(p)
    p.add_argument("-R", "--acceleration", type=float, default=probe.DEFAULT_ACCELERATION,
                   help="nominal acceleration (default 4)")
    p.add_argument("--family", default=probe.DEFAULT_FAMILY, choices=sampling.FAMILIES,
                   help=f"mask family (default {probe.DEFAULT_FAMILY})")
    p.add_argument("--slices", type=int, default=probe.DEFAULT_SLICES,
                   help="evenly spaced slices probed (default 8)")
    p.add_argument("--seed", type=int, default=0, help="mask seed (default 0)")
    p.add_argument("--json", action="store_true", help="print the rawproof.probe/1 object")
    p.add_argument("--quiet", action="store_true", help="no progress on stderr")


def _summary(out: dict[str, Any]) -> str:
    d, c = out["routes"]["as_delivered"], out["routes"]["support_cropped"]
    lines = [f"rawproof probe: {out['slices']} slice(s), {out['family']} mask, "
             f"nominal R = {out['acceleration']:g}, {out['seconds']:.1f} s",
             f"{'route':<18}{'shape':>10}{'eff. R':>8}{'NRMSE':>8}{'SSIM':>7}{'PSNR':>7}"
             f"   zero-filled NRMSE"]
    for name, r in (("as delivered", d), ("support-cropped", c)):
        lines.append(f"{name:<18}{'x'.join(map(str, r['shape'])):>10}"
                     f"{r['effective_acceleration']:>8.2f}{r['nrmse']:>8.3f}{r['ssim']:>7.3f}"
                     f"{r['psnr']:>7.1f}   {r['zero_filled']['nrmse']:.3f}")
    g = out["gap"]["nrmse"]
    lines.append(f"gap: naive use {'flatters' if g > 0 else 'changes'} the compressed-sensing "
                 f"NRMSE by {100 * g:.1f} % at R = {out['acceleration']:g}")
    lines.append(app.CAUTION)
    return "\n".join(lines)


def _run_probe(args: Any) -> int:
    from app import probe

    def progress(frac: float, text: str) -> None:
        if not args.quiet:
            print(f"rawproof: probe {100 * frac:.0f}% {text}", file=sys.stderr, flush=True)

    try:
        out = probe.probe_path(args.path, domain=args.domain, coil_axis=args.coil_axis,
                               dataset=args.dataset, workers=args.workers, progress=progress,
                               slices=args.slices, acceleration=args.acceleration,
                               family=args.family, seed=args.seed)
    except InputError as exc:
        if args.json:
            print(json.dumps({"schema": probe.SCHEMA, "error": exc.to_dict()}, indent=2))
        print(f"rawproof: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    print(json.dumps(out, indent=2) if args.json else _summary(out))
    return EXIT_OK


def _add_crop(p: argparse.ArgumentParser) -> None:
    _add_input(p)
    p.add_argument("-o", "--output", required=True,
                   help="OUT.npz or OUT.h5 (a JSON sidecar OUT.json is written beside it)")
    p.add_argument("--format", choices=["npz", "hdf5"], help="when OUT has no suffix")


def _run_crop(args: Any) -> int:
    from app import crop

    try:
        meta = crop.export_path(args.path, args.output, fmt=args.format, domain=args.domain,
                                coil_axis=args.coil_axis, dataset=args.dataset,
                                workers=args.workers)
    except InputError as exc:
        print(f"rawproof: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    print(f"wrote {', '.join(meta['files'])}: k-space {meta['input_shape']} -> {meta['shape']}"
          f" ({meta['frames']} frame(s))")
    for line in meta["cannot_undo"]:
        print(f"a crop cannot undo: {line}")
    print(app.CAUTION)
    return EXIT_OK


PROBE = Command("probe", "how much retrospective undersampling of this data would flatter a "
                "method (as delivered vs support-cropped)", _add_probe, _run_probe)
CROP = Command("crop", "write the support-cropped k-space (.npz or .h5) with a JSON sidecar",
               _add_crop, _run_crop)
