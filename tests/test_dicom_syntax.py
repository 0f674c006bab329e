"""The transfer-syntax table against pydicom's UID dictionary and the file format rules."""

from __future__ import annotations

from pathlib import Path

import pytest
from pydicom._uid_dict import UID_dictionary
from pydicom.uid import UID

from app.io.dicom_syntax import (
    JPEG_DCT_SYNTAXES,
    LOSSY_SYNTAXES,
    MAY_BE_LOSSY_SYNTAXES,
    TRANSFER_SYNTAXES,
    WAVELET_SYNTAXES,
    syntax_of,
)
from app.io.formats import family_from_name, family_of, format_label
from app.io.jpeg_markers import ZIGZAG, natural_from_zigzag

_JPEG_XL = {"1.2.840.10008.1.2.4.110", "1.2.840.10008.1.2.4.111", "1.2.840.10008.1.2.4.112"}


@pytest.mark.parametrize("uid", sorted(set(TRANSFER_SYNTAXES) - _JPEG_XL))
def test_names_and_compression_agree_with_pydicom(uid):
    """Every UID but JPEG XL's is in pydicom 3.0's dictionary (PS3.6 Table A-1) as a
    transfer syntax under the same name; pydicom's ``is_compressed`` is False exactly
    for the native syntaxes, the ones with a byte order here."""
    entry = TRANSFER_SYNTAXES[uid]
    name, kind = UID_dictionary[uid][0], UID_dictionary[uid][1]
    assert kind == "Transfer Syntax"
    assert entry.name == name
    assert (entry.byte_order is None) == UID(uid).is_compressed


def test_lossy_classes_follow_the_names():
    """PS3.5 Section 10 (common practice, no further source): the syntaxes named
    'Lossless' (not 'Near-Lossless') are lossless; JPEG baseline/extended, JPEG-LS
    near-lossless and the video coders are lossy; plain JPEG 2000, HTJ2K and JPEG XL may be either.
    JPEG XL's three UIDs (PS3.5 A.4.12, 2024) are recalled from memory."""
    for uid, ts in TRANSFER_SYNTAXES.items():
        if "Lossless" in ts.name and "Near-Lossless" not in ts.name:
            assert ts.compression == "lossless", uid
    assert JPEG_DCT_SYNTAXES == {"1.2.840.10008.1.2.4.50", "1.2.840.10008.1.2.4.51"}
    assert JPEG_DCT_SYNTAXES | {"1.2.840.10008.1.2.4.81", "1.2.840.10008.1.2.4.111"} \
        <= LOSSY_SYNTAXES
    assert MAY_BE_LOSSY_SYNTAXES == {"1.2.840.10008.1.2.4.91", "1.2.840.10008.1.2.4.93",
                                     "1.2.840.10008.1.2.4.112", "1.2.840.10008.1.2.4.203"}
    assert "1.2.840.10008.1.2.4.90" in WAVELET_SYNTAXES
    assert syntax_of("1.2.840.10008.1.2.4.50\x00").lossy is True
    assert syntax_of("1.2.840.10008.1.2.4.91").lossy is None
    assert syntax_of("1.2.840.10008.1.2.5").lossy is False
    assert syntax_of("1.2.3") is None and syntax_of(None) is None


def test_zigzag_is_the_t81_sequence():
    """ITU-T T.81 Figure A.6: the zig-zag walk visits anti-diagonals in turn,
    alternating direction; rebuilt here from that rule and compared."""
    walk = []
    for s in range(15):
        cells = [(r, s - r) for r in range(8) if 0 <= s - r < 8]
        walk.extend(cells if s % 2 else cells[::-1])
    assert ZIGZAG.tolist() == [8 * r + c for r, c in walk]
    table = natural_from_zigzag(list(range(64)))
    assert table[0, 1] == 1 and table[1, 0] == 2 and table[7, 7] == 63


@pytest.mark.parametrize("name,family,label", [
    ("scan.nii.gz", "nifti", "nifti"), ("a/IMG0001.DCM", "dicom", "dicom"),
    ("k.h5", "hdf5", "hdf5"), ("x.JPEG", "jpeg", "jpeg"), ("set.zip", "zip", "zip"),
    ("series/IM0001", None, "dicom"), ("notes.txt", None, "text"),
    ("meta.json", None, "json"), ("data.mat", None, "mat"), ("README", None, ""),
])
def test_one_rule_for_names(name, family, label):
    """The readers' family and the store's listing label come from one table
    (common practice, no source: the suffixes the readers open)."""
    assert family_from_name(name) == family
    assert format_label(name) == label


def test_family_of_reads_the_dicom_magic(tmp_path):
    """NEMA PS3.10 7.1: 'DICM' at byte 128 marks a DICOM file whatever its name."""
    p = tmp_path / "IM0001"
    p.write_bytes(b"\0" * 128 + b"DICM" + b"\0" * 16)
    assert family_of(p) == "dicom"
    q = tmp_path / "notes.md"
    q.write_bytes(b"\0" * 128 + b"DICM")
    assert family_of(q) is None
    assert family_of(Path(tmp_path / "missing")) is None
