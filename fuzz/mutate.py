"""Mutations of seed files: generic byte damage and format-aware lies.

Generic (any format): truncation, bit flips, byte runs overwritten, chunks
deleted or duplicated, "interesting" integers (0, -1, 2**31-1, 2**32-1,
100000, 65535) written at random offsets in 2-, 4- and 8-byte widths.

Format-aware (the lies a hostile file tells in its header):
- NIfTI-1 ``dim`` (bytes 40-55, int16, nifti1.h) set to absurd or negative sizes;
- ``.npy`` header ``shape`` rewritten (NEP 1 / numpy ``format`` module docs);
- DICOM Rows (0028,0010), Columns (0028,0011), BitsAllocated (0028,0100) and
  any element's length field set to huge values (PS3.5 7.1);
- PNG IHDR width/height with a valid CRC (PNG spec 11.2.2, ISO/IEC 15948);
- JPEG SOFn height/width (ITU-T T.81 B.2.2);
- HDF5 datasets declaring 100000 x 100000 in a file of a few kB (chunked, unwritten);
- ZIP archives that nest, link, climb out with ``../``, clash, lie about sizes,
  use an unknown compression method or expand like a bomb (PKWARE APPNOTE 4.4).

Every function takes a :class:`random.Random`, so a hypothesis strategy
(``st.randoms()``) and the long run (a seeded ``random.Random``) share one code path.
"""

from __future__ import annotations

import gzip
import io
import random
import re
import struct
import zipfile
import zlib

import numpy as np

INTERESTING = [0, 1, -1, 2, 255, 256, 65535, 65536, 100000, 2**31 - 1, -(2**31),
               2**32 - 1, 2**63 - 1]
HUGE_DIMS = [100000, 65535, 32767, 2**31 - 1, 0, -1, -100000]


# ----------------------------------------------------------------- generic damage

def truncate(data: bytes, rng: random.Random) -> bytes:
    return data[: rng.randrange(0, max(1, len(data)))]


def bit_flips(data: bytes, rng: random.Random) -> bytes:
    b = bytearray(data)
    for _ in range(rng.randint(1, 16)):
        i = rng.randrange(len(b))
        b[i] ^= 1 << rng.randrange(8)
    return bytes(b)


def overwrite_run(data: bytes, rng: random.Random) -> bytes:
    b = bytearray(data)
    i = rng.randrange(len(b))
    n = rng.randint(1, 64)
    fill = rng.choice([b"\x00", b"\xff", bytes([rng.randrange(256)])])
    b[i: i + n] = fill * min(n, len(b) - i)
    return bytes(b)


def delete_or_duplicate(data: bytes, rng: random.Random) -> bytes:
    i = rng.randrange(len(data))
    n = rng.randint(1, 256)
    if rng.random() < 0.5:
        return data[:i] + data[i + n:]
    return data[:i] + data[i: i + n] * rng.randint(2, 4) + data[i + n:]


def interesting_int(data: bytes, rng: random.Random) -> bytes:
    b = bytearray(data)
    width, fmt = rng.choice([(2, "h"), (2, "H"), (4, "i"), (4, "I"), (8, "q")])
    value = rng.choice(INTERESTING)
    lo, hi = {"h": (-2**15, 2**15 - 1), "H": (0, 2**16 - 1), "i": (-2**31, 2**31 - 1),
              "I": (0, 2**32 - 1), "q": (-2**63, 2**63 - 1)}[fmt]
    value = min(max(value, lo), hi)
    if len(b) <= width:
        return bytes(b)
    i = rng.randrange(len(b) - width)
    b[i: i + width] = struct.pack(rng.choice("<>") + fmt, value)
    return bytes(b)


GENERIC = [truncate, bit_flips, overwrite_run, delete_or_duplicate, interesting_int]


# ----------------------------------------------------------------- format lies

def nifti_dims(data: bytes, rng: random.Random) -> bytes:
    gz = data[:2] == b"\x1f\x8b"
    try:
        raw = bytearray(gzip.decompress(data) if gz else data)
    except (OSError, EOFError, zlib.error):
        return data  # already damaged by an earlier mutation
    if len(raw) < 56:
        return data
    dims = list(struct.unpack("<8h", raw[40:56]))
    for k in rng.sample(range(0, 8), rng.randint(1, 3)):
        dims[k] = max(-32768, min(32767, rng.choice(HUGE_DIMS)))
    raw[40:56] = struct.pack("<8h", *dims)
    out = bytes(raw)
    return gzip.compress(out) if gz and rng.random() < 0.8 else out


