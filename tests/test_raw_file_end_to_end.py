"""An ISMRMRD raw k-space file through the command line and through the upload.

The file is written with the ``ismrmrd`` package's own API (its ``Dataset``,
``Acquisition`` and ``xsd`` header classes; the helpers of tests/test_io_ismrmrd.py).
Truth: 4 channels, 64 encoded phase-encode lines of which 0..47 are acquired about
centre 32 (partial Fourier, 48 of a symmetric 64: fraction 0.75, the missing lines
zeros as the writer left them), readout oversampled 2x. The header's encoding
limits (Inati et al., MRM 77:411-421, 2017) must reach the report as header
evidence, and the partial-Fourier trace must rest on both the header and the
pixels, with origin ``acquisition`` (shared/REPORT_CONTRACT.md).
"""

from __future__ import annotations

import contextlib
import io
import json
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("ismrmrd")

from app.cli import main  # noqa: E402
from tests.server_harness import inprocess_server  # noqa: E402
from tests.test_io_ismrmrd import _header, _write  # noqa: E402


def _raw_file(path: Path) -> Path:
    rng = np.random.default_rng(0)
    c, ny, nx = 4, 64, 128
    y, x = np.mgrid[:ny, :nx]
    obj = 50.0 * ((((y - 32) / 20.0) ** 2 + ((x - 64) / 40.0) ** 2) < 1)
    k = (np.fft.fftshift(np.fft.fft2(np.fft.ifftshift(obj)))[None] * np.ones((c, 1, 1))
         + rng.standard_normal((c, ny, nx)) + 1j * rng.standard_normal((c, ny, nx)))
    noise = rng.standard_normal((c, 256)) + 1j * rng.standard_normal((c, 256))
    xml = _header(nx, ny, recon_x=nx // 2, lo=0, hi=47, centre=32, channels=c)
    _write(path, k, np.arange(0, 48), xml, noise)
    return path


def _check(report: dict) -> None:
    declared = report["header"]["declared"]
    assert declared["partial_fourier"] is True
    assert declared["partial_fourier_fraction"] == pytest.approx(0.75)
    assert declared["ismrmrd_encoding_limits"] == {"minimum": 0, "maximum": 47, "center": 32}
    notes = " ".join(report["header"]["notes"])
    assert "oversampled 2x" in notes and "16 encoded phase-encode lines" in notes
    pf = report["traces"]["partial_fourier"]
    assert pf["status"] == "present" and pf["origin"] == "acquisition"
    assert pf["evidence"]["basis"] == "declared and measured"
    assert pf["evidence"]["declared"]["section"].startswith("ISMRMRD header")
    assert pf["estimates"]["fill"] == "zeros"
    assert pf["estimates"]["rows"]["fraction"] == pytest.approx(0.75, abs=0.05)


def test_ismrmrd_file_on_the_command_line(tmp_path: Path) -> None:
    p = _raw_file(tmp_path / "raw.h5")
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main(["analyse", str(p), "--json"]) == 0
    _check(json.loads(out.getvalue()))


def test_ismrmrd_file_through_the_upload(tmp_path: Path) -> None:
    from app.worker import run_inline

    p = _raw_file(tmp_path / "raw.h5")
    with inprocess_server(tmp_path / "data") as srv:
        srv.add_users({"uma": "uma-password-1"})
        uma = srv.login("uma", "uma-password-1")
        ds = uma.upload_files("Raw ISMRMRD set", [("raw.h5", p.read_bytes())])["dataset_id"]
        assert run_inline(srv.settings) == 1
        r = uma.get(f"/datasets/{ds}/report.json")
        assert r.status_code == 200
        _check(r.json())
        page = uma.get(f"/datasets/{ds}").text
        assert "encoding limits declare a partial-Fourier acquisition" in page
