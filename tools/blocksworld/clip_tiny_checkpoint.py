"""Rebuild clip-tiny's framework model from its committed ONNX graphs, as a checkpoint folder.

    python tools/blocksworld/clip_tiny_checkpoint.py OUT

The committed bundle holds the weights (as the graphs' initializers) and the card the
`CLIPConfig`; this writes them back as `CLIPModel.save_pretrained` does, with the tokenizer and
a `preprocessor_config.json`, so `tools/clip_export.py OUT BUNDLE` can be checked against the
committed bundle. Which initializer holds which parameter is learnt by exporting a model of the
same config with distinct random values in every parameter the same way and matching values (a
weight the exporter transposed is matched transposed); every parameter the towers use must be
found, and each in one initializer only.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path

import numpy as np
import onnx
import torch
from onnx import numpy_helper

from encoders import ClipImage, ClipText
from export import _export
from train_clip import build

BUNDLE = Path(__file__).resolve().parents[2] / "fixtures" / "models" / "clip-tiny"


def initializers(path: Path) -> dict[str, np.ndarray]:
    return {i.name: numpy_helper.to_array(i) for i in onnx.load(str(path)).graph.initializer}


def export_pair(model, folder: Path, size: int, dim: int) -> dict[str, dict[str, np.ndarray]]:
    """The towers of `model` exported as the bundle's were; their initializers by graph."""
    ids = torch.tensor([[0, 5, 6, 1, 1], [0, 7, 8, 9, 1]], dtype=torch.long)
    mask = torch.tensor([[1, 1, 1, 1, 0], [1, 1, 1, 1, 1]], dtype=torch.long)
    _export(ClipImage(model).eval(), (torch.zeros(2, 3, size, size),), folder / "image.onnx", ["pixel_values"],
            "image_embeds", False, dim)
    _export(ClipText(model).eval(), (ids, mask), folder / "text.onnx", ["input_ids", "attention_mask"],
            "text_embeds", True, dim)
    return {g: initializers(folder / f"{g}.onnx") for g in ("image", "text")}


def rebuild(out: Path) -> None:
    card = json.loads((BUNDLE / "card.json").read_text())
    cfg = card["architecture"]["config"]
    torch.manual_seed(0)
    fresh = build(cfg).eval()
    # Distinct random values everywhere: a fresh model's layer norms are all ones and its
    # biases zeros, which would match any of them.
    with torch.no_grad():
        for p in fresh.parameters():
            p.normal_()
    size, dim = cfg["vision_config"]["image_size"], cfg["projection_dim"]
    state = {k: v.detach().numpy() for k, v in fresh.state_dict().items()}
    with tempfile.TemporaryDirectory() as tmp:
        exported = export_pair(fresh, Path(tmp), size, dim)
    committed = {g: initializers(BUNDLE / f"{g}.onnx") for g in ("image", "text")}
    found: dict[str, np.ndarray] = {}
    for graph, inits in exported.items():
        for init_name, value in inits.items():
            for param, weights in state.items():
                if value.shape == weights.shape and np.array_equal(value, weights):
                    match = committed[graph][init_name]
                elif value.ndim == 2 and value.shape == weights.T.shape and np.array_equal(value, weights.T):
                    match = committed[graph][init_name].T
                else:
                    continue
                if param in found and not np.array_equal(found[param], match):
                    raise SystemExit(f"{param} matches two initializers with different values")
                found[param] = match
    used = [k for k in state if k.startswith(("vision_model", "text_model", "visual_projection", "text_projection"))
            and "position_ids" not in k]
    missing = [k for k in used if k not in found]
    if missing:
        raise SystemExit(f"{len(missing)} parameters not found in the graphs: {missing[:5]} ...")
    merged = fresh.state_dict()
    for k, v in found.items():
        merged[k] = torch.from_numpy(np.ascontiguousarray(v)).to(merged[k].dtype)
    fresh.load_state_dict(merged)
    out.mkdir(parents=True, exist_ok=True)
    fresh.save_pretrained(str(out))
    (out / "tokenizer.json").write_bytes((BUNDLE / "tokenizer.json").read_bytes())
    import tomllib

    image = tomllib.loads((BUNDLE / "bundle.toml").read_text())["image"]
    (out / "preprocessor_config.json").write_text(json.dumps(
        {"image_mean": image["mean"], "image_std": image["std"], "crop_size": {"height": size, "width": size},
         "size": {"shortest_edge": size}, "resample": 3}, indent=2) + "\n")
    print(f"clip-tiny checkpoint: {len(found)} parameters from the graphs into {out}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", type=Path)
    torch.set_num_threads(2)
    rebuild(ap.parse_args().out)


if __name__ == "__main__":
    sys.exit(main())
