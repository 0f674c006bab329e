"""Mutation probe of the analysers' decision thresholds.

    python -m bench.mutation_probe [--only NAME[,NAME...]] [--list] [--keep]

Each mutation below moves one decision threshold or flips one decision comparison
in an analyser (``app/traces``), the calibration rule or the verdict rule. The
probe copies the repository's tracked files (the working tree's current content,
plus any untracked test file a mutation names) into a temporary directory, checks
that every mutation's test selection passes there unmutated, then applies one
mutation at a time, runs ``pytest -x`` on that mutation's test files inside the
copy, and restores the file. A mutant is *killed* when a test fails (or the
mutated module no longer imports) and *survives* when every selected test still
passes: a threshold no test pins. The shared working tree is never touched.

Exit status: 0 when every mutant is killed, 1 when any survives, 2 when the probe
itself cannot run (a snippet not found exactly once, a failing baseline, the copy
not the code under test).
"""

from __future__ import annotations

import argparse
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

#: the test-file run for most mutants: the threshold pins, first (they fail fastest)
PINS = "tests/test_decision_thresholds.py"
#: the marker expression of the inner loop (DEVELOPERS.md, "Test tiers")
MARKERS = "not server and not browser and not load and not slow"
#: seconds before a mutant's test run is stopped (and counted killed, by timeout)
TIMEOUT = 300.0
#: return code the guard plugin exits with when ``app`` is not imported from the copy
GUARD_RC = 17


@dataclass(frozen=True)
class Mutation:
    """One hand-made change of a decision rule.

    Attributes
    ----------
    name : str
        Short identifier (``--only`` takes it).
    path : str
        File to change, relative to the repository root.
    original : str
        Exact source snippet; must occur exactly once in ``path``.
    replacement : str
        What replaces it.
    tests : tuple of str
        Test files (or node ids) whose run must kill the mutant.
    what : str
        The rule the mutation breaks, in words.
    """

    name: str
    path: str
    original: str
    replacement: str
    tests: tuple[str, ...]
    what: str


def _m(name: str, path: str, original: str, replacement: str, tests: tuple[str, ...],
       what: str) -> Mutation:
    return Mutation(name, f"app/traces/{path}", original, replacement, tests, what)


