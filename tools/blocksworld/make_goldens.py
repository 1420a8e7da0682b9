"""Write `fixtures/golden/<bundle>/`: preprocessed inputs and PyTorch embeddings.

    python tools/blocksworld/make_goldens.py blocks-v1     # or blocks-v2, clip-tiny

For every golden image: the float32 tensor Pillow + numpy make from the file
per docs/bundles.md (intake.py), saved raw (C order, little endian) next to
golden.json, and the PyTorch embedding of that tensor. For every golden text:
the token ids and mask before padding, whether it was truncated, and the
PyTorch embedding. befit's tests check their own decode/resize/tokenise
against these, and their ONNX runs against the embeddings.

The texts pick the awkward cases on purpose: a caption longer than max_tokens,
upper case and punctuation, a word the vocabulary lacks.
"""

from __future__ import annotations

import argparse
import json
import os
from pathlib import Path

import numpy as np
import torch
from tokenizers import Tokenizer

from evaluate import OrtBundle, read_rows
from intake import encode, image_tensor, pad

PROBE = Path("fixtures/probe")

LONG = (
    "three pieces on the table: a big red circle to the left of a small blue ring, "
    "a little green cross above a large yellow square, and a small purple triangle "
    "below the big orange hoop, all of them lying on an old wooden table"
)
SHOUTING = "A BIG Red Circle, LEFT of the little blue RING!!"
UNKNOWN = "a large red zebra to the left of a small blue ring"


def contrast_of(row: dict, change: str) -> str:
    return next(c["caption"] for c in row["contrasts"] if c["changed"] == change)


def golden_inputs(name: str) -> tuple[list[Path], list[str]]:
    rows = read_rows(PROBE / "probe.jsonl")
    large = read_rows(PROBE / "large.jsonl")
    if name == "clip-tiny":
        images = [PROBE / rows[0]["image"], PROBE / large[1]["image"], PROBE / large[4]["image"]]
        texts = [rows[0]["captions"][0], rows[0]["captions"][1], contrast_of(rows[0], "relation"),
                 large[1]["captions"][0], large[4]["captions"][2], LONG, SHOUTING, UNKNOWN]
        return images, texts
    images = [PROBE / r["image"] for r in rows[:8]]
    images += [PROBE / large[0]["image"], PROBE / large[4]["image"], PROBE / "odd/alpha.png", PROBE / "odd/grey.png"]
    texts = [rows[i]["captions"][i % 5] for i in range(6)]
    texts += [contrast_of(rows[0], "relation"), contrast_of(rows[1], "count"), large[4]["captions"][0]]
    texts += [LONG, SHOUTING, UNKNOWN]
    return images, texts


def torch_towers(name: str, source: Path):
    if name == "clip-tiny":
        from encoders import ClipImage, ClipText
        from train_clip import load

        model, _ = load(source)
        return ClipImage(model).eval(), ClipText(model).eval()
    from train import load

    image_enc, text_enc, _ = load(source)
    return image_enc, text_enc


def floats(v: np.ndarray) -> list[float]:
    return [float(x) for x in np.asarray(v, dtype=np.float32)]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("name", choices=["blocks-v1", "blocks-v2", "clip-tiny"])
    ap.add_argument("--source", type=Path, default=None, help="default .cache/blocksworld/<name>")
    args = ap.parse_args()
    torch.set_num_threads(2)
    source = args.source or Path(".cache/blocksworld") / args.name
    bundle_dir = Path("fixtures/models") / args.name
    out = Path("fixtures/golden") / args.name
    out.mkdir(parents=True, exist_ok=True)
    for old in out.glob("*.f32"):
        old.unlink()
    # The bundle as exported gives the preprocessing settings and tokenizer;
    # the embeddings come from PyTorch, independent of the ONNX graphs.
    bundle = OrtBundle(bundle_dir)
    tokenizer = Tokenizer.from_file(str(bundle_dir / bundle.config["text"]["tokenizer"]))
    image_tower, text_tower = torch_towers(args.name, source)
    images, texts = golden_inputs(args.name)

    golden = {"bundle": args.name, "dimension": bundle.config["model"]["dimension"], "images": [], "texts": []}
    for k, path in enumerate(images):
        x = image_tensor(path, bundle.image_spec)
        name = f"image-{k:02d}.f32"
        x.astype("<f4").tofile(out / name)
        with torch.no_grad():
            v = image_tower(torch.from_numpy(x[None]))[0].numpy()
        golden["images"].append({"file": os.path.relpath(path, out), "tensor": name, "shape": list(x.shape),
                                 "embedding": floats(v)})
    for text, enc in zip(texts, encode(tokenizer, texts, bundle.text_spec)):
        ids, mask = pad([enc], bundle.text_spec)
        with torch.no_grad():
            v = text_tower(torch.from_numpy(ids), torch.from_numpy(mask))[0].numpy()
        golden["texts"].append({"text": text, "ids": enc.ids, "mask": [1] * len(enc.ids), "truncated": enc.truncated,
                                "embedding": floats(v)})
    assert any(t["truncated"] for t in golden["texts"]), "no golden text reaches max_tokens"
    (out / "golden.json").write_text(json.dumps(golden, indent=1) + "\n")
    print(f"{args.name}: {len(golden['images'])} images, {len(golden['texts'])} texts -> {out}")


if __name__ == "__main__":
    main()
