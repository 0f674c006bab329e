"""PNG, JPEG and TIFF reader on files written by Pillow.

Sources: Pillow's encoders (libjpeg for JPEG: its tables at IJG quality q are
ITU-T T.81 Annex K scaled by libjpeg's ``jpeg_quality_scaling``), Pillow's
``Image.quantization`` as the reference parse of the stored tables, and
Pillow's ``convert("L")`` (ITU-R BT.601 luma) for colour input.
"""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

from app.config import Limits
from app.errors import InputError
from app.io import open_input
from app.io.jpeg_markers import parse_jpeg_markers
from app.traces.header import provenance


def _gradient(shape=(48, 64), dtype=np.uint8, top=255) -> np.ndarray:
    y, x = np.mgrid[: shape[0], : shape[1]]
    return ((x + 2 * y) * top // (shape[1] + 2 * shape[0])).astype(dtype)


def test_png_8_and_16_bit_roundtrip(tmp_path):
    """Truth: the uint8 / uint16 arrays written by Pillow come back unchanged."""
    a8 = _gradient()
    a16 = _gradient(dtype=np.uint16, top=60000)
    Image.fromarray(a8).save(tmp_path / "a8.png")
    Image.fromarray(a16).save(tmp_path / "a16.png")
    with open_input(tmp_path / "a8.png") as loaded:
        vol = loaded.volumes[0]
        assert loaded.format == "png" and vol.header.fields["bit_depth"] == 8
        np.testing.assert_array_equal(np.asarray(vol.data), a8)
    with open_input(tmp_path / "a16.png") as loaded:
        vol = loaded.volumes[0]
        assert vol.header.fields["bit_depth"] == 16
        np.testing.assert_array_equal(np.asarray(vol.data).astype(np.int64), a16)


def test_rgb_converted_to_luminance_with_warning(tmp_path):
    """An RGB PNG reads as Pillow's BT.601 luma, and a warning says so."""
    rgb = np.stack([_gradient(), _gradient()[::-1], np.full((48, 64), 40, np.uint8)], -1)
    im = Image.fromarray(rgb, "RGB")
    im.save(tmp_path / "c.png")
    with open_input(tmp_path / "c.png") as loaded:
        np.testing.assert_array_equal(np.asarray(loaded.volumes[0].data),
                                      np.asarray(im.convert("L")))
        assert any("luminance" in w for w in loaded.warnings)


def test_tiff_multipage_and_16_bit(tmp_path):
    """A 3-page 16-bit TIFF is one (3, rows, cols) Volume with the written values."""
    pages = [_gradient(dtype=np.uint16, top=4000) + k for k in range(3)]
    ims = [Image.fromarray(p) for p in pages]
    ims[0].save(tmp_path / "s.tif", save_all=True, append_images=ims[1:])
    with open_input(tmp_path / "s.tif") as loaded:
        vol = loaded.volumes[0]
        assert loaded.format == "tiff" and vol.shape == (3, 48, 64)
        np.testing.assert_array_equal(np.asarray(vol.data).astype(np.int64), np.stack(pages))


def test_folder_stack_in_natural_order(tmp_path):
    """img2 comes before img10: slice k (truth) holds value 10 k."""
    for k in (1, 2, 10, 11, 3):
        Image.fromarray(np.full((8, 8), 10 * k, np.uint8)).save(tmp_path / f"img{k}.png")
    with open_input(tmp_path) as loaded:
        (vol,) = loaded.volumes
        assert loaded.format == "png" and vol.shape == (5, 8, 8)
        assert [int(vol.data[i, 0, 0]) for i in range(5)] == [10, 20, 30, 100, 110]


@pytest.mark.parametrize("quality", [10, 20, 30, 40, 50, 60, 70, 75, 80, 85, 90, 95])
def test_jpeg_quality_read_back_exactly(tmp_path, quality):
    """Pillow (libjpeg) JPEG at IJG quality q: the stored luminance table matches the
    quality-q table exactly, and our DQT parser agrees with Pillow's parse."""
    path = tmp_path / f"q{quality}.jpg"
    Image.fromarray(_gradient((64, 64))).save(path, quality=quality)
    with open_input(path) as loaded:
        vol = loaded.volumes[0]
        declared, notes = provenance(vol)
    assert declared["stored_jpeg_quality"] == quality
    assert declared["stored_jpeg_quality_exact"] is True
    assert declared["lossy_compression"] is True
    ours = parse_jpeg_markers(path.read_bytes())
    assert vol.header.fields["jpeg_quant_tables"][0] == ours.tables[0].reshape(64).tolist()
    assert any(f"quality {quality}" in n for n in notes)


def test_pixel_limits_and_decompression_bomb(tmp_path, monkeypatch):
    """More pixels than Limits.max_image_pixels, or Pillow's decompression-bomb guard,
    give InputError("too_large"), not a warning or a crash."""
    Image.fromarray(np.zeros((100, 100), np.uint8)).save(tmp_path / "big.png")
    with pytest.raises(InputError) as info:
        with open_input(tmp_path / "big.png", limits=Limits(max_image_pixels=5000)):
            pass
    assert info.value.code == "too_large"
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 4000)
    with pytest.raises(InputError) as info:
        with open_input(tmp_path / "big.png"):
            pass
    assert info.value.code == "too_large"


def test_stack_of_different_sizes_is_refused(tmp_path):
    """Images of two sizes in one stack: the message names both files."""
    Image.fromarray(np.zeros((8, 8), np.uint8)).save(tmp_path / "a1.png")
    Image.fromarray(np.zeros((8, 9), np.uint8)).save(tmp_path / "a2.png")
    with pytest.raises(InputError) as info:
        with open_input(tmp_path):
            pass
    assert info.value.code == "inconsistent_stack" and "a2.png" in info.value.message


def test_stack_of_8_and_16_bit_images_keeps_values(tmp_path):
    """Truth: an 8-bit PNG (value 200) then a 16-bit PNG (value 40000): the stack widens
    to hold both, and a warning says the bit depths differ."""
    Image.fromarray(np.full((8, 8), 200, np.uint8)).save(tmp_path / "a1.png")
    Image.fromarray(np.full((8, 8), 40000, np.uint16)).save(tmp_path / "a2.png")
    with open_input(tmp_path) as loaded:
        data = np.asarray(loaded.volumes[0].data)
        assert int(data[0, 0, 0]) == 200 and int(data[1, 0, 0]) == 40000
        assert any("bit depths" in w for w in loaded.warnings)