MUTATIONS: tuple[Mutation, ...] = (
    # ---- zero-filling and the support step ----------------------------------------
    _m("support.found_support_low", "support.py",
       "FOUND_SUPPORT = 0.985", "FOUND_SUPPORT = 0.95",
       (PINS, "tests/test_zero_filling.py"),
       "an axis counts as zero-filled below 98.5 % support (moved to 95 %)"),
    _m("support.found_support_high", "support.py",
       "FOUND_SUPPORT = 0.985", "FOUND_SUPPORT = 0.995",
       (PINS, "tests/test_zero_filling.py"),
       "an axis counts as zero-filled below 98.5 % support (moved to 99.5 %)"),
    _m("zero_filling.found_ignores_support", "zero_filling.py",
       "if a.found and a.support_fraction < FOUND_SUPPORT]", "if a.found]",
       (PINS, "tests/test_zero_filling.py"),
       "zero_filling counts only axes whose support is below FOUND_SUPPORT"),
    _m("support.step_threshold_low", "support.py",
       "STEP_THRESHOLD_DB = 4.5", "STEP_THRESHOLD_DB = 3.5",
       (PINS, "tests/test_zero_filling.py"),
       "a magnitude edge needs a 4.5 dB step score (moved to 3.5 dB)"),
    _m("support.step_threshold_high", "support.py",
       "STEP_THRESHOLD_DB = 4.5", "STEP_THRESHOLD_DB = 5.5",
       (PINS, "tests/test_zero_filling.py"),
       "a magnitude edge needs a 4.5 dB step score (moved to 5.5 dB)"),
    _m("support.empty_share", "support.py",
       "EMPTY_SHARE = 0.25", "EMPTY_SHARE = 0.5",
       (PINS, "tests/test_zero_filling.py"),
       "a complex k-space line is empty below a quarter of the noise floor (moved to half)"),
    _m("support.empty_share_low", "support.py",
       "EMPTY_SHARE = 0.25", "EMPTY_SHARE = 0.05",
       (PINS, "tests/test_zero_filling.py"),
       "a complex k-space line is empty below a quarter of the noise floor (moved to 5 %)"),
    _m("support.false_alarm", "support.py",
       "FALSE_ALARM_RATE = 1e-3", "FALSE_ALARM_RATE = 0.2",
       (PINS, "tests/test_zero_filling.py"),
       "the empty-band Gamma test runs at 1e-3 per dataset (moved to 0.2)"),
    _m("support.false_alarm_low", "support.py",
       "FALSE_ALARM_RATE = 1e-3", "FALSE_ALARM_RATE = 1e-7",
       (PINS, "tests/test_zero_filling.py"),
       "the empty-band Gamma test runs at 1e-3 per dataset (moved to 1e-7)"),
    _m("support.intersection_union", "support.py",
       'weaker = max(sides.values(), key=lambda s: s["p"])',
       'weaker = min(sides.values(), key=lambda s: s["p"])',
       (PINS, "tests/test_zero_filling.py"),
       "zero-filling's p-value is the less empty side's (intersection-union test)"),
    # ---- coil combination ------------------------------------------------------------
    _m("coil.l_split_low", "coil_combination.py",
       "L_SPLIT = 1.5", "L_SPLIT = 1.2",
       (PINS, "tests/test_coil_combination.py"),
       "Rayleigh below an effective L of 1.5, non-central chi above (moved to 1.2)"),
    _m("coil.l_split_high", "coil_combination.py",
       "L_SPLIT = 1.5", "L_SPLIT = 1.8",
       (PINS, "tests/test_coil_combination.py"),
       "Rayleigh below an effective L of 1.5, non-central chi above (moved to 1.8)"),
    _m("coil.rss_named_linear", "coil_combination.py",
       '"combination": "rss"}', '"combination": "linear"}',
       (PINS, "tests/test_coil_combination.py"),
       "the chi law names the combination rss"),
    _m("coil.rayleigh_not_single", "coil_combination.py",
       'combination = "single" if chosen == "rayleigh" else "unknown"',
       'combination = "unknown"',
       (PINS, "tests/test_coil_combination.py"),
       "the Rayleigh law names the combination single"),
    _m("coil.linear_false_alarm", "coil_combination.py",
       "FALSE_ALARM = 1e-3", "FALSE_ALARM = 1e-2",
       (PINS, "tests/test_coil_combination.py"),
       "a linear combination is called below p = 1e-3 for one common sigma (moved to 1e-2)"),
    _m("coil.linear_false_alarm_low", "coil_combination.py",
       "FALSE_ALARM = 1e-3", "FALSE_ALARM = 1e-4",
       (PINS, "tests/test_coil_combination.py"),
       "a linear combination is called below p = 1e-3 for one common sigma (moved to 1e-4)"),
    _m("coil.ks_accept", "coil_combination.py",
       "KS_ACCEPT = 0.08", "KS_ACCEPT = 0.25",
       (PINS, "tests/test_coil_combination.py"),
       "a law is accepted up to a KS distance of 0.08 (moved to 0.25)"),
    _m("coil.tail_ratio", "coil_combination.py",
       "TAIL_RATIO = 3.0", "TAIL_RATIO = 30.0",
       (PINS, "tests/test_coil_combination.py"),
       "an offset floor (lower-tail ratio above 3) fits no law (moved to 30)"),
    # ---- value kind and magnitude only --------------------------------------------
    _m("value_kind.negative_share", "value_kind.py",
       "NEG_OVERALL_SHARE = 0.05", "NEG_OVERALL_SHARE = 0.25",
       (PINS, "tests/test_magnitude_only.py"),
       "5 % negative values make an image real_signed (moved to 25 %)"),
    _m("value_kind.negative_share_low", "value_kind.py",
       "NEG_OVERALL_SHARE = 0.05", "NEG_OVERALL_SHARE = 0.02",
       (PINS, "tests/test_magnitude_only.py"),
       "5 % negative values make an image real_signed (moved to 2 %)"),
    _m("value_kind.imag_zero", "value_kind.py",
       "IMAG_ZERO = 1e-10", "IMAG_ZERO = 1e-4",
       (PINS, "tests/test_magnitude_only.py"),
       "an imaginary energy share above 1e-10 keeps values complex (moved to 1e-4)"),
    _m("magnitude_only.signed_absent", "magnitude_only.py",
       'present=vk.domain != "complex")',
       'present=vk.domain == "magnitude")',
       (PINS, "tests/test_magnitude_only.py"),
       "signed real values are a present call (their confidence is that of present)"),
    # ---- intensity quantisation -------------------------------------------------------
    _m("quantisation.eight_bits_strict", "intensity_quantization.py",
       "squeezed = (stats.distinct <= SQUEEZED_LEVELS",
       "squeezed = (stats.distinct < SQUEEZED_LEVELS",
       (PINS, "tests/test_intensity_quantization.py"),
       "256 grey levels (8 bits) or fewer are squeezed"),
    _m("quantisation.levels_high", "intensity_quantization.py",
       "SQUEEZED_LEVELS = 256", "SQUEEZED_LEVELS = 1024",
       (PINS, "tests/test_intensity_quantization.py"),
       "more than 256 grey levels are not squeezed (moved to 1024)"),
    _m("quantisation.comb_score", "intensity_quantization.py",
       "COMB_SCORE = 0.08", "COMB_SCORE = 0.4",
       (PINS, "tests/test_intensity_quantization.py"),
       "a comb needs 8 % empty levels (moved to 40 %)"),
    _m("quantisation.clip_fraction", "intensity_quantization.py",
       "CLIP_FRACTION = 0.002", "CLIP_FRACTION = 0.02",
       (PINS, "tests/test_intensity_quantization.py"),
       "0.2 % of samples piled on an end value is clipping (moved to 2 %)"),
    _m("quantisation.clip_fraction_low", "intensity_quantization.py",
       "CLIP_FRACTION = 0.002", "CLIP_FRACTION = 0.0005",
       (PINS, "tests/test_intensity_quantization.py"),
       "0.2 % of samples piled on an end value is clipping (moved to 0.05 %)"),
    # ---- lossy compression -------------------------------------------------------------
    _m("lossy.quality_tolerance", "lossy_compression.py",
       "QUALITY_TOLERANCE = 5", "QUALITY_TOLERANCE = 30",
       (PINS, "tests/test_lossy_compression.py"),
       "stored and pixel qualities more than 5 apart disagree (moved to 30)"),
    _m("lossy.quality_tolerance_low", "lossy_compression.py",
       "QUALITY_TOLERANCE = 5", "QUALITY_TOLERANCE = 4",
       (PINS, "tests/test_lossy_compression.py"),
       "stored and pixel qualities more than 5 apart disagree (moved to 4)"),
    _m("lossy.min_measured", "jpeg_pixels.py",
       "MIN_MEASURED = 3", "MIN_MEASURED = 1",
       (PINS, "tests/test_lossy_compression.py"),
       "JPEG from the pixels needs 3 quantised frequencies (moved to 1)"),
    _m("lossy.min_measured_any", "jpeg_pixels.py",
       "MIN_MEASURED_ANY = 6", "MIN_MEASURED_ANY = 5",
       (PINS, "tests/test_lossy_compression.py"),
       "without 2 low frequencies, JPEG needs 6 quantised frequencies (moved to 5)"),
    _m("lossy.max_fit_error", "jpeg_pixels.py",
       "MAX_FIT_ERROR = 0.15", "MAX_FIT_ERROR = 0.6",
       (PINS, "tests/test_lossy_compression.py"),
       "an IJG quality is named up to a table error of 0.15 (moved to 0.6)"),
    _m("lossy.max_fit_error_low", "jpeg_pixels.py",
       "MAX_FIT_ERROR = 0.15", "MAX_FIT_ERROR = 0.05",
       (PINS, "tests/test_lossy_compression.py"),
       "an IJG quality is named up to a table error of 0.15 (moved to 0.05)"),
    # ---- resampling --------------------------------------------------------------------
    _m("resampling.peak_ratio", "resampling.py",
       "PEAK_RATIO = 8.0", "PEAK_RATIO = 12.0",
       (PINS, "tests/test_resampling.py"),
       "an on-axis p-map peak needs 8 times its local median (moved to 12)"),
    _m("resampling.peak_ratio_low", "resampling.py",
       "PEAK_RATIO = 8.0", "PEAK_RATIO = 6.0",
       (PINS, "tests/test_resampling.py"),
       "an on-axis p-map peak needs 8 times its local median (moved to 6)"),
    _m("resampling.off_axis_ratio", "resampling.py",
       "OFF_AXIS_RATIO = 5.0", "OFF_AXIS_RATIO = 7.0",
       (PINS, "tests/test_resampling.py"),
       "an off-axis peak over four or more frames needs 5 times its median (moved to 7)"),
    _m("resampling.off_axis_ratio_low", "resampling.py",
       "OFF_AXIS_RATIO = 5.0", "OFF_AXIS_RATIO = 4.0",
       (PINS, "tests/test_resampling.py"),
       "an off-axis peak over four or more frames needs 5 times its median (moved to 4)"),
    _m("resampling.confirm_alpha", "resampling.py",
       "CONFIRM_ALPHA = 1e-4", "CONFIRM_ALPHA = 0.5",
       (PINS, "tests/test_resampling.py"),
       "a p-map peak counts only when the neighbour correlation confirms it at 1e-4"),
    # ---- k-space filtering -------------------------------------------------------------
    _m("filtering.attenuation", "kspace_filtering.py",
       "MIN_ATTENUATION_DB = 3.0", "MIN_ATTENUATION_DB = 20.0",
       (PINS, "tests/test_kspace_filtering.py"),
       "a window must attenuate the outer support by 3 dB (moved to 20 dB)"),
    _m("filtering.ratio", "kspace_filtering.py",
       "RATIO = 0.6", "RATIO = 0.98",
       (PINS, "tests/test_kspace_filtering.py"),
       "the window's residual must be below 0.6 of the unfiltered one (moved to 0.98)"),
    _m("filtering.min_gain", "kspace_filtering.py",
       "MIN_GAIN_DB = 1.3", "MIN_GAIN_DB = 3.0",
       (PINS, "tests/test_kspace_filtering.py"),
       "a window must fit better than the unfiltered model by 1.3 dB (moved to 3 dB)"),
    _m("filtering.min_gain_low", "kspace_filtering.py",
       "MIN_GAIN_DB = 1.3", "MIN_GAIN_DB = 0.8",
       (PINS, "tests/test_kspace_filtering.py"),
       "a window must fit better than the unfiltered model by 1.3 dB (moved to 0.8 dB)"),
    # ---- partial Fourier ---------------------------------------------------------------
    _m("partial_fourier.asymmetry", "partial_fourier.py",
       "ASYMMETRY_FRACTION = 0.95", "ASYMMETRY_FRACTION = 0.7",
       (PINS, "tests/test_partial_fourier.py"),
       "complex data with an acquired fraction below 0.95 are partial Fourier (moved to 0.7)"),
    _m("partial_fourier.magnitude_step", "partial_fourier.py",
       "MAGNITUDE_STEP_DB = 7.0", "MAGNITUDE_STEP_DB = 3.5",
       (PINS, "tests/test_partial_fourier.py"),
       "a magnitude image's inner step needs 7 dB (moved to 3.5 dB)"),
    _m("partial_fourier.zeros_origin", "partial_fourier.py",
       'origin = "acquisition" if fill == "zeros" else "processing"',
       'origin = "processing"',
       (PINS, "tests/test_partial_fourier.py"),
       "a missing side left as zeros is an acquisition property, not processing"),
    _m("partial_fourier.conjugate_r", "partial_fourier.py",
       "CONJUGATE_R = 0.9", "CONJUGATE_R = 0.995",
       (PINS, "tests/test_partial_fourier.py"),
       "outer bands correlated at 0.9 with their mirror are a conjugate copy"),
    _m("pf_fill.resynthesis_alpha", "partial_fourier.py",
       "    found = p <= FALSE_ALARM_RATE\n", "    found = p <= 0.5\n",
       (PINS, "tests/test_partial_fourier.py"),
       "a re-synthesised side is called at the 1e-3 false-alarm rate (moved to 0.5)"),
    _m("pf_fill.lower_tail", "pf_fill.py",
       "n_tests * stats.f.cdf(ratio, d1, d2)", "n_tests * stats.f.sf(ratio, d1, d2)",
       (PINS, "tests/test_partial_fourier.py"),
       "a fill is a residual far *below* the noise: the F test's lower tail"),
    # ---- k-space synthesis -------------------------------------------------------------
    _m("synthesis.filled_share", "kspace_synthesis.py",
       "FILLED_SHARE = 0.08", "FILLED_SHARE = 0.6",
       (PINS, "tests/test_kspace_synthesis.py"),
       "8 % of the lines predicted below the noise is synthesis (moved to 60 %)"),
    _m("synthesis.min_coupling", "kspace_synthesis.py",
       "MIN_COUPLING = 1.5", "MIN_COUPLING = 5.0",
       (PINS, "tests/test_kspace_synthesis.py"),
       "fold coupling of 1.5 times independent noise is unfolding (moved to 5)"),
    _m("synthesis.min_coupling_low", "kspace_synthesis.py",
       "MIN_COUPLING = 1.5", "MIN_COUPLING = 1.2",
       (PINS, "tests/test_kspace_synthesis.py"),
       "fold coupling of 1.5 times independent noise is unfolding (moved to 1.2)"),
    _m("synthesis.false_alarm", "kspace_synthesis.py",
       "FALSE_ALARM = 1e-3", "FALSE_ALARM = 1e-2",
       (PINS, "tests/test_kspace_synthesis.py"),
       "synthesis is called at the 1e-3 false-alarm rate (moved to 1e-2)"),
    # ---- background masking ------------------------------------------------------------
    _m("masking.flattened_called_masked", "background_masking.py",
       "    if const.masked:\n", "    if const.masked or const.flattened:\n",
       (PINS, "tests/test_background_masking.py"),
       "air flattened above lower values is not a mask (inconclusive)"),
    # ---- header and pixels ---------------------------------------------------------------
    _m("declared.decide", "declared.py",
       "DECIDE = 0.65", "DECIDE = 0.55",
       (PINS, "tests/test_declared.py"),
       "a combined call needs a posterior of 0.65 (moved to 0.55)"),
    _m("declared.decide_high", "declared.py",
       "DECIDE = 0.65", "DECIDE = 0.75",
       (PINS, "tests/test_declared.py"),
       "a combined call needs a posterior of 0.65 (moved to 0.75)"),
    _m("declared.zero_fill_factor", "declared.py",
       "if max(factors.values()) <= 1.05:", "if max(factors.values()) <= 1.5:",
       (PINS, "tests/test_declared.py"),
       "AcquisitionMatrix shown on more than 1.05 times the pixels declares zero-filling"),
    _m("declared.zero_fill_factor_low", "declared.py",
       "if max(factors.values()) <= 1.05:", "if max(factors.values()) <= 1.02:",
       (PINS, "tests/test_declared.py"),
       "AcquisitionMatrix on over 1.05 times the pixels declares zero-filling (moved to 1.02)"),
    # ---- calibration and the verdict -----------------------------------------------------
    _m("report.calibrated_half", "report.py",
       "if right < 0.5:", "if right < 0.3:",
       (PINS, "tests/test_calibration.py"),
       "a call whose calibrated probability of being right is below 1/2 is inconclusive"),
    _m("report.calibrated_half_high", "report.py",
       "if right < 0.5:", "if right < 0.6:",
       (PINS, "tests/test_calibration.py"),
       "a call calibrated below 1/2 of being right is inconclusive (moved to 0.6)"),
    _m("report.verdict_origin", "report.py",
       'if any(s == "present" and o == "processing" for s, o in statuses):',
       'if any(s == "present" for s, o in statuses):',
       (PINS, "tests/test_report_contract.py"),
       "a present trace of acquisition origin does not make a dataset processed"),
    _m("report.verdict_raw_like", "report.py",
       'all(s == "absent" or (s == "present" and o == "acquisition")',
       'all(s != "present"',
       (PINS, "tests/test_report_contract.py"),
       "raw-like needs every trace absent (or present by acquisition); inconclusive is not"),
)


