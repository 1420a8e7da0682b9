"""Export a trained model to a bundle folder: ONNX graphs, bundle.toml, card.json.

    python tools/blocksworld/export.py blocks-v1     # or blocks-v2, clip-tiny

Reads `.cache/blocksworld/<name>/` (train.py or train_clip.py), writes
`fixtures/models/<name>/` per docs/bundles.md, then checks the graphs with
onnxruntime against PyTorch: probe images and captions at batch sizes 1 and
several, and every caption alone against the same caption padded inside a
longer batch (all within 1e-4). The card's held-out metrics are computed from
the exported bundle with onnxruntime, through the same preprocessing befit
uses (intake.py), not from PyTorch.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
from pathlib import Path

import numpy as np
import onnx
import torch
from tokenizers import Tokenizer

from bundle_files import bundle_toml, sha256, versions
from evaluate import OrtBundle, all_texts, evaluate_bundle, read_rows
from intake import encode, image_tensor, pad
from make_probe import PROBE_SEED

OPSET = 17
TOLERANCE = 1e-4


def _export(
    module: torch.nn.Module, args: tuple, path: Path, inputs: list[str], output: str, token_axis: bool,
    dimension: int | None,
) -> None:
    """ONNX of `module` with dynamic batch (and token) axes; `dimension` states an
    embedding output's width (None: a `[batch]` output)."""
    axes = {name: ({0: "batch", 1: "tokens"} if token_axis else {0: "batch"}) for name in inputs}
    axes[output] = {0: "batch"}
    torch.onnx.export(
        module,
        args,
        str(path),
        input_names=inputs,
        output_names=[output],
        dynamic_axes=axes,
        opset_version=OPSET,
        dynamo=False,
        do_constant_folding=True,
    )
    model = onnx.load(str(path))
    onnx.checker.check_model(model)
    # Drop the exporter's doc strings (source paths of this machine) so files
    # only change when the model does.
    for node in model.graph.node:
        node.doc_string = ""
    # The exporter leaves the embedding width symbolic; state it.
    if dimension is not None:
        model.graph.output[0].type.tensor_type.shape.dim[1].dim_value = dimension
    model.producer_version = ""
    onnx.save(model, str(path))


def verify(bundle: OrtBundle, torch_image, torch_text, probe: Path) -> dict:
    """ONNX against PyTorch on probe data; raises when any vector differs by more than TOLERANCE."""
    rows = read_rows(probe)[:48]
    spec = bundle.image_spec
    x = np.stack([image_tensor(probe.parent / r["image"], spec) for r in rows])
    with torch.no_grad():
        want = torch_image(torch.from_numpy(x)).numpy()
    worst = {"image_batch_1": 0.0, "image_batch_48": 0.0, "text_batch_1": 0.0, "text_padded": 0.0}
    for i in range(0, 8):
        worst["image_batch_1"] = max(worst["image_batch_1"], float(np.abs(bundle.embed_tensors(x[i : i + 1]) - want[i]).max()))
    worst["image_batch_48"] = float(np.abs(bundle.embed_tensors(x) - want).max())

    texts = all_texts(rows)[:64]
    encoded = encode(bundle.tokenizer, texts, bundle.text_spec)
    longest = max(len(e.ids) for e in encoded)
    ids, mask = pad(encoded, bundle.text_spec, longest + 5)  # every caption padded, some by many tokens
    padded = bundle.embed_ids(ids, mask)
    for k, e in enumerate(encoded):
        one_ids, one_mask = pad([e], bundle.text_spec)
        with torch.no_grad():
            ref = torch_text(torch.from_numpy(one_ids), torch.from_numpy(one_mask)).numpy()[0]
        alone = bundle.embed_ids(one_ids, one_mask)[0]
        worst["text_batch_1"] = max(worst["text_batch_1"], float(np.abs(alone - ref).max()))
        worst["text_padded"] = max(worst["text_padded"], float(np.abs(padded[k] - ref).max()))
    for key, value in worst.items():
        if value > TOLERANCE:
            raise SystemExit(f"{key}: ONNX differs from PyTorch by {value:.2e} (> {TOLERANCE})")
    return {k: float(f"{v:.2e}") for k, v in worst.items()}


def export_blocks(name: str, source: Path, out: Path) -> tuple[dict, object, object, dict]:
    from train import load

    image_enc, text_enc, s = load(source)
    version = name.split("-")[-1]
    dummy_img = torch.zeros(2, 3, 64, 64)
    dummy_ids = torch.ones(2, 7, dtype=torch.long)
    dummy_mask = torch.ones(2, 7, dtype=torch.long)
    _export(image_enc, (dummy_img,), out / "image.onnx", ["pixels"], "embedding", False, s["dim"])
    _export(text_enc, (dummy_ids, dummy_mask), out / "text.onnx", ["input_ids", "attention_mask"], "embedding", True, s["dim"])
    image = {"input": "pixels", "output": "embedding", "size": 64, "resize": "stretch", "filter": "bilinear",
             "mean": s["mean"], "std": s["std"]}
    text = {"ids_input": "input_ids", "mask_input": "attention_mask", "output": "embedding",
            "max_tokens": s["max_tokens"], "pad_id": s["pad_id"]}
    (out / "bundle.toml").write_text(bundle_toml("blocks", version, image, text, s["dim"]))
    return s, image_enc, text_enc, {"image_encoder": "strided CNN, flattened 4x4 map, 2-layer head",
                                    "text_encoder": "word embedding + one-way GRU, last and mean state"}


