"""Image sources: PNG encoding without Pillow, content ids, source kinds."""

from __future__ import annotations

import hashlib
import io
import struct
import zlib

import numpy as np
import pytest
from befit_client import ImageId, ServerPath, content_id, encode_png
from befit_client.images import source_bytes

PIL = pytest.importorskip("PIL.Image")


def chunks(png: bytes):
    """(type, payload) of each chunk, checking every CRC on the way."""
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    pos, out = 8, []
    while pos < len(png):
        (n,) = struct.unpack(">I", png[pos : pos + 4])
        kind, payload = png[pos + 4 : pos + 8], png[pos + 8 : pos + 8 + n]
        (crc,) = struct.unpack(">I", png[pos + 8 + n : pos + 12 + n])
        assert crc == zlib.crc32(kind + payload) & 0xFFFFFFFF, kind
        out.append((kind, payload))
        pos += 12 + n
    return out


@pytest.mark.parametrize(
    "shape,mode",
    [((7, 5, 3), "RGB"), ((4, 9), "L"), ((3, 3, 4), "RGBA"), ((6, 2, 1), "L")],
)
def test_png_decodes_to_the_same_pixels_in_pillow(shape, mode):
    rng = np.random.default_rng(1)
    pixels = rng.integers(0, 256, size=shape, dtype=np.uint8)
    img = PIL.open(io.BytesIO(encode_png(pixels)))
    assert img.mode == mode
    assert img.size == (shape[1], shape[0])
    expected = pixels[..., 0] if pixels.ndim == 3 and pixels.shape[2] == 1 else pixels
    np.testing.assert_array_equal(np.asarray(img), expected)


def test_png_chunks_and_rows_follow_the_spec():
    pixels = np.arange(2 * 3 * 3, dtype=np.uint8).reshape(2, 3, 3)
    kinds = chunks(encode_png(pixels))
    assert [k for k, _ in kinds] == [b"IHDR", b"IDAT", b"IEND"]
    assert struct.unpack(">IIBBBBB", kinds[0][1]) == (3, 2, 8, 2, 0, 0, 0)
    raw = zlib.decompress(kinds[1][1])
    # Each row: filter byte 0, then the row's RGB bytes.
    assert raw == b"\x00" + pixels[0].tobytes() + b"\x00" + pixels[1].tobytes()


def test_png_is_deterministic_so_ids_repeat():
    pixels = np.full((8, 8, 3), 200, dtype=np.uint8)
    assert content_id(encode_png(pixels)) == content_id(encode_png(pixels.copy()))
    assert content_id(encode_png(pixels)) != content_id(encode_png(pixels[:, :7].copy()))


def test_png_refuses_wrong_dtype_and_shape():
    with pytest.raises(TypeError, match="uint8"):
        encode_png(np.zeros((2, 2, 3), dtype=np.float32))
    with pytest.raises(ValueError, match="shape"):
        encode_png(np.zeros((2, 2, 2), dtype=np.uint8))
    with pytest.raises(ValueError, match="pixel"):
        encode_png(np.zeros((0, 2, 3), dtype=np.uint8))


def test_content_id_is_sha256_hex():
    data = b"not really a png"
    assert content_id(data) == hashlib.sha256(data).hexdigest()
    assert isinstance(content_id(data), ImageId)


def test_image_id_checks_its_shape():
    assert ImageId("AB" * 32) == "ab" * 32
    with pytest.raises(ValueError):
        ImageId("abc")


def test_sources_become_file_bytes(tmp_path):
    pixels = np.zeros((4, 4, 3), dtype=np.uint8)
    pixels[1, 2] = (255, 0, 0)
    png = encode_png(pixels)
    path = tmp_path / "x.png"
    path.write_bytes(png)
    assert source_bytes(png) == png
    assert source_bytes(bytearray(png)) == png
    assert source_bytes(memoryview(png)) == png
    assert source_bytes(str(path)) == png
    assert source_bytes(path) == png
    assert source_bytes(pixels) == png
    pil = PIL.open(io.BytesIO(png))
    np.testing.assert_array_equal(np.asarray(PIL.open(io.BytesIO(source_bytes(pil)))), pixels)
    assert source_bytes(ImageId("0" * 64)) is None
    assert source_bytes(ServerPath("images/00000.png")) is None
    with pytest.raises(TypeError, match="cannot use"):
        source_bytes(3.5)


@pytest.mark.parametrize("mode", ["L", "RGB", "RGBA"])
def test_a_pil_image_and_its_array_get_the_same_id(mode):
    # Pillow's own PNG writer picks other filters and chunks than encode_png, so
    # the PIL image goes through encode_png too: same pixels, same bytes, same id.
    rng = np.random.default_rng(7)
    shape = {"L": (5, 6), "RGB": (5, 6, 3), "RGBA": (5, 6, 4)}[mode]
    pixels = rng.integers(0, 256, size=shape, dtype=np.uint8)
    pil = PIL.fromarray(pixels, mode=mode)
    assert content_id(source_bytes(pil)) == content_id(source_bytes(pixels))
    # And the bytes still decode (in Pillow, the reference decoder) to those pixels.
    np.testing.assert_array_equal(np.asarray(PIL.open(io.BytesIO(source_bytes(pil)))), pixels)


def test_a_palette_image_is_sent_as_its_rgb_pixels():
    pixels = np.zeros((3, 3, 3), dtype=np.uint8)
    pixels[1, 1] = (200, 10, 30)
    palette = PIL.fromarray(pixels, mode="RGB").convert("P")
    rgb = np.asarray(palette.convert("RGB"))
    assert content_id(source_bytes(palette)) == content_id(encode_png(rgb))
