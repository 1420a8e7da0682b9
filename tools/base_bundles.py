"""Base-size bundles for benchmarks: a ViT-B/32-size CLIP with seeded random weights, fp32 and int8.

    python tools/base_bundles.py [--out .cache/bundles]

No weights can be downloaded here, so the sizes are real and the weights are not: a
`CLIPConfig` of ViT-B/32's shape (vision: 224 px, 32 px patches, width 768, 12 layers, 12
heads; text: 49,408 tokens, width 512, 12 layers, 8 heads, 77 positions; 512-d shared
space; about 151M parameters) with `transformers`' own random initialisation under a fixed
seed. Its tokenizer is clip-tiny's (blocks captions; the ids fit the larger vocabulary).
Speed depends on the shapes, not the values, so the figures hold for a trained model of the
same shape; what quantising does to the reward is only indicative (random weights spread
cosines less than trained ones).

Writes OUT/base-checkpoint (the framework model, as `save_pretrained` does), OUT/base-fp32
(by tools/clip_export.py, checked against PyTorch) and OUT/base-int8: onnxruntime's
quantisation of both towers. Dynamic (weights int8, activations quantised per batch at run
time) and static (activations' ranges calibrated once on blocks probe images and captions,
QDQ) are both made and scored by how well their cosines of probe pairs agree with fp32's
(Pearson r, worst absolute difference); the better one becomes base-int8, the scores go to
OUT/quantisation.json.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE / "blocksworld"))

import clip_export  # noqa: E402

SEED = 20261203
PROBE = ROOT / "fixtures" / "probe" / "probe.jsonl"
TOKENIZER = ROOT / "fixtures" / "models" / "clip-tiny" / "tokenizer.json"
CALIBRATION_ROWS = 24
SCORE_ROWS = 64


def vit_b32_config(bos: int, eos: int):
    from transformers import CLIPConfig

    text = dict(vocab_size=49408, hidden_size=512, intermediate_size=2048, num_hidden_layers=12,
                num_attention_heads=8, max_position_embeddings=77, bos_token_id=bos, eos_token_id=eos,
                pad_token_id=eos)
    vision = dict(image_size=224, patch_size=32, hidden_size=768, intermediate_size=3072,
                  num_hidden_layers=12, num_attention_heads=12)
    return CLIPConfig(text_config=text, vision_config=vision, projection_dim=512)


def checkpoint(out: Path) -> Path:
    import torch
    from transformers import CLIPModel

    tok = json.loads(TOKENIZER.read_text())
    ids = {t["content"]: t["id"] for t in tok["added_tokens"]}
    torch.manual_seed(SEED)
    model = CLIPModel._from_config(vit_b32_config(ids["<|startoftext|>"], ids["<|endoftext|>"]),
                                   attn_implementation="eager").eval()
    folder = out / "base-checkpoint"
    if folder.exists():
        shutil.rmtree(folder)
    model.save_pretrained(str(folder))
    shutil.copyfile(TOKENIZER, folder / "tokenizer.json")
    print(f"base checkpoint: {sum(p.numel() for p in model.parameters()) / 1e6:.1f}M parameters", flush=True)
    return folder


def probe_inputs(bundle, rows: list[dict]):
    """Pixel tensors and padded token ids of `rows`, as befit prepares them."""
    from evaluate import all_texts
    from intake import encode, image_tensor, pad

    x = np.stack([image_tensor(PROBE.parent / r["image"], bundle.image_spec) for r in rows]).astype(np.float32)
    texts = all_texts(rows)
    ids, mask = pad(encode(bundle.tokenizer, texts, bundle.text_spec), bundle.text_spec)
    return x, ids, mask


class Feed:
    """onnxruntime's calibration reader: one input dict at a time."""

    def __init__(self, batches: list[dict]):
        self.batches = iter(batches)

    def get_next(self):
        return next(self.batches, None)


