"""Hostile files against every reader: a Volume or the project's InputError, within
a time and memory bound, never another exception.

What is checked against what:

- A bounded hypothesis search (``fuzz.mutate.mutate``) over real seed files:
  pydicom's bundled ``MR_small.dcm`` and ``CT_small.dcm``, nibabel's shipped
  ``standard.nii.gz``, and NIfTI, ``.npy``, HDF5, PNG, JPEG and ZIP files written
  here by nibabel, numpy, h5py, Pillow and zipfile. Per example the heap peak
  (``tracemalloc``, which numpy reports its buffers to) must stay under
  ``fuzz.harness.MEMORY_BOUND`` and hypothesis' deadline bounds the time.
- Hand-built lies, one per format, whose expected refusal follows from the format's
  specification: NIfTI-1 ``dim`` (nifti1.h), NEP 1 ``.npy`` headers, DICOM element
  lengths (PS3.5 7.1), PNG IHDR with a valid CRC (ISO/IEC 15948 11.2.2), JPEG SOF
  (ITU-T T.81 B.2.2), HDF5 datasets declared but never written, ZIP members
  (PKWARE APPNOTE 4.4). Absurd declared sizes must be refused from the header,
  before allocation: the heap peak stays far below the declared size.

The longer run is ``python fuzz/run.py --minutes N`` (see fuzz/README.md).
"""

from __future__ import annotations

import gzip
import io
import random
import struct
import zipfile
import zlib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fuzz import mutate as mut
from fuzz.harness import FUZZ_LIMITS, MEMORY_BOUND, FindingError, check_input
from fuzz.seeds import seeds

pytestmark = pytest.mark.slow

SEED_NAMES = sorted(seeds())
#: A lie must be refused with well under this many bytes allocated (declared: gigabytes).
SMALL_PEAK = 64 << 20


@pytest.mark.parametrize("name", SEED_NAMES)
def test_seed_files_are_read(name: str) -> None:
    """Every unmutated seed gives Volumes whose frames are read (the harness accepts them)."""
    suffix, data = seeds()[name]
    out = check_input(data, suffix)
    assert out.kind == "volumes", (name, out)
    assert int(out.code) >= 1


