"""The long fuzz run: mutate the seed files for N minutes and check every reader.

    python fuzz/run.py --minutes 10 [--seed 1] [--pipeline] [--out DIR]

Each input goes through :func:`fuzz.harness.check_input` with a wall-clock
alarm (``--timeout``, seconds per input) and, on Linux, an address-space
ceiling (``--max-memory-gib``) so that a real runaway allocation shows up as a
finding instead of taking the machine down. Findings (the input bytes and a
one-line reason) are written under ``--out``; the summary at the end lists
inputs per seed, outcomes and findings. Exit status 1 when anything was found.
"""

from __future__ import annotations

import argparse
import collections
import hashlib
import logging
import random
import signal
import sys
import tempfile
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from fuzz.harness import FindingError, check_input, check_pipeline  # noqa: E402
from fuzz.mutate import mutate  # noqa: E402
from fuzz.seeds import seeds  # noqa: E402


class _TimeoutError(Exception):
    pass


def _alarm(_sig, _frame) -> None:  # noqa: ANN001
    raise _TimeoutError()


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=10.0, help="how long to run")
    ap.add_argument("--seed", type=int, default=1, help="random seed (runs are repeatable)")
    ap.add_argument("--timeout", type=float, default=20.0, help="seconds allowed per input")
    ap.add_argument("--max-memory-gib", type=float, default=4.0,
                    help="address-space ceiling of this process (Linux)")
    ap.add_argument("--pipeline", action="store_true",
                    help="also run the analysers on inputs that read (slower)")
    ap.add_argument("--out", default=str(Path(tempfile.gettempdir()) / "rawproof-fuzz-findings"),
                    help="folder for the inputs that failed")
    args = ap.parse_args(argv)

    try:
        import resource

        cap = int(args.max_memory_gib * 2**30)
        resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
    except (ImportError, ValueError, OSError):
        pass
    warnings.simplefilter("ignore")
    logging.disable(logging.CRITICAL)
    signal.signal(signal.SIGALRM, _alarm)

    rng = random.Random(args.seed)
    corpus = seeds()
    names = sorted(corpus)
    per_seed: collections.Counter[str] = collections.Counter()
    outcomes: collections.Counter[str] = collections.Counter()
    findings: dict[str, str] = {}
    out = Path(args.out)
    peak_max = 0
    start = time.monotonic()
    deadline = start + args.minutes * 60
    while time.monotonic() < deadline:
        name = rng.choice(names)
        suffix, data = corpus[name]
        try:
            sample = mutate(data, suffix, rng)
        except Exception as exc:  # noqa: BLE001 - a bug of the mutator, not of a reader
            outcomes[f"mutator error {type(exc).__name__}"] += 1
            continue
        per_seed[name] += 1
        signal.setitimer(signal.ITIMER_REAL, args.timeout)
        try:
            res = check_input(sample, suffix)
            outcomes[res.kind if res.kind == "volumes" else f"InputError {res.code}"] += 1
            peak_max = max(peak_max, res.peak_bytes)
            if args.pipeline and res.kind == "volumes":
                failed = check_pipeline(sample, suffix)
                outcomes["analysed"] += 1
                if failed:
                    raise FindingError("analyser failed: " + "; ".join(failed))
        except (FindingError, _TimeoutError, MemoryError) as exc:
            reason = ("time bound exceeded" if isinstance(exc, _TimeoutError)
                      else f"{type(exc).__name__}: {exc}")
            digest = hashlib.sha256(sample).hexdigest()[:16]
            out.mkdir(parents=True, exist_ok=True)
            (out / f"{name}-{digest}{suffix}").write_bytes(sample)
            findings[f"{name}-{digest}{suffix}"] = " ".join(reason.split())[:300]
            outcomes["finding"] += 1
        finally:
            signal.setitimer(signal.ITIMER_REAL, 0)
    elapsed = time.monotonic() - start
    total = sum(per_seed.values())
    print(f"fuzz run: {total} inputs in {elapsed:.0f} s (seed {args.seed}), "
          f"{len(findings)} findings, largest heap peak {peak_max / 2**20:.1f} MiB")
    print("inputs per seed: " + ", ".join(f"{k} {v}" for k, v in sorted(per_seed.items())))
    print("outcomes: " + ", ".join(f"{k} {v}" for k, v in outcomes.most_common()))
    for fname, reason in sorted(findings.items()):
        print(f"FINDING {out / fname}: {reason}")
    return 1 if findings else 0


if __name__ == "__main__":
    sys.exit(main())