GUARD_PLUGIN = '''"""Stops a probe run whose ``app`` is not the temporary copy's."""
import os

import pytest


def pytest_sessionstart(session):
    import app

    root = os.path.realpath(os.environ["RAWPROOF_PROBE_ROOT"])
    where = os.path.realpath(app.__file__)
    if not where.startswith(root + os.sep):
        pytest.exit(f"app imported from {where}, not from the copy {root}", returncode=GUARD_RC)
'''.replace("GUARD_RC", str(GUARD_RC))


def _repo_root() -> Path:
    here = Path(__file__).resolve().parent
    out = subprocess.run(["git", "rev-parse", "--show-toplevel"], cwd=here, check=True,
                         capture_output=True, text=True)
    return Path(out.stdout.strip())


def _tracked(root: Path) -> list[str]:
    out = subprocess.run(["git", "ls-files", "-z"], cwd=root, check=True, capture_output=True)
    return [p for p in out.stdout.decode().split("\0") if p]


def _copy_tree(root: Path, dest: Path, extra: list[str]) -> int:
    """Copy the tracked files (working-tree content) and ``extra`` paths into ``dest``."""
    n = 0
    for rel in sorted(set(_tracked(root)) | set(extra)):
        src = root / rel
        if not src.is_file():
            continue  # deleted in the working tree, or a test node id
        dst = dest / rel
        dst.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(src, dst)
        n += 1
    return n