def export_clip(name: str, source: Path, out: Path) -> tuple[dict, object, object, dict]:
    from train_clip import load

    model, s = load(source)
    from encoders import ClipImage, ClipText

    image_mod, text_mod = ClipImage(model).eval(), ClipText(model).eval()
    size = s["image_size"]
    dummy_img = torch.zeros(2, 3, size, size)
    dummy_ids = torch.tensor([[0, 5, 6, 1, 1], [0, 7, 8, 9, 1]], dtype=torch.long)
    dummy_mask = torch.tensor([[1, 1, 1, 1, 0], [1, 1, 1, 1, 1]], dtype=torch.long)
    _export(image_mod, (dummy_img,), out / "image.onnx", ["pixel_values"], "image_embeds", False, s["dim"])
    _export(text_mod, (dummy_ids, dummy_mask), out / "text.onnx", ["input_ids", "attention_mask"], "text_embeds", True, s["dim"])
    image = {"input": "pixel_values", "output": "image_embeds", "size": size, "resize": "shorter-then-crop",
             "filter": "bicubic", "mean": s["mean"], "std": s["std"]}
    text = {"ids_input": "input_ids", "mask_input": "attention_mask", "output": "text_embeds",
            "max_tokens": s["max_tokens"], "pad_id": s["pad_id"]}
    (out / "bundle.toml").write_text(bundle_toml("clip-tiny", "v1", image, text, s["dim"]))
    return s, image_mod, text_mod, {"architecture": "transformers CLIPModel from CLIPConfig, random init",
                                    "config": s["config"]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("name", choices=["blocks-v1", "blocks-v2", "clip-tiny"])
    ap.add_argument("--source", type=Path, default=None, help="default .cache/blocksworld/<name>")
    ap.add_argument("--out", type=Path, default=None, help="default fixtures/models/<name>")
    ap.add_argument("--probe", type=Path, default=Path("fixtures/probe/probe.jsonl"))
    args = ap.parse_args()
    torch.set_num_threads(2)
    source = args.source or Path(".cache/blocksworld") / args.name
    out = args.out or Path("fixtures/models") / args.name
    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    shutil.copyfile(source / "tokenizer.json", out / "tokenizer.json")
    # Padding and truncation are befit's job; a tokenizer file that carried
    # them would pad twice.
    tok = json.loads((out / "tokenizer.json").read_text())
    assert tok["padding"] is None and tok["truncation"] is None
    Tokenizer.from_file(str(out / "tokenizer.json"))

    export = export_clip if args.name == "clip-tiny" else export_blocks
    settings, torch_image, torch_text, architecture = export(args.name, source, out)
    bundle = OrtBundle(out)
    checks = verify(bundle, torch_image, torch_text, args.probe)
    print(f"{args.name}: ONNX matches PyTorch: {checks}", flush=True)
    metrics = evaluate_bundle(out, args.probe)
    print(json.dumps(metrics, indent=2), flush=True)

    train_info = json.loads((source / "train.json").read_text())
    files = ["bundle.toml", "image.onnx", "text.onnx", "tokenizer.json"]
    card = {
        "bundle": args.name,
        "about": "blocks world dual encoder for befit's demo and tests; scenes from tools/blocksworld",
        "architecture": architecture,
        "training": {k: v for k, v in train_info.items() if k != "curve"},
        "loss_curve": train_info.get("curve", []),
        "seeds": {"training_scenes": settings["preset"]["seed"] if "preset" in settings else settings["seed"],
                  "probe_scenes": PROBE_SEED},
        "wall_clock_seconds": {"render_and_vocabulary": train_info["seconds_data"], "training": train_info["seconds_train"]},
        "packages": versions(),
        "onnx": {"opset": OPSET, "exporter": "torch.onnx legacy (dynamo=False)", "max_abs_diff_vs_pytorch": checks},
        "held_out": {"probe": str(args.probe), **metrics},
        "files": {f: {"sha256": sha256(out / f), "bytes": (out / f).stat().st_size} for f in files},
    }
    (out / "card.json").write_text(json.dumps(card, indent=2) + "\n")
    total = sum((out / f).stat().st_size for f in files + ["card.json"])
    print(f"{args.name}: wrote {out} ({total / 1e6:.2f} MB)", flush=True)


if __name__ == "__main__":
    sys.exit(main())
