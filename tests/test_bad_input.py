"""Bad input of every kind through ``rawproof analyse``: exit code 2 with the contract's
error object (shared/REPORT_CONTRACT.md, "Command"), never a traceback; inputs a
reader can accept (all-NaN array, 1 x 1 image) give a report, not a crash.

Sources: the report contract; pydicom's bundled MR_truncated.dcm and JPEG-lossy.dcm;
files written here by numpy, nibabel, Pillow and zipfile.
"""

from __future__ import annotations

import json
import subprocess
import sys
import zipfile
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from PIL import Image
from pydicom.data import get_testdata_file

from app.cli import main

pytestmark = pytest.mark.slow

RAWPROOF = Path(sys.executable).parent / "rawproof"
ERROR_KEYS = {"code", "message", "path"}


def _check_error(stdout: str, stderr: str, code: str) -> dict:
    obj = json.loads(stdout)
    assert obj["schema"] == "rawproof.report/1"
    assert set(obj["error"]) == ERROR_KEYS
    assert obj["error"]["code"] == code, obj["error"]
    assert obj["error"]["message"]
    assert "Traceback" not in stderr
    assert stderr.strip().startswith("rawproof: cannot read input")
    return obj["error"]


def _run_inprocess(capsys, path: Path, *extra: str) -> tuple[int, str, str]:
    rc = main(["analyse", str(path), "--json", "--quiet", *extra])
    out = capsys.readouterr()
    return rc, out.out, out.err


def _zero_byte(tmp_path: Path) -> Path:
    p = tmp_path / "empty.dcm"
    p.write_bytes(b"")
    return p


def _traversal_zip(tmp_path: Path) -> Path:
    p = tmp_path / "escape.zip"
    with zipfile.ZipFile(p, "w") as zf:
        zf.writestr("../../outside.npy", b"x")
    return p


