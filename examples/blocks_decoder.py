#!/usr/bin/env python3
"""A GRU captioner of blocks scenes trained on befit's reward: can it game it?

A small GRU decoder over the blocks vocabulary (the word-level tokenizer of
fixtures/models/blocks-v1), conditioned on befit's image vector of the scene
(`POST /v1/vectors`), is pre-trained briefly with cross-entropy on a training
split of scenes (tools/blocksworld, stream 2000; the probe is stream 1000),
then trained with mean-of-others policy gradient on rewards from befit over
HTTP (examples/caption_rl.py, the loop CI runs with a numpy policy). Every
step names a `run` and a `step`, so befit's run watch records it. Greedy
captions of held-out probe scenes are judged against the scene facts by
examples/blocks_policy.py (`judge`), not by befit.

    make serve &
    /work/venv-train/bin/python examples/blocks_decoder.py --run cosine-only
    /work/venv-train/bin/python examples/blocks_decoder.py --run fluency-guard --fluency-weight 1

Needs PyTorch, Pillow and matplotlib (examples/requirements-torch.txt).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Dict, List, Sequence

import numpy as np
import torch
from torch import nn

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "examples"))
sys.path.insert(0, str(REPO / "tools/blocksworld"))
try:
    import befit_client  # noqa: F401
except ImportError:  # not installed: use the checkout's copy
    sys.path.insert(0, str(REPO / "clients/python/src"))

from befit_client import Client  # noqa: E402
from blocks_policy import judge  # noqa: E402
from caption_rl import detokenize, rl_step, text_stats  # noqa: E402

TRAIN_SEED = 2000  # the policy's training stream; the probe is 1000-1002
BOS, EOS = "<s>", "</s>"


def parse_args(argv: List[str]) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--url", default="http://127.0.0.1:7878")
    p.add_argument("--run", required=True, help="run name for befit's run watch")
    p.add_argument("--fluency-weight", type=float, default=0.0, help="guard fluency_weight (0: cosine only)")
    p.add_argument(
        "--penalties", type=json.loads, default=None, help="guard penalties as JSON, e.g. '{\"repeated_words\": ...}'"
    )
    p.add_argument("--train-scenes", type=int, default=1500)
    p.add_argument("--probe-images", type=int, default=200, help="held-out probe scenes judged each step")
    p.add_argument("--pretrain-epochs", type=int, default=3)
    p.add_argument("--steps", type=int, default=60)
    p.add_argument("--batch", type=int, default=32, help="images per RL step")
    p.add_argument("--samples", type=int, default=6, help="captions per image and step")
    p.add_argument("--lr", type=float, default=1e-3, help="Adam step size of the RL phase")
    p.add_argument("--max-words", type=int, default=16)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--thresholds", type=json.loads, default=None, help="run_thresholds of the run watch, as JSON")
    p.add_argument("--cache", type=Path, default=REPO / ".cache/blocks-decoder", help="rendered training scenes")
    p.add_argument("--log", type=Path, required=True, help="per-step metrics as JSON")
    return p.parse_args(argv)


def training_split(n: int, cache: Path):
    """`n` scenes of the training stream: image paths and true captions."""
    from captions import render, true_captions
    from make_probe import caption_rng
    from render import render_scene
    from world import sample_scene

    cache.mkdir(parents=True, exist_ok=True)
    paths, caps = [], []
    for i in range(n):
        scene = sample_scene(TRAIN_SEED, i)
        path = cache / f"{i:05d}.png"
        if not path.exists():
            render_scene(scene).save(path)
        paths.append(path)
        caps.append([render(s) for s in true_captions(scene, caption_rng(TRAIN_SEED, i))])
    return paths, caps


def tokens(text: str) -> List[str]:
    import re

    return re.findall(r"\w+|[^\w\s]", text.lower())


class Decoder(nn.Module):
    """Image vector -> initial GRU state; words in, next-word logits out."""

    def __init__(self, dim: int, vocab: int, hidden: int = 128, embed: int = 48) -> None:
        super().__init__()
        self.init = nn.Linear(dim, hidden)
        self.embed = nn.Embedding(vocab, embed)
        self.gru = nn.GRU(embed, hidden, batch_first=True)
        self.out = nn.Linear(hidden, vocab)

    def forward(self, feats: torch.Tensor, inputs: torch.Tensor) -> torch.Tensor:
        h0 = torch.tanh(self.init(feats)).unsqueeze(0)
        y, _ = self.gru(self.embed(inputs), h0)
        return self.out(y)


class GruPolicy:
    """The decoder behind caption_rl's policy interface."""

    def __init__(self, model: Decoder, feats: torch.Tensor, vocab: List[str], max_words: int, lr: float) -> None:
        self.model, self.feats, self.vocab, self.max_words = model, feats, vocab, max_words
        self.bos, self.eos = vocab.index(BOS), vocab.index(EOS)
        self.opt = torch.optim.Adam(model.parameters(), lr=lr)

    def _decode(self, feats: torch.Tensor, greedy: bool, gen: torch.Generator | None):
        n = feats.shape[0]
        h = torch.tanh(self.model.init(feats)).unsqueeze(0)
        word = torch.full((n,), self.bos, dtype=torch.long)
        done = torch.zeros(n, dtype=torch.bool)
        logps, words = [], []
        for _ in range(self.max_words + 1):
            y, h = self.model.gru(self.model.embed(word).unsqueeze(1), h)
            logits = self.model.out(y[:, 0])
            logits[:, self.bos] = -1e9
            if greedy:
                word = logits.argmax(-1)
            else:
                word = torch.multinomial(torch.softmax(logits, -1), 1, generator=gen)[:, 0]
            lp = torch.log_softmax(logits, -1).gather(1, word[:, None])[:, 0]
            logps.append(torch.where(done, torch.zeros_like(lp), lp))
            words.append(torch.where(done, torch.full_like(word, self.eos), word))
            done = done | (word == self.eos)
            if bool(done.all()):
                break
        ids = torch.stack(words, 1).tolist()
        texts = []
        for row in ids:
            row = row[: row.index(self.eos)] if self.eos in row else row
            texts.append(detokenize([self.vocab[i] for i in row]))
        return texts, torch.stack(logps, 1).sum(1)

    def greedy(self, feats: torch.Tensor) -> List[str]:
        with torch.no_grad():
            return self._decode(feats, True, None)[0]

    def sample(self, groups: Sequence[int], k: int, rng: np.random.Generator):
        gen = torch.Generator().manual_seed(int(rng.integers(2**31)))
        feats = self.feats[list(groups)].repeat_interleave(k, 0)
        texts, logp = self._decode(feats, False, gen)
        return [texts[i * k : (i + 1) * k] for i in range(len(groups))], logp.view(len(groups), k)

    def update(self, logp: torch.Tensor, advantages: np.ndarray) -> None:
        loss = -(torch.as_tensor(advantages, dtype=torch.float32) * logp).mean()
        self.opt.zero_grad()
        loss.backward()
        nn.utils.clip_grad_norm_(self.model.parameters(), 1.0)
        self.opt.step()