def npy_shape(data: bytes, rng: random.Random) -> bytes:
    m = re.search(rb"'shape': \(([^)]*)\)", data[:512])
    if not m:
        return data
    dims = [rng.choice(HUGE_DIMS + [1, 2, 32]) for _ in range(rng.randint(0, 4))]
    new = b"'shape': (" + b", ".join(str(d).encode() for d in dims) + (
        b",)" if len(dims) == 1 else b")")
    head_end = data.index(b"\n", m.end()) if b"\n" in data[m.end():] else len(data)
    header = data[:head_end].replace(m.group(0), new)
    # keep the header length field (bytes 8-9, version 1.0) consistent half of the time
    if rng.random() < 0.5 and data[6:7] == b"\x01":
        body = header[10:] + b"\n"
        pad = (-(10 + len(body))) % 64
        body = body[:-1] + b" " * pad + b"\n"
        header = header[:8] + struct.pack("<H", len(body)) + body[:-1]
    return header + data[head_end:]


_DICOM_TAGS = {"rows": (0x0028, 0x0010), "cols": (0x0028, 0x0011),
               "bits": (0x0028, 0x0100), "frames": (0x0028, 0x0008)}


def dicom_fields(data: bytes, rng: random.Random) -> bytes:
    b = bytearray(data)
    which = rng.choice(["rows", "cols", "bits", "frames", "length"])
    if which == "length":
        # any element's length: explicit VR short form (2 bytes) or implicit/long (4 bytes)
        starts = [m.start() for m in re.finditer(rb"[\x02\x08\x10\x18\x20\x28]\x00", b[132:])]
        if not starts:
            return data
        i = 132 + rng.choice(starts)
        if i + 8 > len(b):
            return data
        if b[i + 4: i + 6].isalpha():  # explicit VR
            b[i + 6: i + 8] = struct.pack("<H", rng.choice([0xFFFF, 0xFFFE, 0x8000]))
        else:
            b[i + 4: i + 8] = struct.pack("<I", rng.choice([0xFFFFFFF0, 0x7FFFFFFF, 0x10000000]))
        return bytes(b)
    group, elem = _DICOM_TAGS[which]
    tag = struct.pack("<HH", group, elem)
    i = b.find(tag, 128)
    if i < 0:
        return data
    if b[i + 4: i + 6] == b"US":
        pos = i + 8
        b[pos: pos + 2] = struct.pack("<H", rng.choice([65535, 0, 1, 40000, 3]))
    elif b[i + 4: i + 6] == b"IS":
        n = struct.unpack("<H", b[i + 6: i + 8])[0]
        b[i + 8: i + 8 + n] = rng.choice([b"99999999", b"-1", b"0", b"1e9"])[:n].ljust(n)
    else:
        pos = i + 8
        b[pos: pos + 2] = struct.pack("<H", rng.choice([65535, 0, 1, 40000, 3]))
    return bytes(b)


def png_ihdr(data: bytes, rng: random.Random) -> bytes:
    if len(data) < 33 or data[:8] != b"\x89PNG\r\n\x1a\n" or data[12:16] != b"IHDR":
        return data
    body = bytearray(data[16:29])
    w = rng.choice([100000, 2**31 - 1, 0, 65535, 1])
    h = rng.choice([100000, 2**31 - 1, 0, 65535, 1])
    body[0:8] = struct.pack(">II", w, h)
    if rng.random() < 0.3:
        body[8] = rng.choice([1, 2, 4, 8, 16, 7])  # bit depth
    crc = struct.pack(">I", zlib.crc32(b"IHDR" + bytes(body)) & 0xFFFFFFFF)
    return data[:16] + bytes(body) + crc + data[33:]


def jpeg_sof(data: bytes, rng: random.Random) -> bytes:
    b = bytearray(data)
    m = re.search(rb"\xff[\xc0-\xc3\xc5-\xc7\xc9-\xcb\xcd-\xcf]", bytes(b))
    if not m or m.start() + 9 > len(b):
        return data
    i = m.start()
    b[i + 5: i + 9] = struct.pack(">HH", rng.choice([65500, 0, 1, 40000]),
                                  rng.choice([65500, 0, 1, 40000]))
    return bytes(b)


