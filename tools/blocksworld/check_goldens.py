"""Check the bundles against their goldens with onnxruntime (numpy and Pillow; no torch).

    python tools/blocksworld/check_goldens.py            # every fixtures/golden/*
    python tools/blocksworld/check_goldens.py blocks-v1

For each golden image: the tensor Pillow makes now equals the stored tensor,
and the image graph run on the stored tensor gives the stored embedding. For
each golden text: the tokenizer gives the stored ids, mask and truncation, and
the text graph gives the stored embedding, alone and padded inside one batch
of all golden texts (the tokenizer part is skipped, with a note, when the
`tokenizers` package is not installed). A bundle with a fluency head
(`fluency.json` beside the goldens) also gets each text's probability from
its head, alone and padded in one batch, against PyTorch's. Embeddings must
agree within TOLERANCE (cosine space, after L2 normalisation). Exits non-zero
on the first bundle that fails.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import sys
from pathlib import Path

import numpy as np

from evaluate import OrtBundle
from intake import Encoded, encode, image_tensor, pad

TOLERANCE = 1e-4
# Probabilities (after the sigmoid), as befit's parity test holds them.
FLUENCY_TOLERANCE = 1e-5
# Pillow is deterministic on one version; across versions resampling may move
# a pixel by an ulp or so.
TENSOR_TOLERANCE = 1e-5


def unit(v: np.ndarray) -> np.ndarray:
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


def tokenizers_available() -> bool:
    return importlib.util.find_spec("tokenizers") is not None


def check(golden_dir: Path, models: Path) -> list[str]:
    golden = json.loads((golden_dir / "golden.json").read_text())
    bundle = OrtBundle(models / golden["bundle"])
    problems = []
    worst = 0.0
    tensors = []
    for g in golden["images"]:
        stored = np.fromfile(golden_dir / g["tensor"], dtype="<f4").reshape(g["shape"])
        tensors.append(stored)
        now = image_tensor(golden_dir / g["file"], bundle.image_spec)
        if now.shape != stored.shape or np.abs(now - stored).max() > TENSOR_TOLERANCE:
            problems.append(f"{g['file']}: preprocessing no longer gives {g['tensor']}")
        got = unit(bundle.embed_tensors(stored[None]))[0]
        diff = float(np.abs(got - np.asarray(g["embedding"], dtype=np.float32)).max())
        worst = max(worst, diff)
        if diff > TOLERANCE:
            problems.append(f"{g['file']}: image embedding differs by {diff:.2e}")
    batch = unit(bundle.embed_tensors(np.stack(tensors)))
    for g, got in zip(golden["images"], batch):
        diff = float(np.abs(got - np.asarray(g["embedding"], dtype=np.float32)).max())
        if diff > TOLERANCE:
            problems.append(f"{g['file']}: image embedding in a batch differs by {diff:.2e}")

    texts = [t["text"] for t in golden["texts"]]
    if tokenizers_available():
        for t, enc in zip(golden["texts"], encode(bundle.tokenizer, texts, bundle.text_spec)):
            if enc.ids != t["ids"] or enc.truncated != t["truncated"]:
                problems.append(f"{t['text']!r}: tokenizer gives {enc.ids} (truncated {enc.truncated})")
    else:
        print(f"{golden['bundle']}: tokenizers package missing, token ids taken as stored")
    for t in golden["texts"]:
        if t["mask"] != [1] * len(t["ids"]):
            problems.append(f"{t['text']!r}: stored mask is not all ones")
    stored = [Encoded(t["ids"], t["truncated"]) for t in golden["texts"]]
    ids, mask = pad(stored, bundle.text_spec)
    together = unit(bundle.embed_ids(ids, mask))
    for t, e, in_batch in zip(golden["texts"], stored, together):
        one_ids, one_mask = pad([e], bundle.text_spec)
        alone = unit(bundle.embed_ids(one_ids, one_mask))[0]
        want = np.asarray(t["embedding"], dtype=np.float32)
        for how, got in (("alone", alone), ("padded in a batch", in_batch)):
            diff = float(np.abs(got - want).max())
            worst = max(worst, diff)
            if diff > TOLERANCE:
                problems.append(f"{t['text']!r}: text embedding {how} differs by {diff:.2e}")
    print(f"{golden['bundle']}: {len(golden['images'])} images, {len(golden['texts'])} texts, "
          f"largest difference {worst:.1e}{'' if not problems else ', FAILED'}")
    if (golden_dir / "fluency.json").exists():
        problems += check_fluency(golden_dir / "fluency.json", bundle)
    return problems


def check_fluency(path: Path, bundle: OrtBundle) -> list[str]:
    """The fluency head (`[fluency]`) against PyTorch's probabilities, alone and padded in one batch."""
    import onnxruntime as ort

    golden = json.loads(path.read_text())
    spec = bundle.config.get("fluency")
    if spec is None:
        return [f"{path} exists but bundle.toml has no [fluency] section"]
    head = ort.InferenceSession(str(bundle.folder / spec["file"]), providers=["CPUExecutionProvider"])

    def run(encoded: list[Encoded]) -> np.ndarray:
        ids, mask = pad(encoded, bundle.text_spec)
        feeds = {spec["ids_input"]: ids}
        if spec.get("mask_input"):
            feeds[spec["mask_input"]] = mask
        return head.run([spec["output"]], feeds)[0]

    problems, worst = [], 0.0
    texts = [t["text"] for t in golden["texts"]]
    if tokenizers_available():
        for t, enc in zip(golden["texts"], encode(bundle.tokenizer, texts, bundle.text_spec)):
            if enc.ids != t["ids"]:
                problems.append(f"fluency {t['text']!r}: tokenizer gives {enc.ids}")
    stored = [Encoded(t["ids"], False) for t in golden["texts"]]
    together = run(stored)
    for t, e, in_batch in zip(golden["texts"], stored, together):
        for how, got in (("alone", run([e])[0]), ("padded in a batch", in_batch)):
            diff = abs(float(got) - t["probability"])
            worst = max(worst, diff)
            if diff > FLUENCY_TOLERANCE:
                problems.append(f"fluency {t['text']!r}: probability {how} differs by {diff:.2e}")
    print(f"{golden['bundle']}: fluency head, {len(texts)} texts, largest difference {worst:.1e}"
          f"{'' if not problems else ', FAILED'}")
    return problems


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("bundles", nargs="*", help="names under fixtures/golden (default: all)")
    ap.add_argument("--fixtures", type=Path, default=Path(__file__).resolve().parents[2] / "fixtures")
    args = ap.parse_args()
    root = args.fixtures / "golden"
    names = args.bundles or sorted(p.name for p in root.iterdir() if (p / "golden.json").exists())
    failed = False
    for name in names:
        for problem in check(root / name, args.fixtures / "models"):
            print(f"  {problem}")
            failed = True
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
