"""Train `clip-tiny`: a small randomly initialised `transformers` CLIPModel.

    python tools/blocksworld/train_clip.py

Writes `.cache/blocksworld/clip-tiny/` (`model.pt`, `tokenizer.json`,
`train.json`). The point of this bundle is the standard CLIP layout in befit
(224x224 `pixel_values`, causal text transformer pooled at the end token,
`input_ids` + `attention_mask`, shorter-side resize with centre crop, CLIP's
mean/std), not its accuracy, so it trains for a couple of minutes with CLIP's
own symmetric contrastive loss.

Training images are the 64x64 renders brought to 224x224 by exactly the
bundle's preprocessing (intake.py), so the model sees what befit will feed it.
No weights come from anywhere: the model is built from a `CLIPConfig`.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import numpy as np
import torch
from transformers import CLIPConfig, CLIPModel

from captions import contrasts, render, sample_spec, true_captions
from intake import ImageSpec, resize
from render import render_scene
from vocabulary import BOS, EOS, bpe
from world import sample_scene

SEED = 3
MEAN = (0.48145466, 0.4578275, 0.40821073)
STD = (0.26862954, 0.26130258, 0.27577711)
SIZE = 224
MAX_TOKENS = 32
DIM = 64
POOL = 3000
BATCH = 64
MINUTES = 2.5
LR = 1e-3

SPEC = ImageSpec(SIZE, "shorter-then-crop", "bicubic", MEAN, STD)


def config(vocab: int, bos: int, eos: int) -> CLIPConfig:
    text = dict(vocab_size=vocab, hidden_size=64, intermediate_size=128, num_hidden_layers=2,
                num_attention_heads=2, max_position_embeddings=MAX_TOKENS, bos_token_id=bos,
                eos_token_id=eos, pad_token_id=eos)
    vision = dict(image_size=SIZE, patch_size=32, hidden_size=64, intermediate_size=128,
                  num_hidden_layers=2, num_attention_heads=2)
    return CLIPConfig(text_config=text, vision_config=vision, projection_dim=DIM)


def build(cfg: dict) -> CLIPModel:
    # Eager attention exports to plain ONNX ops and honours the padding mask.
    return CLIPModel._from_config(CLIPConfig(**cfg), attn_implementation="eager")


def to_input(images: np.ndarray) -> torch.Tensor:
    x = torch.from_numpy(images).float().div_(255.0)
    x = (x - torch.tensor(MEAN)) / torch.tensor(STD)
    return x.permute(0, 3, 1, 2).contiguous()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=Path(".cache/blocksworld/clip-tiny"))
    ap.add_argument("--minutes", type=float, default=MINUTES)
    args = ap.parse_args()
    torch.set_num_threads(2)
    torch.manual_seed(SEED)
    out = args.out
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.time()
    corpus = []
    for i in range(3000):
        scene = sample_scene(SEED, i)
        rng = np.random.default_rng([SEED, i, 1])
        specs = true_captions(scene, rng)
        corpus += [render(s) for s in specs] + [render(c) for c, _, _ in contrasts(specs, scene, rng)]
    tokenizer = bpe(corpus)
    tokenizer.save(str(out / "tokenizer.json"))
    bos, eos = tokenizer.token_to_id(BOS), tokenizer.token_to_id(EOS)
    cfg = config(tokenizer.get_vocab_size(), bos, eos).to_dict()
    model = build(cfg)
    scenes = [sample_scene(SEED, 10_000 + i) for i in range(POOL)]
    images = np.stack([np.asarray(resize(render_scene(s), SPEC)) for s in scenes])
    t_data = time.time() - t0
    print(f"clip-tiny: vocabulary {tokenizer.get_vocab_size()}, pool {POOL} in {t_data:.0f}s", flush=True)

    tokenizer.enable_truncation(MAX_TOKENS)
    opt = torch.optim.AdamW(model.parameters(), lr=LR, weight_decay=0.05)
    rng = np.random.default_rng([SEED, 99])
    model.train()
    curve = []
    t1 = time.time()
    step = 0
    while time.time() - t1 < 60 * args.minutes:
        progress = (time.time() - t1) / (60 * args.minutes)
        for g in opt.param_groups:
            g["lr"] = LR * min(1.0, (step + 1) / 30) * (1 - 0.9 * progress)
        idx = rng.choice(POOL, size=BATCH, replace=False)
        enc = tokenizer.encode_batch([render(sample_spec(scenes[i], rng)) for i in idx])
        length = max(len(e.ids) for e in enc)
        ids = torch.full((BATCH, length), eos, dtype=torch.long)
        mask = torch.zeros((BATCH, length), dtype=torch.long)
        for k, e in enumerate(enc):
            ids[k, : len(e.ids)] = torch.tensor(e.ids)
            mask[k, : len(e.ids)] = 1
        loss = model(input_ids=ids, attention_mask=mask, pixel_values=to_input(images[idx]), return_loss=True).loss
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
        if step % 20 == 0:
            curve.append({"step": step, "loss": round(loss.item(), 4), "seconds": round(time.time() - t1, 1)})
            print(f"step {step:4d} loss {loss.item():.4f} {time.time() - t1:.0f}s", flush=True)
        step += 1
    t_train = time.time() - t1
    settings = {"seed": SEED, "image_size": SIZE, "mean": MEAN, "std": STD, "max_tokens": MAX_TOKENS,
                "pad_id": eos, "dim": DIM, "config": cfg}
    torch.save({"model": model.state_dict(), "settings": settings}, out / "model.pt")
    info = {
        **{k: v for k, v in settings.items() if k != "config"},
        "loss": "CLIP symmetric cross-entropy over the batch (learned temperature)",
        "optimizer": f"AdamW lr {LR} weight decay 0.05, linear warm-up 30 steps, linear decay to 10% over the budget",
        "batch": BATCH,
        "pool": POOL,
        "steps_done": step,
        "minutes": args.minutes,
        "seconds_data": round(t_data, 1),
        "seconds_train": round(t_train, 1),
        "threads": torch.get_num_threads(),
        "curve": curve,
    }
    (out / "train.json").write_text(json.dumps(info, indent=2, default=str))
    print(f"clip-tiny: {step} steps in {t_train:.0f}s", flush=True)


def load(folder: Path) -> tuple[CLIPModel, dict]:
    """The trained model (eval mode) and its settings."""
    ck = torch.load(folder / "model.pt", weights_only=False)
    model = build(ck["settings"]["config"])
    model.load_state_dict(ck["model"])
    return model.eval(), ck["settings"]


if __name__ == "__main__":
    main()
