"""ZIP extraction safety and mixed folders, on archives written by Python's zipfile.

Sources: PKWARE APPNOTE (member names, external attributes, sizes); zip-bomb
and path-traversal refusals are common practice, no source. DICOM slices are
copies of pydicom's bundled MR_small.dcm; arrays are written by numpy and
images by Pillow.
"""

from __future__ import annotations

import stat
import zipfile
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from pydicom.data import get_testdata_file

from app.config import Limits
from app.errors import InputError
from app.io import open_input

MR = Path(get_testdata_file("MR_small.dcm"))


def _zip(path: Path, members: dict[str, bytes], *, compression=zipfile.ZIP_DEFLATED) -> Path:
    with zipfile.ZipFile(path, "w", compression=compression) as zf:
        for name, data in members.items():
            zf.writestr(name, data)
    return path


def _error(path: Path, **kw) -> InputError:
    with pytest.raises(InputError) as info:
        with open_input(path, **kw):
            pass
    return info.value


def test_zip_of_a_file_and_an_array(tmp_path):
    """A zip holding a DICOM file and an .npy array: two groups, format zip, source files
    named archive:member; the temporary folder is gone after the context exits."""
    buf = tmp_path / "a.npy"
    np.save(buf, np.arange(64, dtype=np.float32).reshape(8, 8))
    z = _zip(tmp_path / "set.zip", {"scan/mr.dcm": MR.read_bytes(), "arr/a.npy": buf.read_bytes()})
    with open_input(z) as loaded:
        assert loaded.format == "zip" and loaded.n_files == 2
        formats = sorted(v.format for v in loaded.volumes)
        assert formats == ["dicom", "npy"]
        npy = next(v for v in loaded.volumes if v.format == "npy")
        assert npy.source_files == [f"{z}:arr/a.npy"]
        assert float(npy.data[7, 7]) == 63.0
        extracted = Path(npy.data.filename)
        assert extracted.exists()
    assert not extracted.exists()


@pytest.mark.parametrize("member", ["../evil.npy", "a/../../evil.npy", "/abs/evil.npy",
                                    "..\\win\\evil.npy"])
def test_traversal_members_refused(tmp_path, member):
    """Members with '..' or absolute paths are refused and named in the error."""
    z = _zip(tmp_path / "t.zip", {"ok.txt": b"x", member: b"y"})
    err = _error(z)
    assert err.code == "unsafe_archive" and member in err.message
    assert not (tmp_path / "evil.npy").exists()


def test_symlink_member_refused(tmp_path):
    """A member whose Unix mode (external_attr >> 16) is a symbolic link is refused."""
    z = tmp_path / "l.zip"
    with zipfile.ZipFile(z, "w") as zf:
        info = zipfile.ZipInfo("link.npy")
        info.external_attr = (stat.S_IFLNK | 0o777) << 16
        zf.writestr(info, "/etc/passwd")
    err = _error(z)
    assert err.code == "unsafe_archive" and "link.npy" in err.message


def test_zip_bomb_by_ratio_size_and_count(tmp_path):
    """8 MiB of zeros deflate about 1000:1 (limit 200); per-member, total and member-count
    limits are enforced from the declared sizes."""
    z = _zip(tmp_path / "bomb.zip", {"zeros.npy": bytes(8 << 20)})
    err = _error(z)
    assert err.code == "zip_bomb" and "zeros.npy" in err.message
    err = _error(z, limits=Limits(max_zip_ratio=1e9, max_zip_member_bytes=1 << 20))
    assert err.code == "zip_bomb" and "per-member" in err.message
    many = _zip(tmp_path / "many.zip", {f"f{k}.txt": b"x" for k in range(5)})
    err = _error(many, limits=Limits(max_zip_members=4))
    assert err.code == "zip_bomb" and "5 members" in err.message


def test_member_larger_than_declared_is_stopped(tmp_path):
    """A member whose central-directory size lies (declares 10 bytes, holds 4 KiB
    stored) is stopped while extracting (zipfile reads only the declared size, so the
    CRC check fails; our byte count is the second guard), not trusted."""
    z = tmp_path / "lie.zip"
    data = bytes(range(256)) * 16
    _zip(z, {"a.npy": data}, compression=zipfile.ZIP_STORED)
    raw = bytearray(z.read_bytes())
    cd = raw.rfind(b"PK\x01\x02")
    raw[cd + 24:cd + 28] = (10).to_bytes(4, "little")  # uncompressed size in the directory
    z.write_bytes(bytes(raw))
    err = _error(z)
    assert err.code in ("zip_bomb", "unreadable") and "a.npy" in err.message


def test_nested_zip_not_extracted(tmp_path):
    """A nested .zip is skipped with a warning; the rest is analysed."""
    inner = _zip(tmp_path / "inner.zip", {"x.txt": b"x"})
    z = _zip(tmp_path / "outer.zip", {"inner.zip": inner.read_bytes(), "mr.dcm": MR.read_bytes()})
    with open_input(z) as loaded:
        assert [v.format for v in loaded.volumes] == ["dicom"]
        assert any("nested archive" in w for w in loaded.warnings)


def test_mixed_folder_group_by_group(tmp_path):
    """A folder with a DICOM file, a PNG stack of 3 and an .npy array: three groups,
    format folder, each group labelled; unknown files are skipped with a warning."""
    (tmp_path / "dcm").mkdir()
    (tmp_path / "dcm" / "mr.dcm").write_bytes(MR.read_bytes())
    (tmp_path / "pngs").mkdir()
    for k in range(3):
        Image.fromarray(np.full((16, 16), k, np.uint8)).save(tmp_path / "pngs" / f"p{k}.png")
    np.save(tmp_path / "arr.npy", np.zeros((4, 4), np.float32))
    (tmp_path / "notes.txt").write_text("lab notes")
    with open_input(tmp_path) as loaded:
        assert loaded.format == "folder" and loaded.n_files == 5
        by_format = {v.format: v for v in loaded.volumes}
        assert set(by_format) == {"dicom", "png", "npy"}
        assert by_format["png"].shape == (3, 16, 16) and by_format["png"].name == "pngs"
        assert by_format["npy"].name == "arr"
        assert any("notes.txt" in w for w in loaded.warnings)


def test_empty_folder_and_zip(tmp_path):
    """An empty folder and a zip holding only a directory are InputErrors."""
    (tmp_path / "empty").mkdir()
    assert _error(tmp_path / "empty").code == "empty"
    z = tmp_path / "d.zip"
    with zipfile.ZipFile(z, "w") as zf:
        zf.writestr("dir/", b"")
    assert _error(z).code == "empty"


def test_folder_skips_links_and_hidden_files(tmp_path):
    """Symbolic links (which could point outside the upload) and hidden files are not
    read: a folder holding one real array, a link to another and a hidden copy gives
    one group."""
    outside = tmp_path / "outside"
    outside.mkdir()
    np.save(outside / "secret.npy", np.ones((4, 4), np.float32))
    folder = tmp_path / "set"
    folder.mkdir()
    np.save(folder / "real.npy", np.zeros((4, 4), np.float32))
    (folder / "link.npy").symlink_to(outside / "secret.npy")
    np.save(folder / ".hidden.npy", np.ones((4, 4), np.float32))
    with open_input(folder) as loaded:
        assert [v.name for v in loaded.volumes] == ["real"] and loaded.n_files == 1
