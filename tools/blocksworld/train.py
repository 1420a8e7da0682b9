"""Train a blocks dual encoder with the VSE++ hinge loss on fresh scenes.

    python tools/blocksworld/train.py blocks-v1      # then blocks-v2

Writes `.cache/blocksworld/<name>/` (not committed): `model.pt` (weights and
settings), `tokenizer.json` and `train.json` (settings, timings, loss curve).
`export.py` turns that into a bundle.

Data: a pool of scenes rendered from the preset's seed (the probe uses other
seeds); every step pairs each image with a freshly drawn true caption, so the
text side never repeats exactly.

Loss (Faghri et al. 2018, VSE++): for a batch of matching image/caption pairs
with cosine matrix S, each image's hinge against every other caption,
`max(0, margin + S[i, j] - S[i, i])`, and each caption's against every other
image. Up to `sum_until` of the run the hinges are summed over negatives
(warm-up: all negatives give gradient while the space forms), then only the
largest counts (hardest in-batch negative). Pairs whose scenes have the same
facts are not negatives: their captions are true of each other.

Additions, each because the plain loss did not learn something in budget:
- `contrast_negatives`: each image also meets one caption made from its own
  true caption by changing one fact (captions.contrast), in its own hinge
  term (inside the max it would rarely be the hardest early on and give no
  gradient). In-batch negatives almost never differ from the truth by one
  relation word or shape; the changed fact is drawn by CHANGE_WEIGHTS.
- Every training image is flipped left-right and top-bottom at random, its
  facts and captions following.
- `place_weight`, `text_place_weight`: the symmetric point (no position in
  any vector, "left of" and "right of" embedded alike) is a saddle that
  ranking losses leave very slowly, because each push towards "left" from one
  image is undone by the mirror-placed twin of another (measured: after 2,000
  steps relation contrasts were still at chance, with cosine 0.998 between
  the two captions). A linear head (encoders.PlaceHead, training only, not
  exported) must read from image vectors which colours and shapes are there,
  where and whether large; and from caption vectors the colours and shapes an
  inventory caption lists, the sizes it states, and for "A left of B" A's
  colour and shape left of B's by at least 0.2 of the side. The head is
  shared, so both towers write places into the same directions of the shared
  space, and cosine then rewards agreeing places.

The run ends at whichever budget runs out first: a step cap (`steps`), a
compute budget of `minutes` on 2 cores (process CPU time, 2 x minutes), and a
wall-clock guard (`wall_minutes`). The machine is shared with other builds, so
wall-clock speed varies several-fold while CPU time per step varies much less.
Learning rate and the sum -> max switch follow the progress, the largest of
the three fractions used, so a cut-short run still anneals properly. A rerun
from the same seed repeats the data and the initialisation exactly and the
number of steps roughly; its metrics agree within noise (the card records the
steps actually done).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import time
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import numpy as np

# Waiting threads sleep instead of spinning: on a machine shared with builds a
# spinning thread burns the core its partner needs, and steps get 5x slower.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
import torch  # noqa: E402
import torch.nn.functional as F  # noqa: E402

from captions import CHANGES, contrast, contrasts, render, sample_spec, true_captions
from encoders import ImageEncoder, PlaceHead, TextEncoder
from render import render_scene
from vocabulary import word_level
from world import COLOURS, SHAPES, mirrored, sample_scene

# Channel statistics of rendered scenes (2,000 scenes of seed 1, rounded):
# the table's browns and greys dominate, hence the small std.
MEAN = (0.49, 0.45, 0.39)
STD = (0.11, 0.09, 0.10)
# Relative odds of the fact a training contrast changes: colour, size and
# count are learned from in-batch negatives anyway, relations and shapes not.
CHANGE_WEIGHTS = {"colour": 1.0, "size": 1.0, "count": 1.0, "shape": 2.0, "relation": 4.0}
MAX_TOKENS = 32
PAD_ID = 0
DIM = 64


@dataclass(frozen=True)
class Preset:
    seed: int
    width: int  # CNN base channels
    text_hidden: int
    embed: int
    steps: int  # step cap
    minutes: float  # compute budget of the training loop, in minutes of 2 cores
    wall_minutes: float  # wall-clock guard
    sum_until: float  # progress up to which hinges are summed, then max
    batch: int
    lr: float
    weight_decay: float
    pool: int  # rendered training scenes
    margin: float = 0.2
    schedule: str = "cosine"
    contrast_negatives: bool = True
    place_weight: float = 1.0
    text_place_weight: float = 1.0


PRESETS = {
    "blocks-v1": Preset(seed=1, width=24, text_hidden=128, embed=64, steps=3000, minutes=9.0, wall_minutes=11.0,
                        sum_until=0.15, batch=128, lr=3e-3, weight_decay=1e-4, pool=20000, schedule="onecycle"),
    "blocks-v2": Preset(seed=2, width=32, text_hidden=160, embed=96, steps=3000, minutes=9.0, wall_minutes=11.0,
                        sum_until=0.15, batch=112, lr=3e-3, weight_decay=5e-5, pool=20000, schedule="onecycle"),
}


def caption_corpus(seed: int, scenes: int = 4000) -> list[str]:
    """Captions and contrasts of a stream, to learn the vocabulary from."""
    out = []
    for i in range(scenes):
        scene = sample_scene(seed, i)
        rng = np.random.default_rng([seed, i, 1])
        specs = true_captions(scene, rng)
        out += [render(s) for s in specs] + [render(c) for c, _, _ in contrasts(specs, scene, rng)]
    return out


def render_pool(seed: int, n: int) -> tuple[np.ndarray, list, np.ndarray]:
    """uint8 [n, 64, 64, 3] images, their scenes, and an id per distinct fact set."""
    images = np.empty((n, 64, 64, 3), dtype=np.uint8)
    scenes, sigs, sig_ids = [], {}, np.empty(n, dtype=np.int64)
    for i in range(n):
        s = sample_scene(seed, i)
        images[i] = np.asarray(render_scene(s))
        scenes.append(s)
        sig_ids[i] = sigs.setdefault(s.signature(), len(sigs))
    return images, scenes, sig_ids


def place_targets(scenes: list) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Per scene and colour/shape kind: presence [n, kinds], centre [n, kinds, 2], large [n, kinds].

    Two pieces never share colour and shape, but may share one of them; the
    kind then holds the last piece's centre and size (rare, and only noise).
    """
    kinds = list(COLOURS) + list(SHAPES)
    present = torch.zeros(len(scenes), len(kinds))
    centre = torch.zeros(len(scenes), len(kinds), 2)
    large = torch.zeros(len(scenes), len(kinds))
    for n, scene in enumerate(scenes):
        for piece in scene.pieces:
            for k in (kinds.index(piece.colour), len(COLOURS) + SHAPES.index(piece.shape)):
                present[n, k] = 1.0
                centre[n, k] = torch.tensor([piece.x, piece.y])
                large[n, k] = float(piece.size == "large")
    return present, centre, large


