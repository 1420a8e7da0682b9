"""Held-out metrics of a bundle on the probe set (numpy + onnxruntime, no torch).

    python tools/blocksworld/evaluate.py fixtures/models/blocks-v1
    python tools/blocksworld/evaluate.py --table fixtures/models/blocks-v*   # cards as Markdown

Retrieval is over the probe's 1,000 images and their 5,000 captions. Different
scenes can share a caption text word for word (two single large red circles),
so hits are counted by text:
- image -> text, R@K: the K captions nearest the image (distinct texts) hold a
  text that is one of that image's own captions;
- text -> image, R@K: averaged over all 5,000 (image, caption) pairs, the K
  images nearest the caption hold an image that has that caption text.
Contrasts: each contrast caption against the true caption it was made from,
both scored against their image: mean cosines, and how often the true caption
scores higher (overall and per changed fact).
"""

from __future__ import annotations

import argparse
import json
import sys
import tomllib
from collections import defaultdict
from pathlib import Path

import numpy as np

from intake import ImageSpec, TextSpec, encode, image_tensor, pad

KS = (1, 5, 10)


def read_rows(jsonl: Path) -> list[dict]:
    return [json.loads(line) for line in jsonl.read_text().splitlines() if line.strip()]


def probe_metrics(rows: list[dict], image_vecs: np.ndarray, text_vec: dict[str, np.ndarray]) -> dict:
    """Metrics from unit image vectors (row order) and a unit vector per text."""
    texts = sorted({c for r in rows for c in r["captions"]})
    index = {t: i for i, t in enumerate(texts)}
    T = np.stack([text_vec[t] for t in texts])
    sims = image_vecs @ T.T  # [images, distinct texts]
    own = [{index[c] for c in r["captions"]} for r in rows]

    i2t = {k: 0 for k in KS}
    order = np.argsort(-sims, axis=1, kind="stable")[:, : max(KS)]
    for i, mine in enumerate(own):
        for k in KS:
            i2t[k] += bool(mine & set(order[i, :k].tolist()))
    holders = defaultdict(set)
    for i, mine in enumerate(own):
        for t in mine:
            holders[t].add(i)
    t2i = {k: 0 for k in KS}
    img_order = np.argsort(-sims, axis=0, kind="stable")[: max(KS), :]
    pairs = 0
    for r in rows:
        for c in r["captions"]:
            t = index[c]
            top = img_order[:, t].tolist()
            for k in KS:
                t2i[k] += bool(holders[t] & set(top[:k]))
            pairs += 1

    true_cos, false_cos = [], []
    wins: dict[str, list[bool]] = defaultdict(list)
    for i, r in enumerate(rows):
        v = image_vecs[i]
        for c in r["contrasts"]:
            a = float(v @ text_vec[r["captions"][c["from"]]])
            b = float(v @ text_vec[c["caption"]])
            true_cos.append(a)
            false_cos.append(b)
            wins[c["changed"]].append(a > b)
    all_wins = [w for ws in wins.values() for w in ws]
    r4 = lambda x: round(float(x), 4)  # noqa: E731
    return {
        "images": len(rows),
        "captions": pairs,
        "image_to_text": {f"R@{k}": r4(i2t[k] / len(rows)) for k in KS},
        "text_to_image": {f"R@{k}": r4(t2i[k] / pairs) for k in KS},
        "contrast": {
            "pairs": len(all_wins),
            "mean_cosine_true": r4(np.mean(true_cos)),
            "mean_cosine_contrast": r4(np.mean(false_cos)),
            "true_beats_contrast": r4(np.mean(all_wins)),
            "true_beats_contrast_by_change": {k: r4(np.mean(v)) for k, v in sorted(wins.items())},
            "pairs_by_change": {k: len(v) for k, v in sorted(wins.items())},
        },
    }


def all_texts(rows: list[dict]) -> list[str]:
    return sorted({c for r in rows for c in r["captions"]} | {c["caption"] for r in rows for c in r["contrasts"]})