def hdf5_huge(_data: bytes, rng: random.Random) -> bytes:
    import h5py

    shape = rng.choice([(100000, 100000), (1, 100000, 100000), (2**20, 2**20, 4),
                        (100000, 100000, 2)])
    dtype = rng.choice(["f4", "c8", "i2", "f8"])
    buf = io.BytesIO()
    with h5py.File(buf, "w") as f:
        f.create_dataset("kspace", shape=shape, dtype=dtype, chunks=True)
    return buf.getvalue()


def _zip_bytes(members: list[tuple[zipfile.ZipInfo | str, bytes]], method: int) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=method) as zf:
        for info, payload in members:
            zf.writestr(info, payload)
    return buf.getvalue()


def zip_hostile(data: bytes, rng: random.Random) -> bytes:
    inner = data
    kind = rng.choice(["nested", "symlink", "traversal", "absolute", "clash", "lying_size",
                       "bomb", "method", "corrupt_stream", "many", "backslash"])
    npy = _small_npy()
    if kind == "nested":
        for _ in range(rng.randint(2, 8)):
            inner = _zip_bytes([("inner.zip", inner)], zipfile.ZIP_DEFLATED)
        return inner
    if kind == "symlink":
        info = zipfile.ZipInfo("link.npy")
        info.external_attr = (0o120777 << 16)
        return _zip_bytes([(info, b"/etc/passwd"), ("a.npy", npy)], zipfile.ZIP_STORED)
    if kind == "traversal":
        name = rng.choice(["../../evil.npy", "a/../../evil.npy", "..\\..\\evil.npy"])
        return _zip_bytes([(name, npy)], zipfile.ZIP_DEFLATED)
    if kind == "absolute":
        return _zip_bytes([(rng.choice(["/tmp/evil.npy", "C:/evil.npy"]), npy)],
                          zipfile.ZIP_DEFLATED)
    if kind == "backslash":
        return _zip_bytes([("dir\\sub\\a.npy", npy)], zipfile.ZIP_DEFLATED)
    if kind == "clash":
        # a member and a folder of the same name, both of a type the readers open
        return _zip_bytes([("a.npy", npy), ("a.npy/b.npy", npy)], zipfile.ZIP_DEFLATED)
    if kind == "many":
        return _zip_bytes([(f"f{i}.txt", b"") for i in range(rng.randint(30, 80))],
                          zipfile.ZIP_STORED)
    if kind == "bomb":
        return _zip_bytes([("zeros.npy", bytes(rng.choice([2, 4, 8]) << 20))],
                          zipfile.ZIP_DEFLATED)
    raw = bytearray(_zip_bytes([("a.npy", npy)], zipfile.ZIP_DEFLATED))
    if kind == "method":
        for sig, off in ((b"PK\x03\x04", 8), (b"PK\x01\x02", 10)):
            i = raw.find(sig)
            raw[i + off: i + off + 2] = struct.pack("<H", rng.choice([99, 14, 12, 1]))
        return bytes(raw)
    if kind == "lying_size":
        # declared uncompressed size far below the real one, in both headers
        for sig, off in ((b"PK\x03\x04", 22), (b"PK\x01\x02", 24)):
            i = raw.find(sig)
            raw[i + off: i + off + 4] = struct.pack("<I", rng.choice([1, 10, 100]))
        return bytes(raw)
    # corrupt_stream: damage the deflate data between the local header and the directory
    start = raw.find(b"PK\x03\x04") + 30 + len("a.npy")
    end = raw.find(b"PK\x01\x02")
    for _ in range(4):
        raw[rng.randrange(start, end)] = rng.randrange(256)
    return bytes(raw)


def _small_npy() -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.arange(64, dtype=np.uint16).reshape(1, 8, 8))
    return buf.getvalue()


#: Format lies per seed suffix.
FORMAT_LIES = {
    ".nii": [nifti_dims], ".nii.gz": [nifti_dims], ".npy": [npy_shape],
    ".dcm": [dicom_fields], ".png": [png_ihdr], ".jpg": [jpeg_sof], ".h5": [hdf5_huge],
    ".zip": [zip_hostile],
}


def mutate(data: bytes, suffix: str, rng: random.Random) -> bytes:
    """One to three mutations of ``data``: a format lie with probability 1/2, else generic."""
    out = data
    for _ in range(rng.randint(1, 3)):
        if not out:
            break
        lies = FORMAT_LIES.get(suffix, [])
        op = rng.choice(lies) if lies and rng.random() < 0.5 else rng.choice(GENERIC)
        out = op(out, rng)
    return out