def place_loss(pred: torch.Tensor, present: torch.Tensor, centre: torch.Tensor, large: torch.Tensor) -> torch.Tensor:
    """Presence cross-entropy, plus centre error and size cross-entropy where present."""
    bce = F.binary_cross_entropy_with_logits(pred[..., 0], present)
    n = present.sum().clamp(min=1.0)
    err = ((pred[..., 1:3] - centre) ** 2).sum(-1)
    size = F.binary_cross_entropy_with_logits(pred[..., 3], large, reduction="none")
    # x10: centre errors start near 0.1, the cross-entropies near 0.7.
    return bce + 10.0 * (err * present).sum() / n + (size * present).sum() / n


AXIS = {"left of": (0, 1.0), "right of": (0, -1.0), "above": (1, 1.0), "below": (1, -1.0)}


def text_place_loss(pred: torch.Tensor, specs: list) -> torch.Tensor:
    """Place head on caption vectors: listed kinds present, stated relation in order.

    `pred` is the head's output [n, kinds, 3] for the true captions `specs`.
    """
    kinds = list(COLOURS) + list(SHAPES)

    def of(m):
        return [kinds.index(m.colour), len(COLOURS) + SHAPES.index(m.shape)]

    losses = []
    rows, cols, large = [], [], []
    for k, s in enumerate(specs):
        for m in s.mentions:
            for c in of(m):
                rows.append(k)
                cols.append(c)
                large.append(float(m.size == "large"))
    losses.append(F.binary_cross_entropy_with_logits(pred[torch.tensor(rows), torch.tensor(cols), 3], torch.tensor(large)))
    inventory = [k for k, s in enumerate(specs) if s.relation is None]
    if inventory:
        present = torch.zeros(len(inventory), len(kinds))
        for row, k in enumerate(inventory):
            for m in specs[k].mentions:
                present[row, of(m)] = 1.0
        losses.append(F.binary_cross_entropy_with_logits(pred[inventory, :, 0], present))
    rows, a_kinds, b_kinds, axes, signs = [], [], [], [], []
    for k, s in enumerate(specs):
        if s.relation is None:
            continue
        subject, rel, obj = s.relation
        axis, sign = AXIS[rel]
        for a, b in zip(of(s.mentions[subject]), of(s.mentions[obj])):
            rows.append(k)
            a_kinds.append(a)
            b_kinds.append(b)
            axes.append(1 + axis)
            signs.append(sign)
    if rows:
        r, ax = torch.tensor(rows), torch.tensor(axes)
        gap = pred[r, torch.tensor(b_kinds), ax] - pred[r, torch.tensor(a_kinds), ax]
        losses.append((0.2 - torch.tensor(signs) * gap).clamp(min=0).mean() * 5.0)
    return sum(losses) if losses else pred.sum() * 0.0