class OrtBundle:
    """A bundle folder run with onnxruntime, preprocessing per intake.py."""

    def __init__(self, folder: Path):
        import onnxruntime as ort

        self.folder = Path(folder)
        self.config = tomllib.loads((self.folder / "bundle.toml").read_text())
        im, tx = self.config["image"], self.config["text"]
        self.image_spec = ImageSpec(im["size"], im["resize"], im["filter"], tuple(im["mean"]), tuple(im["std"]))
        self.text_spec = TextSpec(tx["max_tokens"], tx["pad_id"], tx.get("prefix", ""))
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = 2
        self.image = ort.InferenceSession(str(self.folder / im["file"]), opts, providers=["CPUExecutionProvider"])
        self.text = ort.InferenceSession(str(self.folder / tx["file"]), opts, providers=["CPUExecutionProvider"])
        self._tokenizer = None

    @property
    def tokenizer(self):
        """The bundle's `tokenizers.Tokenizer`, loaded on first use (so that
        graph-only checks run without the tokenizers package)."""
        if self._tokenizer is None:
            from tokenizers import Tokenizer

            self._tokenizer = Tokenizer.from_file(str(self.folder / self.config["text"]["tokenizer"]))
        return self._tokenizer

    def embed_tensors(self, x: np.ndarray) -> np.ndarray:
        im = self.config["image"]
        return self.image.run([im["output"]], {im["input"]: x})[0]

    def embed_images(self, paths: list[Path], batch: int = 64) -> np.ndarray:
        out = []
        for s in range(0, len(paths), batch):
            x = np.stack([image_tensor(p, self.image_spec) for p in paths[s : s + batch]])
            out.append(self.embed_tensors(x))
        return _unit(np.concatenate(out))

    def embed_ids(self, ids: np.ndarray, mask: np.ndarray) -> np.ndarray:
        tx = self.config["text"]
        feeds = {tx["ids_input"]: ids}
        if tx.get("mask_input"):
            feeds[tx["mask_input"]] = mask
        return self.text.run([tx["output"]], feeds)[0]

    def embed_texts(self, texts: list[str], batch: int = 256) -> np.ndarray:
        out = []
        for s in range(0, len(texts), batch):
            ids, mask = pad(encode(self.tokenizer, texts[s : s + batch], self.text_spec), self.text_spec)
            out.append(self.embed_ids(ids, mask))
        return _unit(np.concatenate(out))


def _unit(v: np.ndarray) -> np.ndarray:
    return v / np.linalg.norm(v, axis=1, keepdims=True)


def evaluate_bundle(folder: Path, probe: Path) -> dict:
    bundle = OrtBundle(folder)
    rows = read_rows(probe)
    images = bundle.embed_images([probe.parent / r["image"] for r in rows])
    texts = all_texts(rows)
    vecs = bundle.embed_texts(texts)
    return probe_metrics(rows, images, dict(zip(texts, vecs)))


def markdown_table(bundles: list[Path]) -> str:
    """The held-out metrics of bundles' card.json files as one Markdown table."""
    cards = [json.loads((b / "card.json").read_text()) for b in bundles]
    head = "| metric | " + " | ".join(c["bundle"] for c in cards) + " |"
    lines = [head, "|---" * (len(cards) + 1) + "|"]

    def add(label, get):
        lines.append(f"| {label} | " + " | ".join(get(c["held_out"]) for c in cards) + " |")

    for direction, label in (("image_to_text", "image -> text"), ("text_to_image", "text -> image")):
        for k in KS:
            add(f"{label} R@{k}", lambda h, d=direction, k=k: f"{h[d][f'R@{k}']:.3f}")
    add("mean cosine, true caption", lambda h: f"{h['contrast']['mean_cosine_true']:.3f}")
    add("mean cosine, contrast caption", lambda h: f"{h['contrast']['mean_cosine_contrast']:.3f}")
    add("true beats contrast, all", lambda h: f"{h['contrast']['true_beats_contrast']:.3f}")
    for change in ("colour", "shape", "size", "relation", "count"):
        add(f"true beats contrast, {change}", lambda h, c=change: f"{h['contrast']['true_beats_contrast_by_change'][c]:.3f}")
    lines.append("| training steps | " + " | ".join(str(c["training"].get("steps_done", "")) for c in cards) + " |")
    lines.append("| training wall clock, s | " + " | ".join(str(c["wall_clock_seconds"]["training"]) for c in cards) + " |")
    return "\n".join(lines)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("bundles", type=Path, nargs="+")
    ap.add_argument("--probe", type=Path, default=Path("fixtures/probe/probe.jsonl"))
    ap.add_argument("--table", action="store_true", help="print the cards' metrics as Markdown instead")
    args = ap.parse_args()
    if args.table:
        print(markdown_table(args.bundles))
        return
    for bundle in args.bundles:
        json.dump(evaluate_bundle(bundle, args.probe), sys.stdout, indent=2)
        print()


if __name__ == "__main__":
    main()
