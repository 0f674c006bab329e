"""DICOM transfer syntaxes: what each UID says about how the pixel data were coded.

The one table of the project: the DICOM reader uses it to copy uncompressed
pixels and to read stored JPEG tables, and the analysers use it to tell what a
header declares about lossy compression.

``compression`` is what the transfer syntax alone says about the pixel data:

``"lossless"``
    Uncompressed, deflated or coded by a lossless-only process.
``"lossy"``
    Coded by a lossy process (or, for JPEG XL JPEG recompression, by a lossless
    re-coding of a JPEG stream that was itself lossy).
``"may_be_lossy"``
    A syntax that allows both reversible and irreversible coding (JPEG 2000,
    High-Throughput JPEG 2000, JPEG XL): the header's Lossy Image Compression
    attribute, not the syntax, decides.

References
----------
NEMA PS3.5 (Data Structures and Encoding), Section 10 and Annex A (transfer
syntax definitions); NEMA PS3.6 (Data Dictionary), Table A-1 (UIDs and names).
The names below follow the UID names of pydicom 3.0's dictionary; the three JPEG
XL syntaxes (PS3.5 A.4.12, added in 2024) are written from the standard's text as
recalled, since that pydicom release does not list them.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

__all__ = [
    "DEFAULT_TRANSFER_SYNTAX",
    "JPEG_DCT_SYNTAXES",
    "LOSSY_SYNTAXES",
    "MAY_BE_LOSSY_SYNTAXES",
    "TRANSFER_SYNTAXES",
    "WAVELET_SYNTAXES",
    "TransferSyntax",
    "syntax_of",
]

Compression = Literal["lossless", "lossy", "may_be_lossy"]


@dataclass(frozen=True)
class TransferSyntax:
    """One transfer syntax.

    Attributes
    ----------
    uid : str
    name : str
        The name of PS3.6 Table A-1.
    compression : {"lossless", "lossy", "may_be_lossy"}
    method : str
        The coding family: ``"uncompressed"``, ``"deflate"``, ``"rle"``,
        ``"jpeg_dct"`` (ITU-T T.81 DCT processes, with quantisation tables),
        ``"jpeg_lossless"``, ``"jpeg_ls"``, ``"jpeg_2000"``, ``"htj2k"``,
        ``"jpeg_xl"``, ``"mpeg2"``, ``"h264"``, ``"hevc"``.
    byte_order : {"<", ">"} or None
        For native (not encapsulated) pixel data, the byte order of the stored
        values; None for encapsulated pixel data.
    """

    uid: str
    name: str
    compression: Compression
    method: str
    byte_order: str | None = None

    @property
    def lossy(self) -> bool | None:
        """True for a lossy syntax, False for a lossless one, None where it may be either."""
        return {"lossy": True, "lossless": False}.get(self.compression)


def _ts(suffix: str, name: str, compression: Compression, method: str,
        byte_order: str | None = None) -> TransferSyntax:
    return TransferSyntax(f"1.2.840.10008.1.2{suffix}", name, compression, method, byte_order)


_LIST = (
    _ts("", "Implicit VR Little Endian", "lossless", "uncompressed", "<"),
    _ts(".1", "Explicit VR Little Endian", "lossless", "uncompressed", "<"),
    _ts(".1.98", "Encapsulated Uncompressed Explicit VR Little Endian", "lossless",
        "uncompressed"),
    _ts(".1.99", "Deflated Explicit VR Little Endian", "lossless", "deflate", "<"),
    _ts(".2", "Explicit VR Big Endian", "lossless", "uncompressed", ">"),
    _ts(".4.50", "JPEG Baseline (Process 1)", "lossy", "jpeg_dct"),
    _ts(".4.51", "JPEG Extended (Process 2 and 4)", "lossy", "jpeg_dct"),
    _ts(".4.57", "JPEG Lossless, Non-Hierarchical (Process 14)", "lossless", "jpeg_lossless"),
    _ts(".4.70", "JPEG Lossless, Non-Hierarchical, First-Order Prediction (Process 14 "
        "[Selection Value 1])", "lossless", "jpeg_lossless"),
    _ts(".4.80", "JPEG-LS Lossless Image Compression", "lossless", "jpeg_ls"),
    _ts(".4.81", "JPEG-LS Lossy (Near-Lossless) Image Compression", "lossy", "jpeg_ls"),
    _ts(".4.90", "JPEG 2000 Image Compression (Lossless Only)", "lossless", "jpeg_2000"),
    _ts(".4.91", "JPEG 2000 Image Compression", "may_be_lossy", "jpeg_2000"),
    _ts(".4.92", "JPEG 2000 Part 2 Multi-component Image Compression (Lossless Only)",
        "lossless", "jpeg_2000"),
    _ts(".4.93", "JPEG 2000 Part 2 Multi-component Image Compression", "may_be_lossy",
        "jpeg_2000"),
    _ts(".4.100", "MPEG2 Main Profile / Main Level", "lossy", "mpeg2"),
    _ts(".4.100.1", "Fragmentable MPEG2 Main Profile / Main Level", "lossy", "mpeg2"),
    _ts(".4.101", "MPEG2 Main Profile / High Level", "lossy", "mpeg2"),
    _ts(".4.101.1", "Fragmentable MPEG2 Main Profile / High Level", "lossy", "mpeg2"),
    _ts(".4.102", "MPEG-4 AVC/H.264 High Profile / Level 4.1", "lossy", "h264"),
    _ts(".4.102.1", "Fragmentable MPEG-4 AVC/H.264 High Profile / Level 4.1", "lossy", "h264"),
    _ts(".4.103", "MPEG-4 AVC/H.264 BD-compatible High Profile / Level 4.1", "lossy", "h264"),
    _ts(".4.103.1", "Fragmentable MPEG-4 AVC/H.264 BD-compatible High Profile / Level 4.1",
        "lossy", "h264"),
    _ts(".4.104", "MPEG-4 AVC/H.264 High Profile / Level 4.2 For 2D Video", "lossy", "h264"),
    _ts(".4.104.1", "Fragmentable MPEG-4 AVC/H.264 High Profile / Level 4.2 For 2D Video",
        "lossy", "h264"),
    _ts(".4.105", "MPEG-4 AVC/H.264 High Profile / Level 4.2 For 3D Video", "lossy", "h264"),
    _ts(".4.105.1", "Fragmentable MPEG-4 AVC/H.264 High Profile / Level 4.2 For 3D Video",
        "lossy", "h264"),
    _ts(".4.106", "MPEG-4 AVC/H.264 Stereo High Profile / Level 4.2", "lossy", "h264"),
    _ts(".4.106.1", "Fragmentable MPEG-4 AVC/H.264 Stereo High Profile / Level 4.2", "lossy",
        "h264"),
    _ts(".4.107", "HEVC/H.265 Main Profile / Level 5.1", "lossy", "hevc"),
    _ts(".4.108", "HEVC/H.265 Main 10 Profile / Level 5.1", "lossy", "hevc"),
    _ts(".4.110", "JPEG XL Lossless", "lossless", "jpeg_xl"),
    _ts(".4.111", "JPEG XL JPEG Recompression", "lossy", "jpeg_xl"),
    _ts(".4.112", "JPEG XL", "may_be_lossy", "jpeg_xl"),
    _ts(".4.201", "High-Throughput JPEG 2000 Image Compression (Lossless Only)", "lossless",
        "htj2k"),
    _ts(".4.202", "High-Throughput JPEG 2000 with RPCL Options Image Compression (Lossless "
        "Only)", "lossless", "htj2k"),
    _ts(".4.203", "High-Throughput JPEG 2000 Image Compression", "may_be_lossy", "htj2k"),
    _ts(".5", "RLE Lossless", "lossless", "rle"),
)

#: UID -> :class:`TransferSyntax`, for every syntax that carries image pixel data.
TRANSFER_SYNTAXES: dict[str, TransferSyntax] = {ts.uid: ts for ts in _LIST}

#: What a file without a transfer syntax in its meta header is read as (PS3.5 A.1).
DEFAULT_TRANSFER_SYNTAX = "1.2.840.10008.1.2"

#: UIDs that are lossy by definition.
LOSSY_SYNTAXES = frozenset(u for u, ts in TRANSFER_SYNTAXES.items() if ts.compression == "lossy")
#: UIDs whose coding may be reversible or irreversible.
MAY_BE_LOSSY_SYNTAXES = frozenset(u for u, ts in TRANSFER_SYNTAXES.items()
                                  if ts.compression == "may_be_lossy")
#: UIDs that carry an ITU-T T.81 DCT stream, with quantisation tables in its DQT segments.
JPEG_DCT_SYNTAXES = frozenset(u for u, ts in TRANSFER_SYNTAXES.items()
                              if ts.method == "jpeg_dct")
#: UIDs of the wavelet coders (JPEG 2000 and High-Throughput JPEG 2000): no 8 x 8 block grid.
WAVELET_SYNTAXES = frozenset(u for u, ts in TRANSFER_SYNTAXES.items()
                             if ts.method in ("jpeg_2000", "htj2k"))


def syntax_of(uid: str | None) -> TransferSyntax | None:
    """The table's entry for ``uid`` (None for a UID the table does not list).

    Parameters
    ----------
    uid : str or None
        A transfer syntax UID, surrounding spaces and NUL padding ignored.

    Returns
    -------
    TransferSyntax or None
    """
    if uid is None:
        return None
    return TRANSFER_SYNTAXES.get(str(uid).strip(" \x00"))