def flip(image: np.ndarray, horizontal: bool, vertical: bool) -> np.ndarray:
    """An [h, w, 3] picture mirrored left-right and/or top-bottom."""
    if horizontal:
        image = image[:, ::-1]
    if vertical:
        image = image[::-1]
    return image


def to_input(images: np.ndarray) -> torch.Tensor:
    x = torch.from_numpy(images).float().div_(255.0)
    x = (x - torch.tensor(MEAN)) / torch.tensor(STD)
    return x.permute(0, 3, 1, 2).contiguous()


def vse_loss(
    img: torch.Tensor,
    txt: torch.Tensor,
    same: torch.Tensor,
    margin: float,
    hardest: bool,
    own_contrast: torch.Tensor | None = None,
) -> torch.Tensor:
    """Bidirectional hinge ranking loss; `same[i, j]` marks pairs that are not
    negatives; `own_contrast[i]` is a false caption of image i (an extra
    negative with its own hinge)."""
    s = img @ txt.T
    d = s.diag()
    cost_txt = (margin + s - d[:, None]).clamp(min=0).masked_fill(same, 0)
    cost_img = (margin + s - d[None, :]).clamp(min=0).masked_fill(same, 0)
    if hardest:
        loss = cost_txt.max(dim=1).values + cost_img.max(dim=0).values
    else:
        loss = cost_txt.sum(dim=1) + cost_img.sum(dim=0)
    if own_contrast is not None:
        c = (img * own_contrast).sum(dim=1)
        loss = loss + (margin + c - d).clamp(min=0)
    return loss.mean()


def tensors(tokenizer, texts: list[str]) -> tuple[torch.Tensor, torch.Tensor]:
    """Right-padded ids and mask of a batch of captions."""
    enc = tokenizer.encode_batch(texts)
    length = max(len(e.ids) for e in enc)
    ids = torch.full((len(texts), length), PAD_ID, dtype=torch.long)
    mask = torch.zeros((len(texts), length), dtype=torch.long)
    for k, e in enumerate(enc):
        ids[k, : len(e.ids)] = torch.tensor(e.ids)
        mask[k, : len(e.ids)] = 1
    return ids, mask


