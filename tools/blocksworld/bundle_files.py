"""The text files of a bundle, written the same way by every exporter (no torch needed):
`bundle.toml` in the field order of docs/bundles.md, file digests, package versions for cards."""

from __future__ import annotations

import hashlib
import platform
from importlib import metadata
from pathlib import Path

PACKAGES = ("torch", "onnx", "onnxruntime", "tokenizers", "transformers", "numpy", "pillow", "onnxscript")


def bundle_toml(name: str, version: str, image: dict, text: dict, dimension: int) -> str:
    """bundle.toml text, field order as in docs/bundles.md."""

    def arr(v):
        return "[" + ", ".join(repr(float(x)) for x in v) + "]"

    lines = [
        "[model]",
        f'name = "{name}"',
        f'version = "{version}"',
        f"dimension = {dimension}",
        "",
        "[image]",
        'file = "image.onnx"',
        f'input = "{image["input"]}"',
        f'output = "{image["output"]}"',
        f"size = {image['size']}",
        f'resize = "{image["resize"]}"',
        f'filter = "{image["filter"]}"',
        f"mean = {arr(image['mean'])}",
        f"std = {arr(image['std'])}",
        "",
        "[text]",
        'file = "text.onnx"',
        'tokenizer = "tokenizer.json"',
        f'ids_input = "{text["ids_input"]}"',
        f'mask_input = "{text["mask_input"]}"',
        f'output = "{text["output"]}"',
        f"max_tokens = {text['max_tokens']}",
        f"pad_id = {text['pad_id']}",
        'padding = "longest"',
        'prefix = ""',
        "",
    ]
    return "\n".join(lines)


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def versions() -> dict:
    out = {"python": platform.python_version()}
    for p in PACKAGES:
        try:
            out[p] = metadata.version(p)
        except metadata.PackageNotFoundError:
            pass
    return out


def fluency_toml() -> str:
    """The `[fluency]` section of a bundle whose head is `fluency.onnx` (docs/bundles.md)."""
    lines = [
        "[fluency]",
        'file = "fluency.onnx"',
        'ids_input = "input_ids"',
        'mask_input = "attention_mask"',
        'output = "probability"',
        "",
    ]
    return "\n".join(lines)