def pretrain(model: Decoder, feats: torch.Tensor, caps: List[List[List[int]]], epochs: int, seed: int) -> None:
    gen = torch.Generator().manual_seed(seed)
    pairs = [(i, c) for i, cs in enumerate(caps) for c in cs]
    opt = torch.optim.Adam(model.parameters(), lr=3e-3)
    for epoch in range(epochs):
        order = torch.randperm(len(pairs), generator=gen).tolist()
        total = 0.0
        for b in range(0, len(order), 64):
            batch = [pairs[j] for j in order[b : b + 64]]
            width = max(len(c) for _, c in batch)
            seq = torch.full((len(batch), width), -100, dtype=torch.long)
            for r, (_, c) in enumerate(batch):
                seq[r, : len(c)] = torch.tensor(c)
            inputs = seq[:, :-1].clamp(min=0)
            logits = model(feats[[i for i, _ in batch]], inputs)
            loss = nn.functional.cross_entropy(logits.reshape(-1, logits.shape[-1]), seq[:, 1:].reshape(-1))
            opt.zero_grad()
            loss.backward()
            opt.step()
            total += loss.item() * len(batch)
        print(f"pretrain epoch {epoch}: cross-entropy {total / len(pairs):.3f}", flush=True)


def main(argv: List[str]) -> None:
    args = parse_args(argv)
    torch.manual_seed(args.seed)
    torch.set_num_threads(2)
    rng = np.random.default_rng(args.seed)
    client = Client(args.url, pin_digest="first")
    client.wait_ready(timeout=120)
    tok = json.loads((REPO / "fixtures/models/blocks-v1/tokenizer.json").read_text())["model"]["vocab"]
    vocab = [w for w in tok if w not in ("[PAD]", "[UNK]")] + [BOS, EOS]
    index = {w: i for i, w in enumerate(vocab)}

    paths, captions = training_split(args.train_scenes, args.cache)
    probe = [json.loads(line) for line in (REPO / "fixtures/probe/probe.jsonl").read_text().splitlines()]
    probe = probe[: args.probe_images]
    probe_paths = [REPO / "fixtures/probe" / r["image"] for r in probe]
    t0 = time.monotonic()
    feats = torch.as_tensor(client.vectors(paths).images)
    probe_feats = torch.as_tensor(client.vectors(probe_paths).images)
    print(f"image vectors of {len(paths)} + {len(probe)} scenes in {time.monotonic() - t0:.1f}s", flush=True)

    enc = [[[index[BOS]] + [index[t] for t in tokens(c)] + [index[EOS]] for c in cs] for cs in captions]
    model = Decoder(feats.shape[1], len(vocab))
    pretrain(model, feats, enc, args.pretrain_epochs, args.seed)
    policy = GruPolicy(model, feats, vocab, args.max_words, args.lr)
    # Always a guard: an empty one changes no reward, and makes befit measure
    # every sample's signals (the fluency of blocks-v1's head among them).
    guard = {"fluency_weight": args.fluency_weight} if args.fluency_weight > 0 else {}
    if args.penalties:
        guard["penalties"] = args.penalties

    history: List[Dict[str, object]] = []
    started = time.monotonic()
    for step in range(args.steps + 1):
        greedy = policy.greedy(probe_feats)
        verdicts = [judge(c, r["scene"]) for c, r in zip(greedy, probe)]
        groups = rng.choice(len(paths), size=args.batch, replace=False).tolist()
        rec = rl_step(
            client,
            policy,
            paths,
            groups,
            args.samples,
            rng,
            run=args.run,
            step=step,
            guard=guard,
            run_thresholds=args.thresholds if step == 0 else None,
            learn=step < args.steps,  # the last round only measures
        )
        rec["correct"] = float(np.mean([v.correct for v in verdicts]))
        rec["greedy"] = {k: v for k, v in text_stats(greedy).items()}
        rec["greedy_example"] = greedy[0]
        rec["seconds"] = time.monotonic() - started
        history.append(rec)
        print(
            f"step {step:3d} {rec['seconds']:6.1f}s reward {rec['reward']:.4f} cosine {rec['cosine']:.4f} "
            f"correct {rec['correct']:.3f} fluency {rec.get('fluency', float('nan')):.3f} "
            f"repeated {rec['repeated_words']:.3f} distinct-2 {rec['distinct_2']:.3f} "
            f"warnings {rec['warnings']} | {rec['example']!r} | greedy {greedy[0]!r}",
            flush=True,
        )
    watch = client.run(args.run)
    args.log.parent.mkdir(parents=True, exist_ok=True)
    args.log.write_text(
        json.dumps(
            {
                "args": {k: str(v) if isinstance(v, Path) else v for k, v in vars(args).items()},
                "history": history,
                "watch": watch,
            },
            indent=1,
        )
    )


if __name__ == "__main__":
    main(sys.argv[1:])
