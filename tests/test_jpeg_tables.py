"""Annex K tables and libjpeg quality scaling (app/traces/jpeg_tables.py).

Outside references:
- Pillow's JPEG encoder, which links libjpeg (IJG or libjpeg-turbo, same
  ``jpeg_set_quality``): the tables it writes at each quality are read back from
  the stream's DQT segments by a small parser written here from ITU-T T.81,
  B.2.4.1 (DQT: Pq/Tq byte, 64 entries in zig-zag order), and also from Pillow's
  own ``quantization`` attribute (natural order in Pillow >= 8.3, from memory).
- ITU-T T.81 Annex K, Table K.1 (the quality-50 table is K.1 itself).
"""

from __future__ import annotations

import io
import struct

import numpy as np
import pytest
from PIL import Image

from app.traces.jpeg_tables import (
    ANNEX_K_LUMINANCE,
    match_quality,
    natural_from_zigzag,
    scaled_table,
)


def dqt_tables(stream: bytes) -> dict[int, list[int]]:
    """Quantisation tables (zig-zag order) of a JPEG stream, per T.81 B.2.4.1."""
    out: dict[int, list[int]] = {}
    i = 2  # after SOI
    while i + 4 <= len(stream):
        if stream[i] != 0xFF:
            raise ValueError("lost marker sync")
        marker = stream[i + 1]
        length = struct.unpack(">H", stream[i + 2:i + 4])[0]
        seg = stream[i + 4:i + 2 + length]
        if marker == 0xDB:
            j = 0
            while j < len(seg):
                pq, tq = seg[j] >> 4, seg[j] & 0x0F
                j += 1
                if pq:
                    out[tq] = list(struct.unpack(">64H", seg[j:j + 128]))
                    j += 128
                else:
                    out[tq] = list(seg[j:j + 64])
                    j += 64
        if marker == 0xDA:
            break
        i += 2 + length
    return out


def _pillow_jpeg(quality: int) -> tuple[bytes, Image.Image]:
    rng = np.random.default_rng(quality)
    img = rng.integers(0, 256, size=(32, 32), dtype=np.uint8)
    buf = io.BytesIO()
    Image.fromarray(img, "L").save(buf, "JPEG", quality=quality)
    data = buf.getvalue()
    return data, Image.open(io.BytesIO(data))


@pytest.mark.parametrize("quality", [1, 5, 10, 25, 50, 75, 90, 95, 100])
def test_scaled_table_equals_pillow_libjpeg(quality: int) -> None:
    """The table libjpeg writes at each quality (DQT, zig-zag -> natural) equals
    scaled_table(quality); Pillow's natural-order attribute agrees. Exact."""
    data, im = _pillow_jpeg(quality)
    zz = dqt_tables(data)[0]
    assert np.array_equal(natural_from_zigzag(zz), scaled_table(quality))
    assert np.array_equal(np.asarray(im.quantization[0]).reshape(8, 8), scaled_table(quality))


def test_quality_50_is_annex_k_table() -> None:
    """libjpeg's scale at quality 50 is 100 %: the table is T.81 Table K.1 itself."""
    assert np.array_equal(scaled_table(50), ANNEX_K_LUMINANCE)
    assert ANNEX_K_LUMINANCE[0, 0] == 16 and ANNEX_K_LUMINANCE[7, 7] == 99  # from Table K.1


@pytest.mark.parametrize("quality", list(range(10, 96, 5)))
def test_match_quality_recovers_pillow_quality(quality: int) -> None:
    """match_quality of the table Pillow wrote returns a quality whose table is
    identical (exact, error 0); for these qualities that is the quality itself."""
    data, _ = _pillow_jpeg(quality)
    table = natural_from_zigzag(dqt_tables(data)[0])
    q, err, exact = match_quality(table)
    assert exact and err == 0.0
    assert np.array_equal(scaled_table(q), table)
    assert q == quality


def test_match_quality_with_unmeasured_entries() -> None:
    """NaN entries are ignored: only the low-frequency 4 x 4 corner of the
    quality-30 table given; truth 30, tolerance 0 (those 16 entries already pin it)."""
    t = scaled_table(30).astype(float)
    t[4:, :] = np.nan
    t[:, 4:] = np.nan
    q, err, exact = match_quality(t)
    assert np.array_equal(scaled_table(q)[:4, :4], scaled_table(30)[:4, :4]) and exact


def test_non_baseline_tables_for_12_bit() -> None:
    """Without the baseline clamp, quality 10 entries exceed 255 (16-bit tables of
    12-bit extended JPEG, T.81 B.2.4.1 Pq = 1); match_quality(baseline=False)
    recovers 10 from such a table, while the clamped table has no entry above 255."""
    t = scaled_table(10, baseline=False)
    assert t.max() > 255 and scaled_table(10).max() == 255
    q, err, exact = match_quality(t, baseline=False)
    assert q == 10 and exact
