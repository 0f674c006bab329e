"""Tests of the allocator tuning (app/perf.py; glibc manual, "Malloc Tunable Parameters")."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from tests.server_harness import REPO

CODE = "from app.perf import tune_allocator; print(tune_allocator(), tune_allocator())"


def _run(**env: str) -> str:
    clean = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}
    out = subprocess.run([sys.executable, "-c", CODE], capture_output=True, text=True,
                         check=True, cwd=REPO, env={**clean, **env})
    return out.stdout.strip()


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's mallopt")
def test_thresholds_are_set_once_per_process() -> None:
    """glibc's mallopt returns 1 on success; a second call in the process does nothing."""
    assert _run() == "True False"


def test_tuning_can_be_turned_off_and_leaves_malloc_settings_to_glibc() -> None:
    assert _run(RAWPROOF_MALLOC_TUNING="0") == "False False"
    assert _run(MALLOC_TRIM_THRESHOLD_="1000000") == "False False"