def check_snippets(root: Path, mutations: list[Mutation]) -> list[str]:
    """Problems with the mutations against the files under ``root`` (empty: all fine)."""
    problems = []
    for m in mutations:
        path = root / m.path
        if not path.is_file():
            problems.append(f"{m.name}: {m.path} does not exist")
            continue
        count = path.read_text(encoding="utf-8").count(m.original)
        if count != 1:
            problems.append(f"{m.name}: snippet found {count} times in {m.path} "
                            f"(needs exactly once): {m.original!r}")
        if m.original == m.replacement:
            problems.append(f"{m.name}: replacement equals the original")
    return problems


def _test_files(m: Mutation) -> list[str]:
    return [t.split("::")[0] for t in m.tests]


def _run_pytest(copy: Path, plugin_dir: Path, tests: list[str], timeout: float
                ) -> tuple[int | None, float, str]:
    """Run pytest on ``tests`` inside the copy: (return code or None on timeout, s, output)."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(copy), str(plugin_dir)])
    env["PYTHONDONTWRITEBYTECODE"] = "1"  # a mutant and its restore may share an mtime
    env["RAWPROOF_PROBE_ROOT"] = str(copy)
    cmd = [sys.executable, "-m", "pytest", "-x", "-q", "-p", "no:cacheprovider",
           "-p", "rawproof_probe_guard", "-m", MARKERS, *tests]
    t0 = time.monotonic()
    proc = subprocess.Popen(cmd, cwd=copy, env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True, start_new_session=True)
    try:
        out, _ = proc.communicate(timeout=timeout)
        rc: int | None = proc.returncode
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)  # the run this probe started, and its children
        out, _ = proc.communicate()
        rc = None
    return rc, time.monotonic() - t0, out


def _killer(output: str) -> str:
    """The first failing test (or error) named in pytest's short summary."""
    for line in output.splitlines():
        if line.startswith(("FAILED ", "ERROR ")):
            return line.split(" - ")[0].split(" ", 1)[1]
    return ""


