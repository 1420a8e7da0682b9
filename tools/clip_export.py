"""Turn a CLIP-layout checkpoint into a befit bundle, and check it against the framework.

    python tools/clip_export.py CHECKPOINT OUT [--name NAME] [--version V] [--probe PROBE.jsonl]

CHECKPOINT is a folder written by `transformers` `CLIPModel.save_pretrained` (config.json and
the weights) with the tokenizer beside it as `tokenizer.json` (a `CLIPTokenizerFast`'s
`save_pretrained` writes one) and, when there is one, the image processor's
`preprocessor_config.json` (its `image_mean`, `image_std` and crop size are used; without it,
CLIP's published mean/std and the config's image size).

OUT gets what docs/bundles.md defines: `image.onnx` (`pixel_values` [batch, 3, S, S] ->
`image_embeds`) and `text.onnx` (`input_ids`, `attention_mask` [batch, tokens] ->
`text_embeds`), both with dynamic batch (and token) axes and L2-normalised projected outputs;
`tokenizer.json` without padding or truncation (befit pads and truncates itself);
`bundle.toml` (S px, shorter side then centre crop, bicubic, the mean/std, the text config's
position count as the token limit, the pad id); and `card.json` with the checks below.

The checks, on the probe set's images and captions prepared exactly as befit prepares them
(tools/blocksworld/intake.py): the ONNX graphs through onnxruntime against the PyTorch model,
batch of one and batched, every caption alone and padded inside a longer batch; the export
fails unless every vector is within 1e-4 of PyTorch's and every cosine between the two is at
least 0.9999.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE / "blocksworld"))

# The pure parts (settings, tokenizer, bundle.toml) need no torch, so tests can check them
# without it; the export itself imports torch, transformers and the exporter.
from bundle_files import bundle_toml, sha256, versions  # noqa: E402

# CLIP's published normalisation (Radford et al. 2021, the released preprocessing), used when
# the checkpoint has no preprocessor_config.json.
CLIP_MEAN = (0.48145466, 0.4578275, 0.40821073)
CLIP_STD = (0.26862954, 0.26130258, 0.27577711)
MIN_COSINE = 0.9999


def image_settings(checkpoint: Path, config) -> dict:
    """Size, mean and std: from the image processor's file when present, else CLIP's own."""
    size = config.vision_config.image_size
    mean, std = CLIP_MEAN, CLIP_STD
    processor = checkpoint / "preprocessor_config.json"
    if processor.exists():
        p = json.loads(processor.read_text())
        mean, std = p.get("image_mean", mean), p.get("image_std", std)
        crop = p.get("crop_size", size)
        size = crop.get("height", size) if isinstance(crop, dict) else crop
    if size != config.vision_config.image_size:
        raise SystemExit(f"crop size {size} differs from the model's image_size {config.vision_config.image_size}")
    return {"input": "pixel_values", "output": "image_embeds", "size": int(size), "resize": "shorter-then-crop",
            "filter": "bicubic", "mean": list(mean), "std": list(std)}


def bare_tokenizer(source: Path, out: Path) -> dict:
    """Copies the tokenizer without padding or truncation; returns its JSON."""
    tok = json.loads(source.read_text())
    tok["padding"] = None
    tok["truncation"] = None
    out.write_text(json.dumps(tok, ensure_ascii=False, indent=2) + "\n")
    return tok


def pad_id(tok: dict, config) -> int:
    """The end-of-text id: CLIP's text tower pools at the first end token (or, in the legacy
    rule, at the largest id), and padding with it keeps both rules pointing at the real end;
    the attention mask hides the padding itself."""
    eos = config.text_config.eos_token_id
    known = {t["id"] for t in tok.get("added_tokens", [])} | set((tok.get("model", {}).get("vocab") or {}).values())
    if eos not in known:
        raise SystemExit(f"the text config's eos_token_id {eos} is not a token of tokenizer.json")
    return int(eos)


def cosines(bundle, image_mod, text_mod, probe: Path) -> dict:
    """Smallest cosine between onnxruntime's and PyTorch's vectors on probe images and captions."""
    import torch
    from evaluate import all_texts, read_rows
    from intake import encode, image_tensor, pad

    rows = read_rows(probe)[:32]
    x = np.stack([image_tensor(probe.parent / r["image"], bundle.image_spec) for r in rows])
    with torch.no_grad():
        want = image_mod(torch.from_numpy(x)).numpy()
    got = bundle.embed_tensors(x)
    texts = all_texts(rows)[:64]
    ids, mask = pad(encode(bundle.tokenizer, texts, bundle.text_spec), bundle.text_spec)
    with torch.no_grad():
        want_t = text_mod(torch.from_numpy(ids), torch.from_numpy(mask)).numpy()
    got_t = bundle.embed_ids(ids, mask)

    def worst(a, b):
        a = a / np.linalg.norm(a, axis=1, keepdims=True)
        b = b / np.linalg.norm(b, axis=1, keepdims=True)
        return float((a * b).sum(axis=1).min())

    return {"images": worst(got, want), "captions": worst(got_t, want_t)}


def export_checkpoint(checkpoint: Path, out: Path, name: str, version: str, probe: Path) -> dict:
    import torch
    from encoders import ClipImage, ClipText
    from evaluate import OrtBundle
    from export import OPSET, _export, verify
    from transformers import CLIPModel

    # Eager attention exports to plain ONNX operators and honours the padding mask.
    model = CLIPModel.from_pretrained(str(checkpoint), attn_implementation="eager").eval()
    config = model.config
    dim = config.projection_dim
    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    tok = bare_tokenizer(checkpoint / "tokenizer.json", out / "tokenizer.json")
    image = image_settings(checkpoint, config)
    text = {"ids_input": "input_ids", "mask_input": "attention_mask", "output": "text_embeds",
            "max_tokens": int(config.text_config.max_position_embeddings), "pad_id": pad_id(tok, config)}
    image_mod, text_mod = ClipImage(model).eval(), ClipText(model).eval()
    size = image["size"]
    eos = text["pad_id"]
    dummy_ids = torch.tensor([[0, 5, 6, eos, eos], [0, 7, 8, 9, eos]], dtype=torch.long)
    dummy_mask = torch.tensor([[1, 1, 1, 1, 0], [1, 1, 1, 1, 1]], dtype=torch.long)
    _export(image_mod, (torch.zeros(2, 3, size, size),), out / "image.onnx", ["pixel_values"], "image_embeds",
            False, dim)
    _export(text_mod, (dummy_ids, dummy_mask), out / "text.onnx", ["input_ids", "attention_mask"], "text_embeds",
            True, dim)
    (out / "bundle.toml").write_text(bundle_toml(name, version, image, text, dim))

    bundle = OrtBundle(out)
    differences = verify(bundle, image_mod, text_mod, probe)
    worst = cosines(bundle, image_mod, text_mod, probe)
    if min(worst.values()) < MIN_COSINE:
        raise SystemExit(f"onnxruntime and PyTorch disagree: smallest cosines {worst} (< {MIN_COSINE})")
    files = ["bundle.toml", "image.onnx", "text.onnx", "tokenizer.json"]
    card = {
        "bundle": name,
        "about": f"exported by tools/clip_export.py from {checkpoint.name}",
        "architecture": {"architecture": "transformers CLIPModel", "parameters": sum(p.numel() for p in model.parameters()),
                         "config": config.to_dict()},
        "packages": versions(),
        "onnx": {"opset": OPSET, "exporter": "torch.onnx legacy (dynamo=False)",
                 "max_abs_diff_vs_pytorch": differences, "min_cosine_vs_pytorch": worst},
        "files": {f: {"sha256": sha256(out / f), "bytes": (out / f).stat().st_size} for f in files},
    }
    (out / "card.json").write_text(json.dumps(card, indent=2, default=str) + "\n")
    return card


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("checkpoint", type=Path, help="folder of CLIPModel.save_pretrained, with tokenizer.json")
    ap.add_argument("out", type=Path, help="bundle folder to write (replaced)")
    ap.add_argument("--name", default=None, help="model name in bundle.toml (default: the output folder's name)")
    ap.add_argument("--version", default="v1")
    ap.add_argument("--probe", type=Path, default=HERE.parent / "fixtures" / "probe" / "probe.jsonl")
    ap.add_argument("--threads", type=int, default=2, help="PyTorch threads")
    args = ap.parse_args()
    import torch

    torch.set_num_threads(args.threads)
    card = export_checkpoint(args.checkpoint, args.out, args.name or args.out.name, args.version, args.probe)
    print(json.dumps({"bundle": str(args.out), "parameters": card["architecture"]["parameters"], **card["onnx"]},
                     indent=2))


if __name__ == "__main__":
    main()
