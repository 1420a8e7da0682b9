"""Encoder inputs exactly as docs/bundles.md defines them, with Pillow and numpy.

This is the reference befit's Rust intake is checked against (through the
goldens), so it imports no torch and spells out every rounding:

Images: open, `ImageOps.exif_transpose`, `convert("RGB")` (alpha dropped,
grey replicated), then
- "stretch": resize to size x size;
- "shorter-then-crop": the shorter side becomes `size` and the other
  `round_half_up(other * size / shorter)`; then crop `size` x `size` at
  left `round_half_up((w - size) / 2)`, top `round_half_up((h - size) / 2)`;
with Pillow's resampling filter of that name, then `(pixel / 255 - mean) / std`
per channel in float32, channel first.

Captions: `prefix + caption` through the tokenizer with its post-processor;
when longer than `max_tokens`, the tokenizer's own truncation (which keeps
special tokens) cuts it to `max_tokens` and the caption is flagged truncated;
padded on the right with `pad_id`, mask 1 on real tokens.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

FILTERS = {
    "nearest": Image.Resampling.NEAREST,
    "bilinear": Image.Resampling.BILINEAR,
    "bicubic": Image.Resampling.BICUBIC,
    "lanczos3": Image.Resampling.LANCZOS,
}


def round_half_up(x: float) -> int:
    """Halves go up (Rust's `f64::round` for positive numbers), unlike Python's `round`."""
    return int(math.floor(x + 0.5))


@dataclass(frozen=True)
class ImageSpec:
    """The `[image]` preprocessing settings of a bundle."""

    size: int
    resize: str
    filter: str
    mean: tuple[float, float, float]
    std: tuple[float, float, float]


def load_rgb(path: str | Path) -> Image.Image:
    """Decoded, upright, 8-bit RGB."""
    with Image.open(path) as im:
        return ImageOps.exif_transpose(im).convert("RGB")


def resize(img: Image.Image, spec: ImageSpec) -> Image.Image:
    """`img` brought to spec.size x spec.size by the bundle's resize rule."""
    f = FILTERS[spec.filter]
    size = spec.size
    if spec.resize == "stretch":
        return img.resize((size, size), f)
    if spec.resize != "shorter-then-crop":
        raise ValueError(f"unknown resize {spec.resize!r}")
    w, h = img.size
    if w <= h:
        nw, nh = size, round_half_up(h * size / w)
    else:
        nw, nh = round_half_up(w * size / h), size
    img = img.resize((nw, nh), f)
    left, top = round_half_up((nw - size) / 2), round_half_up((nh - size) / 2)
    return img.crop((left, top, left + size, top + size))


def normalise(img: Image.Image, spec: ImageSpec) -> np.ndarray:
    """float32 [3, size, size] from an RGB image already at size x size."""
    x = np.asarray(img, dtype=np.float32) / np.float32(255.0)
    x = (x - np.asarray(spec.mean, dtype=np.float32)) / np.asarray(spec.std, dtype=np.float32)
    return np.ascontiguousarray(x.transpose(2, 0, 1), dtype=np.float32)


def image_tensor(path: str | Path, spec: ImageSpec) -> np.ndarray:
    """The encoder input of one image file, [3, size, size]."""
    return normalise(resize(load_rgb(path), spec), spec)


@dataclass(frozen=True)
class TextSpec:
    """The `[text]` tokenisation settings of a bundle."""

    max_tokens: int
    pad_id: int
    prefix: str = ""


@dataclass(frozen=True)
class Encoded:
    ids: list[int]
    truncated: bool


def encode(tokenizer, texts: list[str], spec: TextSpec) -> list[Encoded]:
    """Token ids of each caption, truncated to max_tokens, not padded.

    `tokenizer` is a `tokenizers.Tokenizer` loaded from the bundle's file; its
    truncation is switched on here only, never saved.
    """
    tokenizer.no_padding()
    tokenizer.enable_truncation(max_length=spec.max_tokens)
    out = []
    for enc in tokenizer.encode_batch([spec.prefix + t for t in texts]):
        out.append(Encoded(list(enc.ids), bool(enc.overflowing)))
    return out


def pad(encoded: list[Encoded], spec: TextSpec, length: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """int64 ids and mask [batch, length], right padded (default: the longest)."""
    length = length or max(len(e.ids) for e in encoded)
    ids = np.full((len(encoded), length), spec.pad_id, dtype=np.int64)
    mask = np.zeros((len(encoded), length), dtype=np.int64)
    for i, e in enumerate(encoded):
        ids[i, : len(e.ids)] = e.ids
        mask[i, : len(e.ids)] = 1
    return ids, mask