def _verdict(rc: int | None) -> str:
    if rc is None:
        return "killed (timeout)"
    if rc == 0:
        return "survived"
    if rc == 5:
        return "survived (no test ran)"
    if rc in (1, 2):
        return "killed"
    return f"killed (pytest exit {rc})"


def probe(mutations: list[Mutation], *, keep: bool = False, timeout: float = TIMEOUT) -> int:
    """Run the probe on ``mutations``; print the table; return the exit status."""
    root = _repo_root()
    problems = check_snippets(root, mutations)
    if problems:
        print("mutation probe: cannot run:", *problems, sep="\n  ", file=sys.stderr)
        return 2
    tmp = Path(tempfile.mkdtemp(prefix="rawproof-mutants-"))
    copy, plugin_dir = tmp / "repo", tmp / "plugin"
    plugin_dir.mkdir(parents=True)
    (plugin_dir / "rawproof_probe_guard.py").write_text(GUARD_PLUGIN, encoding="utf-8")
    try:
        tests = sorted({t for m in mutations for t in m.tests})
        n = _copy_tree(root, copy, [t for t in _test_files_all(mutations)])
        print(f"copied {n} files to {copy}")
        problems = check_snippets(copy, mutations)
        missing = [t for t in tests if not (copy / t.split("::")[0]).is_file()]
        if problems or missing:
            print("mutation probe: the copy differs:", *problems,
                  *(f"missing test file {t}" for t in missing), sep="\n  ", file=sys.stderr)
            return 2
        rc, secs, out = _run_pytest(copy, plugin_dir, tests, timeout * 2)
        print(f"baseline (unmutated copy, {len(tests)} test files): exit {rc}, {secs:.1f} s")
        if rc != 0:
            print(out[-4000:], file=sys.stderr)
            print("mutation probe: the unmutated copy fails its tests (or app was not "
                  "imported from the copy); nothing can be judged", file=sys.stderr)
            return 2
        rows = []
        t_all = time.monotonic()
        for m in mutations:
            path = copy / m.path
            text = path.read_text(encoding="utf-8")
            path.write_text(text.replace(m.original, m.replacement, 1), encoding="utf-8")
            try:
                rc, secs, out = _run_pytest(copy, plugin_dir, list(m.tests), timeout)
            finally:
                path.write_text(text, encoding="utf-8")
            if rc == GUARD_RC:
                print(out[-2000:], file=sys.stderr)
                return 2
            verdict = _verdict(rc)
            rows.append((m, verdict, secs, _killer(out) if verdict.startswith("killed") else ""))
            print(f"  {m.name:38s} {verdict:22s} {secs:6.1f} s", flush=True)
        total = time.monotonic() - t_all
    finally:
        if keep:
            print(f"kept {tmp}")
        else:
            shutil.rmtree(tmp, ignore_errors=True)
    _table(rows, total)
    return 1 if any(v.startswith("survived") for _, v, _, _ in rows) else 0


