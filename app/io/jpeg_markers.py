"""Parse the marker segments of a JPEG stream (quantisation tables, frame header).

Used for JPEG files and for the encapsulated JPEG frames of compressed DICOM, so
the stored tables are known even when the pixels cannot be decoded.

References
----------
ITU-T Recommendation T.81 (1992) | ISO/IEC 10918-1, Annex B (B.1.1.2 markers,
B.2.2 frame header, B.2.4.1 quantisation table specification), Annex A
(Figure A.6, the zig-zag sequence of the 64 coefficients).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

#: Zig-zag scan order: ZIGZAG[k] is the natural (row-major) index of the k-th
#: coefficient in a JPEG stream's DQT segment (T.81, Figure A.6).
ZIGZAG = np.array(
    [
        0, 1, 8, 16, 9, 2, 3, 10, 17, 24, 32, 25, 18, 11, 4, 5,
        12, 19, 26, 33, 40, 48, 41, 34, 27, 20, 13, 6, 7, 14, 21, 28,
        35, 42, 49, 56, 57, 50, 43, 36, 29, 22, 15, 23, 30, 37, 44, 51,
        58, 59, 52, 45, 38, 31, 39, 46, 53, 60, 61, 54, 47, 55, 62, 63,
    ],
    dtype=np.int32,
)

#: Start-of-frame markers (T.81 Table B.1) and the process each names.
SOF_PROCESS = {
    0xC0: "baseline",
    0xC1: "extended sequential",
    0xC2: "progressive",
    0xC3: "lossless",
    0xC5: "differential sequential",
    0xC6: "differential progressive",
    0xC7: "differential lossless",
    0xC9: "extended sequential (arithmetic)",
    0xCA: "progressive (arithmetic)",
    0xCB: "lossless (arithmetic)",
    0xCD: "differential sequential (arithmetic)",
    0xCE: "differential progressive (arithmetic)",
    0xCF: "differential lossless (arithmetic)",
}
_STANDALONE = {0x01, *range(0xD0, 0xD8)}


@dataclass
class JpegMarkers:
    """What the marker segments before the first scan declare.

    Attributes
    ----------
    tables : dict of int -> ndarray
        Quantisation table id (0-3) -> 8 x 8 table in natural (row-major) order.
    process : str or None
        Coding process named by the start-of-frame marker.
    precision : int or None
        Sample precision in bits (8 or 12 for DCT processes).
    components : list of tuple
        ``(component id, h sampling, v sampling, quantisation table id)``.
    height, width : int or None
    """

    tables: dict[int, np.ndarray] = field(default_factory=dict)
    process: str | None = None
    precision: int | None = None
    components: list[tuple[int, int, int, int]] = field(default_factory=list)
    height: int | None = None
    width: int | None = None

    @property
    def lossy(self) -> bool | None:
        """True for the DCT processes, False for lossless ones, None if unknown."""
        if self.process is None:
            return None
        return "lossless" not in self.process

    def luminance_table(self) -> np.ndarray | None:
        """The table used by the first component (luminance in YCbCr images)."""
        if self.components:
            tq = self.components[0][3]
            if tq in self.tables:
                return self.tables[tq]
        return self.tables.get(0) if self.tables else None


def natural_from_zigzag(values: list[int] | np.ndarray) -> np.ndarray:
    """Reorder a 64-entry table from zig-zag (stream) order to natural 8 x 8.

    Parameters
    ----------
    values : sequence of 64 int
        Table entries in the order a DQT segment stores them.

    Returns
    -------
    ndarray of int32, shape (8, 8)

    References
    ----------
    ITU-T T.81, Figure A.6 (zig-zag sequence).
    """
    v = np.asarray(values, dtype=np.int32).reshape(64)
    out = np.empty(64, dtype=np.int32)
    out[ZIGZAG] = v
    return out.reshape(8, 8)


def parse_jpeg_markers(stream: bytes) -> JpegMarkers:
    """Read DQT and SOF segments of a JPEG stream up to its first scan.

    Parameters
    ----------
    stream : bytes
        A JPEG interchange (or abbreviated) stream starting with SOI (FFD8).

    Returns
    -------
    JpegMarkers

    Raises
    ------
    ValueError
        When the stream does not start with SOI or a segment is cut short.

    References
    ----------
    ITU-T T.81 Annex B.1.1.2, B.2.2, B.2.4.1.
    """
    data = memoryview(bytes(stream))
    if len(data) < 4 or data[0] != 0xFF or data[1] != 0xD8:
        raise ValueError("not a JPEG stream (no start-of-image marker)")
    out = JpegMarkers()
    pos = 2
    n = len(data)
    while pos + 4 <= n:
        if data[pos] != 0xFF:
            pos += 1  # tolerate stray bytes between segments
            continue
        marker = data[pos + 1]
        if marker == 0xFF:
            pos += 1  # fill byte
            continue
        if marker in _STANDALONE:
            pos += 2
            continue
        if marker == 0xD9:  # EOI
            break
        length = (data[pos + 2] << 8) | data[pos + 3]
        seg = data[pos + 4:pos + 2 + length]
        if len(seg) != length - 2:
            raise ValueError("JPEG segment cut short")
        if marker == 0xDB:
            _read_dqt(seg, out)
        elif marker in SOF_PROCESS:
            _read_sof(marker, seg, out)
        elif marker == 0xDA:  # SOS: entropy-coded data follows
            break
        pos += 2 + length
    return out


def _read_dqt(seg: memoryview, out: JpegMarkers) -> None:
    i = 0
    while i < len(seg):
        pq, tq = seg[i] >> 4, seg[i] & 0x0F
        i += 1
        if pq == 0:
            vals = list(seg[i:i + 64])
            i += 64
        else:
            raw = bytes(seg[i:i + 128])
            vals = [(raw[2 * k] << 8) | raw[2 * k + 1] for k in range(len(raw) // 2)]
            i += 128
        if len(vals) != 64:
            raise ValueError("quantisation table cut short")
        out.tables[int(tq)] = natural_from_zigzag(vals)


def _read_sof(marker: int, seg: memoryview, out: JpegMarkers) -> None:
    if len(seg) < 6:
        raise ValueError("frame header cut short")
    out.process = SOF_PROCESS[marker]
    out.precision = int(seg[0])
    out.height = int((seg[1] << 8) | seg[2])
    out.width = int((seg[3] << 8) | seg[4])
    nf = int(seg[5])
    comps = []
    for k in range(nf):
        j = 6 + 3 * k
        if j + 3 > len(seg):
            break
        comps.append((int(seg[j]), int(seg[j + 1] >> 4), int(seg[j + 1] & 0x0F), int(seg[j + 2])))
    out.components = comps