def false_twin(spec, scene, rng: np.random.Generator):
    """`spec` with one fact changed, drawn by CHANGE_WEIGHTS among those it allows."""
    twins = {c: contrast(spec, scene, c, rng) for c in CHANGES}
    twins = {c: t for c, t in twins.items() if t is not None}
    names = sorted(twins)
    w = np.array([CHANGE_WEIGHTS[c] for c in names])
    return twins[names[int(rng.choice(len(names), p=w / w.sum()))]]


def lr_at(p: Preset, progress: float) -> float:
    """Learning rate at `progress` (0..1) of the run."""
    if p.schedule == "cosine":
        warm = 0.04
        if progress < warm:
            return p.lr * (0.05 + 0.95 * progress / warm)
        return p.lr * 0.5 * (1 + math.cos(math.pi * min(1.0, (progress - warm) / (1 - warm))))
    # One-cycle: ramp up over the first 30%, then cosine down to 1% of peak.
    up = 0.3
    if progress < up:
        return p.lr * (0.1 + 0.9 * progress / up)
    t = min(1.0, (progress - up) / (1 - up))
    return p.lr * (0.01 + 0.99 * 0.5 * (1 + math.cos(math.pi * t)))


def save(out: Path, name: str, image_enc, text_enc, p: Preset, steps_done: int, tokenizer) -> dict:
    """Write model.pt (also midway, so a long run can be looked at); returns the settings."""
    settings = {"name": name, "preset": asdict(p), "steps_done": steps_done, "mean": MEAN, "std": STD,
                "max_tokens": MAX_TOKENS, "pad_id": PAD_ID, "dim": DIM, "vocab": tokenizer.get_vocab_size()}
    torch.save({"image": image_enc.state_dict(), "text": text_enc.state_dict(), "settings": settings}, out / "model.pt")
    return settings


