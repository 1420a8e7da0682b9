"""Image sources: whatever a training loop holds, turned into file bytes.

befit names an image by its content id, the sha256 of its file bytes, so the
client can compute the id locally and skip sending bytes the server already
has. Accepted sources:

- ``str`` or ``os.PathLike``: a local file, sent as its bytes;
- ``bytes`` / ``bytearray`` / ``memoryview``: an encoded PNG, JPEG or WebP file;
- a ``PIL.Image.Image`` (Pillow is optional): its pixels, encoded as PNG like
  an array (so a PIL image and ``numpy.asarray`` of it get the same id);
- a ``numpy.ndarray`` of ``uint8``, HxW (grey), HxWx3 (RGB) or HxWx4 (RGBA):
  encoded as PNG by :func:`encode_png`, no Pillow needed;
- :class:`ImageId`: an image already registered on the server;
- :class:`ServerPath`: a path under the server's ``--image-root``.

The same pixels always give the same PNG bytes (fixed filter and compression
level), so an array sent twice gets the same id twice.
"""

from __future__ import annotations

import hashlib
import os
import re
import struct
import zlib
from dataclasses import dataclass
from typing import Any, Optional, Union

import numpy as np

_HEX64 = re.compile(r"^[0-9a-f]{64}$")


class ImageId(str):
    """Content id of a registered image: 64 lowercase hex digits."""

    def __new__(cls, value: str) -> "ImageId":
        value = str(value).lower()
        if not _HEX64.match(value):
            raise ValueError(f"an image id is 64 hex digits, got {value!r}")
        return super().__new__(cls, value)


@dataclass(frozen=True)
class ServerPath:
    """An image file named relative to the server's ``--image-root``."""

    path: str


ImageSource = Union[str, "os.PathLike[str]", bytes, bytearray, memoryview, np.ndarray, ImageId, ServerPath, Any]


def content_id(data: bytes) -> ImageId:
    """The id befit gives these file bytes (sha256, hex)."""
    return ImageId(hashlib.sha256(data).hexdigest())


def _png_chunk(kind: bytes, payload: bytes) -> bytes:
    crc = zlib.crc32(kind + payload) & 0xFFFFFFFF
    return struct.pack(">I", len(payload)) + kind + payload + struct.pack(">I", crc)


def encode_png(pixels: np.ndarray, compression: int = 6) -> bytes:
    """PNG file bytes of a uint8 image: HxW (grey), HxWx1, HxWx3 (RGB) or
    HxWx4 (RGBA). Written with zlib and struct alone (PNG spec, ISO/IEC
    15948:2004): 8-bit samples, filter type 0 on every row, no interlace."""
    arr = np.asarray(pixels)
    if arr.dtype != np.uint8:
        raise TypeError(
            f"encode_png takes uint8 pixels, got {arr.dtype}; convert with .astype(np.uint8) after scaling to 0..255"
        )
    if arr.ndim == 3 and arr.shape[2] == 1:
        arr = arr[:, :, 0]
    if arr.ndim == 2:
        colour_type, channels = 0, 1
    elif arr.ndim == 3 and arr.shape[2] in (3, 4):
        channels = arr.shape[2]
        colour_type = 2 if channels == 3 else 6
    else:
        raise ValueError(f"encode_png takes HxW, HxWx3 or HxWx4 pixels, got shape {arr.shape}")
    height, width = arr.shape[0], arr.shape[1]
    if height < 1 or width < 1:
        raise ValueError(f"an image needs at least one pixel, got shape {arr.shape}")
    rows = np.ascontiguousarray(arr).reshape(height, width * channels)
    raw = np.concatenate([np.zeros((height, 1), dtype=np.uint8), rows], axis=1).tobytes()
    header = struct.pack(">IIBBBBB", width, height, 8, colour_type, 0, 0, 0)
    return (
        b"\x89PNG\r\n\x1a\n"
        + _png_chunk(b"IHDR", header)
        + _png_chunk(b"IDAT", zlib.compress(raw, compression))
        + _png_chunk(b"IEND", b"")
    )


def _is_pil_image(obj: Any) -> bool:
    # Checked by name so Pillow is never imported unless the caller uses it.
    return any(c.__module__.startswith("PIL.") and c.__name__ == "Image" for c in type(obj).__mro__)


def source_bytes(source: Any) -> Optional[bytes]:
    """The file bytes of a local source, or None for :class:`ImageId` and
    :class:`ServerPath` (which name an image the server holds)."""
    if isinstance(source, (ImageId, ServerPath)):
        return None
    if isinstance(source, (bytes, bytearray, memoryview)):
        return bytes(source)
    if isinstance(source, np.ndarray):
        return encode_png(source)
    if isinstance(source, (str, os.PathLike)):
        with open(source, "rb") as f:
            return f.read()
    if _is_pil_image(source):
        # Through the same encoder as arrays, so a PIL image and the array of
        # its pixels get the same bytes, hence the same content id.
        if source.mode not in ("L", "RGB", "RGBA"):
            keep_alpha = source.mode in ("LA", "PA", "RGBa", "La") or "transparency" in source.info
            source = source.convert("RGBA" if keep_alpha else "RGB")
        return encode_png(np.asarray(source, dtype=np.uint8))
    raise TypeError(
        f"cannot use {type(source).__name__} as an image; give a path, bytes, a PIL image, "
        "a uint8 numpy array, an ImageId or a ServerPath"
    )