@pytest.mark.parametrize("make,code", [
    (_zero_byte, "empty_file"),
    (_traversal_zip, "unsafe_archive"),
    (lambda tmp: Path(get_testdata_file("MR_truncated.dcm")), "truncated_dicom"),
])
def test_cli_subprocess_exit_2(tmp_path, make, code):
    """The installed ``rawproof`` command: exit 2, error object on stdout, one line on stderr."""
    path = make(tmp_path)
    proc = subprocess.run([str(RAWPROOF), "analyse", str(path), "--json"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    err = _check_error(proc.stdout, proc.stderr, code)
    assert err["path"]
    assert len(proc.stderr.strip().splitlines()) == 1, proc.stderr  # no decoder log noise


def _lying_nifti(tmp_path: Path) -> Path:
    p = tmp_path / "lie.nii"
    nib.save(nib.Nifti1Image(np.zeros((8, 8, 2), np.int16), np.eye(4)), p)
    raw = bytearray(p.read_bytes())
    dims = np.frombuffer(bytes(raw[40:56]), dtype="<i2").copy()
    dims[1:4] = [512, 512, 300]
    raw[40:56] = dims.tobytes()
    p.write_bytes(bytes(raw))
    return p


def _empty_folder(tmp_path: Path) -> Path:
    p = tmp_path / "nothing"
    p.mkdir()
    return p


def _zip_bomb(tmp_path: Path) -> Path:
    p = tmp_path / "bomb.zip"
    with zipfile.ZipFile(p, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("zeros.npy", bytes(8 << 20))
    return p


def _unknown(tmp_path: Path) -> Path:
    p = tmp_path / "scan.xyz"
    p.write_bytes(b"not an image")
    return p


def _undecodable(tmp_path: Path) -> Path:
    return Path(get_testdata_file("JPEG-lossy.dcm"))


def _not_dicom(tmp_path: Path) -> Path:
    p = tmp_path / "fake.dcm"
    p.write_bytes(b"hello, this is text" * 20)
    return p


def _garbage_png(tmp_path: Path) -> Path:
    p = tmp_path / "broken.png"
    Image.fromarray(np.zeros((64, 64), np.uint8)).save(p)
    p.write_bytes(p.read_bytes()[:60])
    return p


@pytest.mark.parametrize("make,code,needle", [
    (_lying_nifti, "truncated", "lie.nii"),
    (_empty_folder, "empty", "empty"),
    (_zip_bomb, "zip_bomb", "zeros.npy"),
    (_unknown, "unsupported_format", "scan.xyz"),
    (_not_dicom, "unreadable", "fake.dcm"),
    (_garbage_png, "truncated", "broken.png"),
])
def test_cli_inprocess_exit_2(tmp_path, capsys, make, code, needle):
    """app.cli.main in-process: exit 2 and an error a person can act on."""
    rc, out, err = _run_inprocess(capsys, make(tmp_path))
    assert rc == 2
    error = _check_error(out, err, code)
    assert needle in error["message"]


def test_undecodable_pixels_give_a_header_only_report(tmp_path):
    """pydicom's bundled JPEG-lossy.dcm: no installed decoder reads its pixels
    (shared/ENVIRONMENT-NOTES.md), but its header is readable. The installed command
    exits 0 with a report whose lossy_compression trace is declared from the header,
    with the stored table's IJG quality (42, the nearest IJG table to the DQT
    segment of its JPEG stream, as test_io_dicom checks), every pixel trace
    inconclusive, and a warning that names the transfer syntax; never a traceback."""
    path = Path(get_testdata_file("JPEG-lossy.dcm"))
    proc = subprocess.run([str(RAWPROOF), "analyse", str(path), "--json", "--quiet"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert "Traceback" not in proc.stderr
    rep = json.loads(proc.stdout)
    lossy = rep["traces"]["lossy_compression"]
    assert lossy["status"] == "present"
    assert lossy["estimates"]["method"] == "declared"
    assert lossy["estimates"]["quality"] == 42
    others = {t: v["status"] for t, v in rep["traces"].items() if t != "lossy_compression"}
    assert set(others.values()) == {"inconclusive"}, others
    assert rep["verdict"] == "processed"
    assert any("1.2.840.10008.1.2.4.51" in w for w in rep["warnings"])


def test_all_nan_array_gives_a_report(tmp_path, capsys):
    """An all-NaN array is readable (the reader keeps the NaN values): exit 0, a report of
    the contract's shape, no analyser crash and no traceback."""
    from app.io import open_input

    p = tmp_path / "nan.npy"
    np.save(p, np.full((2, 32, 32), np.nan, np.float32))
    with open_input(p) as loaded:
        assert np.isnan(loaded.volumes[0].to_array()).all()
    rc, out, err = _run_inprocess(capsys, p)
    assert rc == 0 and "Traceback" not in err
    rep = json.loads(out)
    assert rep["input"]["shape"] == [2, 32, 32] and rep["input"]["format"] == "npy"
    assert set(rep) >= {"schema", "input", "verdict", "traces", "header", "warnings"}
    for tid, t in rep["traces"].items():
        assert "analyser failed" not in t["summary"], (tid, t["summary"])


def test_all_nan_array_verdict_inconclusive(tmp_path, capsys):
    """No value in the array is finite, so no trace can be present."""
    p = tmp_path / "nan.npy"
    np.save(p, np.full((2, 32, 32), np.nan, np.float32))
    rc, out, _ = _run_inprocess(capsys, p)
    assert rc == 0 and json.loads(out)["verdict"] == "inconclusive"


def test_one_pixel_image_gives_a_report(tmp_path, capsys):
    """A 1 x 1 PNG is readable: exit 0, no traceback, block and grey-level traces say
    inconclusive (too small), the input section states the shape."""
    p = tmp_path / "dot.png"
    Image.fromarray(np.full((1, 1), 7, np.uint8)).save(p)
    rc, out, err = _run_inprocess(capsys, p)
    assert rc == 0 and "Traceback" not in err
    rep = json.loads(out)
    assert rep["input"]["shape"] == [1, 1]
    for tid in ("lossy_compression", "intensity_quantization"):
        assert rep["traces"][tid]["status"] == "inconclusive"
    for tid, t in rep["traces"].items():
        assert "analyser failed" not in t["summary"], (tid, t["summary"])


@pytest.mark.parametrize("shape", [(2, 2), (4, 4), (3, 64), (64, 3), (8, 8), (9, 17), (2, 5, 7)])
def test_tiny_images_never_make_an_analyser_fail(shape):
    """Tiny images: every analyser answers (inconclusive where it cannot measure)
    rather than failing with a numpy error; the report stays contract-shaped."""
    from app.io.volume import Volume
    from app.traces.report import analyse_volume

    rng = np.random.default_rng(0)
    rep = analyse_volume(Volume.from_array(rng.random(shape).astype(np.float32) + 1.0))
    for tid, t in rep["traces"].items():
        assert "analyser failed" not in t["summary"], (shape, tid, t["summary"])