def train(name: str, p: Preset, out: Path) -> None:
    torch.set_num_threads(2)
    torch.manual_seed(p.seed)
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.time()
    tokenizer = word_level(caption_corpus(p.seed))
    tokenizer.save(str(out / "tokenizer.json"))
    images, scenes, sig_ids = render_pool(p.seed, p.pool)
    t_data = time.time() - t0
    print(f"{name}: vocabulary {tokenizer.get_vocab_size()}, pool {p.pool} rendered in {t_data:.0f}s", flush=True)

    image_enc = ImageEncoder(width=p.width, dim=DIM)
    text_enc = TextEncoder(tokenizer.get_vocab_size(), embed=p.embed, hidden=p.text_hidden, dim=DIM, pad_id=PAD_ID)
    place_head = PlaceHead(DIM, len(COLOURS) + len(SHAPES))
    params = list(image_enc.parameters()) + list(text_enc.parameters()) + list(place_head.parameters())
    opt = torch.optim.AdamW(params, lr=p.lr, weight_decay=p.weight_decay)
    rng = np.random.default_rng([p.seed, 99])
    tokenizer.enable_truncation(MAX_TOKENS)
    curve = []
    t1, c1 = time.time(), time.process_time()
    order = rng.permutation(p.pool)
    cursor = 0
    steps_done = 0
    progress = 0.0
    for step in range(p.steps):
        progress = max(
            step / p.steps,
            (time.process_time() - c1) / (2 * 60 * p.minutes),
            (time.time() - t1) / (60 * p.wall_minutes),
        )
        if progress >= 1.0:
            break
        if cursor + p.batch > p.pool:
            order, cursor = rng.permutation(p.pool), 0
        idx = order[cursor : cursor + p.batch]
        cursor += p.batch
        flips = rng.random((len(idx), 2)) < 0.5
        batch_scenes = [mirrored(scenes[i], h, v) for i, (h, v) in zip(idx, flips)]
        batch_images = np.stack([flip(images[i], h, v) for i, (h, v) in zip(idx, flips)])
        specs = [sample_spec(s, rng) for s in batch_scenes]
        texts = [render(s) for s in specs]
        if p.contrast_negatives:
            texts += [render(false_twin(s, sc, rng)) for s, sc in zip(specs, batch_scenes)]
        ids, mask = tensors(tokenizer, texts)
        sig = torch.from_numpy(sig_ids[idx])
        same = (sig[:, None] == sig[None, :])
        lr = lr_at(p, progress)
        for g in opt.param_groups:
            g["lr"] = lr
        image_enc.train()
        text_enc.train()
        txt = text_enc(ids, mask)
        own_contrast = txt[len(idx) :] if p.contrast_negatives else None
        img = image_enc(to_input(batch_images))
        loss = vse_loss(img, txt[: len(idx)], same, p.margin, progress >= p.sum_until, own_contrast)
        if p.place_weight:
            present, centre, large = place_targets(batch_scenes)
            loss = loss + p.place_weight * place_loss(place_head(img), present, centre, large)
        if p.text_place_weight:
            loss = loss + p.text_place_weight * text_place_loss(place_head(txt[: len(idx)]), specs)
        opt.zero_grad(set_to_none=True)
        loss.backward()
        torch.nn.utils.clip_grad_norm_(params, 2.0)
        opt.step()
        steps_done = step + 1
        if step % 300 == 299:
            save(out, name, image_enc, text_enc, p, steps_done, tokenizer)
        if step % 50 == 0:
            elapsed, cpu = time.time() - t1, time.process_time() - c1
            curve.append({"step": step, "loss": round(loss.item(), 4), "lr": round(lr, 6), "seconds": round(elapsed, 1),
                          "cpu_seconds": round(cpu, 1)})
            print(f"step {step:5d} loss {loss.item():.4f} lr {lr:.5f} {elapsed:.0f}s cpu {cpu:.0f}s", flush=True)
    t_train, cpu_train = time.time() - t1, time.process_time() - c1
    settings = save(out, name, image_enc, text_enc, p, steps_done, tokenizer)
    info = {
        **settings,
        "loss": "VSE++ bidirectional hinge, margin %.2f: sum over negatives up to %d%% of the run, then hardest negative%s"
        % (p.margin, round(100 * p.sum_until), "; plus its own hinge for one one-fact-changed caption per image (contrast_negatives); random flips of every image; auxiliary place losses on image embeddings (weight %s) and caption embeddings (weight %s), training only" % (p.place_weight, p.text_place_weight) if p.contrast_negatives else ""),
        "optimizer": f"AdamW lr {p.lr} weight decay {p.weight_decay}, schedule {p.schedule}, grad clip 2.0",
        "seconds_data": round(t_data, 1),
        "seconds_train": round(t_train, 1),
        "cpu_seconds_train": round(cpu_train, 1),
        "threads": torch.get_num_threads(),
        "machine": platform.machine(),
        "curve": curve,
    }
    (out / "train.json").write_text(json.dumps(info, indent=2))
    print(f"{name}: {steps_done} steps in {t_train:.0f}s", flush=True)


def load(folder: Path) -> tuple[ImageEncoder, TextEncoder, dict]:
    """The trained towers (eval mode) and their settings."""
    ck = torch.load(folder / "model.pt", weights_only=False)
    s = ck["settings"]
    p = Preset(**s["preset"])
    image_enc = ImageEncoder(width=p.width, dim=s["dim"])
    text_enc = TextEncoder(s["vocab"], embed=p.embed, hidden=p.text_hidden, dim=s["dim"], pad_id=s["pad_id"])
    image_enc.load_state_dict(ck["image"])
    text_enc.load_state_dict(ck["text"])
    return image_enc.eval(), text_enc.eval(), s


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("name", choices=sorted(PRESETS))
    ap.add_argument("--out", type=Path, default=None, help="default .cache/blocksworld/<name>")
    ap.add_argument("--minutes", type=float, default=None, help="override the preset (trials only)")
    ap.add_argument("--pool", type=int, default=None, help="override the preset (trials only)")
    args = ap.parse_args()
    p = PRESETS[args.name]
    if args.minutes:
        p = replace(p, minutes=args.minutes)
    if args.pool:
        p = replace(p, pool=args.pool)
    train(args.name, p, args.out or Path(".cache/blocksworld") / args.name)


if __name__ == "__main__":
    main()