@pytest.mark.parametrize("name", SEED_NAMES)
@settings(max_examples=100, deadline=10_000, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(rnd=st.randoms(use_true_random=False))
def test_mutated_inputs_give_a_volume_or_an_input_error(name: str, rnd: random.Random) -> None:
    """1000 mutated inputs in all (100 per seed, derandomised so CI is repeatable)."""
    suffix, data = seeds()[name]
    out = check_input(mut.mutate(data, suffix, rnd), suffix)
    assert out.kind in ("volumes", "input_error")
    assert out.peak_bytes <= MEMORY_BOUND


def _refused(data: bytes, suffix: str, *codes: str) -> None:
    out = check_input(data, suffix, memory_bound=SMALL_PEAK)
    assert out.kind == "input_error", out
    assert out.code in codes, out


# ----------------------------------------------------------------- absurd sizes

def _nifti(dims: list[int], gz: bool = False) -> bytes:
    import nibabel as nib

    raw = bytearray(nib.Nifti1Image(np.zeros((4, 4, 2), np.int16), np.eye(4)).to_bytes())
    d = list(struct.unpack("<8h", raw[40:56]))
    d[0] = len(dims)
    d[1:1 + len(dims)] = dims
    raw[40:56] = struct.pack("<8h", *d)
    return gzip.compress(bytes(raw)) if gz else bytes(raw)


@pytest.mark.parametrize("gz", [False, True])
def test_nifti_declaring_gigabytes_in_a_small_file_is_refused_before_allocating(gz) -> None:
    """dim = 32767 x 32767 x 100 int16 (about 200 GiB) in a file under 1 kB."""
    data = _nifti([32767, 32767, 100], gz)
    assert len(data) < 1024
    _refused(data, ".nii.gz" if gz else ".nii", "too_large")


@pytest.mark.parametrize("dims", [[-1, 64, 2], [64, 0, 2], [-32768, -32768, 1]])
def test_nifti_negative_or_zero_dims_are_a_bad_header(dims) -> None:
    _refused(_nifti(dims), ".nii", "bad_header")


def _npy_with_shape(shape_text: str) -> bytes:
    header = ("{'descr': '<f4', 'fortran_order': False, 'shape': " + shape_text + ", }")
    header += " " * ((-(10 + len(header) + 1)) % 64) + "\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header.encode() + bytes(512)


@pytest.mark.parametrize("shape,code", [
    ("(100000, 100000)", "too_large"),          # 40 GB declared, 1 kB given
    ("(4294967296, 4294967296)", "too_large"),  # wraps to 0 in int64 products
    ("(3037000500, 3037000500, 2)", "too_large"),  # wraps negative in int64
    ("(-5, 64)", "bad_header"),
    ("(64, 0)", "empty"),
])
def test_npy_declared_shape_is_checked_in_exact_arithmetic(shape, code) -> None:
    _refused(_npy_with_shape(shape), ".npy", code)


def test_npy_header_length_beyond_the_file_is_refused_before_reading() -> None:
    """Version 2 header (4-byte length, NEP 1) declaring 600 MB in a 100-byte file."""
    data = b"\x93NUMPY\x02\x00" + struct.pack("<I", 600_000_000) + b"{" + bytes(87)
    _refused(data, ".npy", "unreadable")


@pytest.mark.parametrize("shape,dtype", [((100000, 100000), "f4"), ((1, 100000, 100000), "c8"),
                                         ((100000, 100000, 2), "f4")])
def test_hdf5_dataset_declared_huge_but_never_written(shape, dtype) -> None:
    import h5py

    buf = io.BytesIO()
    with h5py.File(buf, "w") as f:
        f.create_dataset("kspace", shape=shape, dtype=dtype, chunks=True)
    assert len(buf.getvalue()) < 16 << 10
    _refused(buf.getvalue(), ".h5", "too_large")


def _dicom_with(rows: int | None = None, length_lie: bool = False) -> bytes:
    from pydicom.data import get_testdata_file

    data = bytearray(open(get_testdata_file("MR_small.dcm"), "rb").read())
    if rows is not None:
        i = data.find(struct.pack("<HH", 0x0028, 0x0010) + b"US")
        data[i + 8: i + 10] = struct.pack("<H", rows)
        j = data.find(struct.pack("<HH", 0x0028, 0x0011) + b"US")
        data[j + 8: j + 10] = struct.pack("<H", rows)
    if length_lie:
        # (0008,0070) Manufacturer is LO: explicit VR, 2-byte length; make the
        # implicit-looking 4-byte field after a tag huge by rewriting a long-form
        # element (OB/OW/UN/SQ use a 4-byte length after 2 reserved bytes)
        k = data.find(struct.pack("<HH", 0x7FE0, 0x0010))
        data[k + 8: k + 12] = struct.pack("<I", 0xFFFFFFF0)
    return bytes(data)


def test_dicom_element_length_of_four_gigabytes_is_refused_before_allocating() -> None:
    """PixelData (7FE0,0010) declaring 0xFFFFFFF0 bytes in a 10 kB file (PS3.5 7.1.2)."""
    _refused(_dicom_with(length_lie=True), ".dcm", "truncated_dicom")


def test_dicom_rows_and_columns_far_beyond_the_pixel_data() -> None:
    """Rows = Columns = 65535 with 64 x 64 pixels stored: too large or truncated, no crash."""
    _refused(_dicom_with(rows=65535), ".dcm", "truncated_dicom", "too_large")


def test_dicom_unknown_value_representation_is_an_input_error() -> None:
    """An explicit-VR element whose VR bytes name no VR of PS3.5 Table 6.2-1."""
    from pydicom.data import get_testdata_file

    data = bytearray(open(get_testdata_file("MR_small.dcm"), "rb").read())
    i = data.find(struct.pack("<HH", 0x0008, 0x0016) + b"UI")
    data[i + 4: i + 6] = b"TI"
    _refused(bytes(data), ".dcm", "truncated_dicom")


def test_png_declaring_100000_by_100000_pixels_is_refused() -> None:
    """IHDR width = height = 100000 with a correct CRC, in a file under 1 kB."""
    data = mut.png_ihdr(seeds()["png"][1], _FixedChoice([100000, 100000]))
    assert struct.unpack(">II", data[16:24]) == (100000, 100000)
    assert len(data) < 1024
    crc = struct.unpack(">I", data[29:33])[0]
    assert crc == zlib.crc32(data[12:29]) & 0xFFFFFFFF
    _refused(data, ".png", "too_large")


def test_jpeg_declaring_65500_by_65500_pixels_is_refused() -> None:
    data = mut.jpeg_sof(seeds()["jpeg"][1], _FixedChoice([65500, 65500]))
    _refused(data, ".jpg", "too_large", "truncated", "unreadable")


class _FixedChoice(random.Random):
    """A Random whose ``choice`` returns given values in turn (for hand-built lies)."""

    def __init__(self, values: list) -> None:
        super().__init__(0)
        self._values = list(values)

    def choice(self, seq):  # noqa: ANN001, ANN201
        return self._values.pop(0) if self._values else seq[0]

    def random(self) -> float:
        return 0.99


# ----------------------------------------------------------------- archives

def _zip(members: list, method: int = zipfile.ZIP_DEFLATED) -> bytes:
    return mut._zip_bytes(members, method)


def _npy_member() -> bytes:
    return mut._small_npy()


def test_zip_with_parent_climbing_member_is_refused() -> None:
    _refused(_zip([("a/../../evil.npy", _npy_member())]), ".zip", "unsafe_archive")


def test_zip_with_absolute_member_is_refused() -> None:
    _refused(_zip([("/tmp/evil.npy", _npy_member())]), ".zip", "unsafe_archive")


def test_zip_with_symlink_member_is_refused() -> None:
    info = zipfile.ZipInfo("link.npy")
    info.external_attr = 0o120777 << 16
    _refused(_zip([(info, b"/etc/passwd")], zipfile.ZIP_STORED), ".zip", "unsafe_archive")


def test_deeply_nested_zips_are_not_extracted() -> None:
    """Eight levels of zip in zip: the nested archive is left alone (nothing to analyse)."""
    inner = _zip([("a.npy", _npy_member())])
    for _ in range(8):
        inner = _zip([("inner.zip", inner)])
    _refused(inner, ".zip", "empty")


def test_decompression_bomb_is_refused_from_the_declared_ratio() -> None:
    """8 MiB of zeros deflated to about 8 kB: ratio over 200 (FUZZ_LIMITS.max_zip_ratio)."""
    data = _zip([("zeros.npy", bytes(8 << 20))])
    assert len(data) < 64 << 10
    _refused(data, ".zip", "zip_bomb")


def test_member_lying_about_its_size_is_stopped_while_extracting() -> None:
    raw = bytearray(_zip([("a.npy", bytes(4096))]))
    for sig, off in ((b"PK\x03\x04", 22), (b"PK\x01\x02", 24)):
        i = raw.find(sig)
        raw[i + off: i + off + 4] = struct.pack("<I", 10)
    _refused(bytes(raw), ".zip", "zip_bomb", "unreadable")


def test_too_many_members_are_refused() -> None:
    data = _zip([(f"f{i}.txt", b"") for i in range(FUZZ_LIMITS.max_zip_members + 1)],
                zipfile.ZIP_STORED)
    _refused(data, ".zip", "zip_bomb")


@pytest.mark.parametrize("kind", ["clash", "method", "corrupt_stream", "name_encoding"])
def test_damaged_archives_are_unreadable_not_a_crash(kind: str) -> None:
    """A file and a folder of one name, both of a type the readers open (a member of
    another type is never extracted, so it cannot clash); compression method 99;
    damaged deflate data; a member name that is not UTF-8 although the UTF-8 flag
    (bit 11) is set."""
    if kind == "clash":
        data = _zip([("a.npy", _npy_member()), ("a.npy/b.npy", _npy_member())])
    elif kind == "name_encoding":
        raw = bytearray(_zip([("\u00e9.npy", _npy_member())]))
        for sig, off in ((b"PK\x03\x04", 30), (b"PK\x01\x02", 46)):
            i = raw.find(sig)
            raw[i + off] = 0xFF
        data = bytes(raw)
    else:
        data = mut.zip_hostile(b"", _FixedChoice([kind, 99, 99]))
    _refused(data, ".zip", "unreadable")


def test_harness_reports_an_escaping_exception(monkeypatch) -> None:
    """The rule can fail: a reader raising a plain ValueError is a finding."""
    import app.io.arrays as arrays

    def broken(path, opts):  # noqa: ANN001, ANN202
        raise ValueError("boom")

    monkeypatch.setattr(arrays, "read_npy", broken)
    with pytest.raises(FindingError, match="ValueError escaped"):
        check_input(seeds()["npy"][1], ".npy")


# ----------------------------------------------------------------- findings of long runs

FINDINGS = Path(__file__).parent / "data" / "fuzz"


@pytest.mark.parametrize("name,code", [
    # h5py raised ValueError reading a damaged compound datatype message
    ("hdf5-bad-compound-type.h5", "empty"),
    # a dataset name that is not UTF-8 came back as bytes (TypeError); it also declares
    # 38 GiB, refused from the header
    ("hdf5-bytes-name-huge.h5", "too_large"),
    # a member with an empty name made zipfile.ZipInfo.is_dir raise IndexError
    ("zip-empty-member-name.zip", "unreadable"),
])
def test_long_run_findings_are_input_errors(name: str, code: str) -> None:
    """Inputs the long fuzz run (fuzz/run.py, seed 2) found; generated by fuzz.mutate
    from the seeds above."""
    path = FINDINGS / name
    _refused(path.read_bytes(), "".join(path.suffixes), code)


def test_folder_symlinks_to_outside_files_are_not_followed(tmp_path) -> None:
    """A folder whose only array is a symbolic link to a file outside it (and a link to
    a folder outside it): nothing outside is read, the folder holds nothing readable."""
    from app.errors import InputError
    from app.io import open_input

    outside = tmp_path / "outside"
    outside.mkdir()
    np.save(outside / "secret.npy", np.ones((2, 8, 8), np.float32))
    folder = tmp_path / "candidate"
    folder.mkdir()
    (folder / "scan.npy").symlink_to(outside / "secret.npy")
    (folder / "more").symlink_to(outside, target_is_directory=True)
    with pytest.raises(InputError) as info:
        with open_input(folder, limits=FUZZ_LIMITS):
            pass
    assert info.value.code in ("empty", "no_readable_files")


@pytest.mark.parametrize("name", [
    # 65500 x 32 JPEG (a forged SOF height): kspace_filtering allocated 1 GiB
    "pipeline-jpeg-65500-rows.jpg",
    # values of +-5.6e14 from flipped bits: kspace_filtering fitted an empty band
    "pipeline-npy-huge-values.npy",
    # one k-space value of 1.6e21: the background histogram had no room for its bins
    "pipeline-hdf5-flipped-exponent.h5",
])
def test_long_run_pipeline_findings_leave_no_analyser_failing(name: str) -> None:
    """Readable inputs the long run with ``--pipeline`` (seed 4) found an analyser
    failing on; generated by fuzz.mutate from the seeds above."""
    from fuzz.harness import check_pipeline

    path = FINDINGS / name
    assert check_pipeline(path.read_bytes(), path.suffix) == []