def quantise(fp32: Path, out: Path, kind: str, calibration) -> None:
    from onnxruntime.quantization import QuantFormat, QuantType, quantize_dynamic, quantize_static

    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    for f in ("tokenizer.json",):
        shutil.copyfile(fp32 / f, out / f)
    toml = (fp32 / "bundle.toml").read_text().replace('version = "fp32"', f'version = "int8-{kind}"')
    (out / "bundle.toml").write_text(toml)
    x, ids, mask = calibration
    for tower, feeds in (("image", [{"pixel_values": x[i : i + 4]} for i in range(0, len(x), 4)]),
                         ("text", [{"input_ids": ids[i : i + 16], "attention_mask": mask[i : i + 16]}
                                   for i in range(0, len(ids), 16)])):
        source, target = fp32 / f"{tower}.onnx", out / f"{tower}.onnx"
        if kind == "dynamic":
            quantize_dynamic(str(source), str(target), weight_type=QuantType.QInt8)
        else:
            quantize_static(str(source), str(target), Feed(feeds), quant_format=QuantFormat.QDQ,
                            activation_type=QuantType.QInt8, weight_type=QuantType.QInt8)


def pair_cosines(bundle_dir: Path, rows: list[dict]) -> np.ndarray:
    """Cosine of every probe image with every caption of its row and its contrasts."""
    from evaluate import OrtBundle

    bundle = OrtBundle(bundle_dir)
    x, ids, mask = probe_inputs(bundle, rows)
    images = bundle.embed_tensors(x)
    texts = bundle.embed_ids(ids, mask)
    return (images @ texts.T).ravel()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=ROOT / ".cache" / "bundles")
    ap.add_argument("--threads", type=int, default=2)
    args = ap.parse_args()
    import torch
    from evaluate import OrtBundle, read_rows

    torch.set_num_threads(args.threads)
    args.out.mkdir(parents=True, exist_ok=True)
    t0 = time.time()
    folder = checkpoint(args.out)
    fp32 = args.out / "base-fp32"
    card = clip_export.export_checkpoint(folder, fp32, "base", "fp32", PROBE)
    print(f"base-fp32: exported and checked in {time.time() - t0:.0f}s: {card['onnx']['min_cosine_vs_pytorch']}",
          flush=True)
    rows = read_rows(PROBE)
    calibration = probe_inputs(OrtBundle(fp32), rows[-CALIBRATION_ROWS:])
    scored = rows[:SCORE_ROWS]
    reference = pair_cosines(fp32, scored)
    scores = {}
    for kind in ("dynamic", "static"):
        t = time.time()
        quantise(fp32, args.out / f"base-int8-{kind}", kind, calibration)
        got = pair_cosines(args.out / f"base-int8-{kind}", scored)
        scores[kind] = {"pearson_r": float(np.corrcoef(reference, got)[0, 1]),
                        "max_abs_cosine_difference": float(np.abs(reference - got).max()),
                        "seconds": round(time.time() - t, 1)}
        print(f"int8 {kind}: {scores[kind]}", flush=True)
    best = max(scores, key=lambda k: scores[k]["pearson_r"])
    int8 = args.out / "base-int8"
    if int8.exists():
        shutil.rmtree(int8)
    shutil.copytree(args.out / f"base-int8-{best}", int8)
    (int8 / "bundle.toml").write_text((int8 / "bundle.toml").read_text().replace(f"int8-{best}", "int8"))
    summary = {"parameters": card["architecture"]["parameters"], "chosen": best, "scores": scores,
               "pairs_scored": int(reference.size), "calibration_rows": CALIBRATION_ROWS,
               "fp32_vs_pytorch": card["onnx"]}
    (args.out / "quantisation.json").write_text(json.dumps(summary, indent=2) + "\n")
    print(f"base-int8 = {best}; bundles in {args.out} ({time.time() - t0:.0f}s)", flush=True)


if __name__ == "__main__":
    main()