def _test_files_all(mutations: list[Mutation]) -> list[str]:
    return sorted({f for m in mutations for f in _test_files(m)})


def _table(rows: list, total: float) -> None:
    killed = sum(v.startswith("killed") for _, v, _, _ in rows)
    print()
    print(f"{'mutation':38s} {'file':28s} {'result':22s} {'s':>6s}  killed by / rule")
    for m, v, secs, killer in rows:
        note = killer if killer else m.what
        print(f"{m.name:38s} {m.path[len('app/traces/'):]:28s} {v:22s} {secs:6.1f}  {note}")
    print(f"\n{killed} killed, {len(rows) - killed} survived, of {len(rows)} mutants "
          f"({total:.0f} s)")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m bench.mutation_probe",
                                 description=__doc__.split("\n\n")[0])
    ap.add_argument("--only", action="append", default=[],
                    help="run only these mutations (name, repeatable or comma-separated)")
    ap.add_argument("--list", action="store_true",
                    help="list the mutations and check their snippets, run nothing")
    ap.add_argument("--keep", action="store_true", help="keep the temporary copy")
    ap.add_argument("--timeout", type=float, default=TIMEOUT,
                    help=f"seconds per mutant run (default {TIMEOUT:g})")
    args = ap.parse_args(argv)
    chosen = list(MUTATIONS)
    if args.only:
        names = {n.strip() for s in args.only for n in s.split(",") if n.strip()}
        unknown = names - {m.name for m in MUTATIONS}
        if unknown:
            print(f"unknown mutation(s): {', '.join(sorted(unknown))}", file=sys.stderr)
            return 2
        chosen = [m for m in MUTATIONS if m.name in names]
    if args.list:
        problems = check_snippets(_repo_root(), chosen)
        for m in chosen:
            print(f"{m.name:38s} {m.path:36s} {m.what}")
        if problems:
            print(*problems, sep="\n", file=sys.stderr)
            return 2
        return 0
    return probe(chosen, keep=args.keep, timeout=args.timeout)


if __name__ == "__main__":
    sys.exit(main())
