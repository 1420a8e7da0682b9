"""The policy-gradient loop of a token-level captioner rewarded by befit.

numpy only: `examples/blocks_decoder.py` runs it with a PyTorch GRU decoder,
`tests/client/test_caption_rl.py` with the small numpy `PositionalPolicy`
below (CI has no PyTorch). A policy has

    sample(groups, k, rng) -> (captions: list of k captions per group, handle)
    update(handle, advantages: (groups, k) array) -> None

and `rl_step` sends one step's captions to befit (`POST /v1/rewards` with
the mean-of-others baseline, a `run` and a `step` so the run watch records
it), updates the policy with befit's advantages and returns the step's
numbers, measured here independently of befit: mean reward, repeated-word
share and distinct-2 (Li et al. 2016) of the sampled captions.
"""

from __future__ import annotations

import re
from typing import Any, Dict, List, Mapping, Optional, Sequence

import numpy as np

#: Tokens of the blocks vocabulary written without a space before them.
PUNCTUATION = {",", ";", ":"}


def detokenize(tokens: Sequence[str]) -> str:
    """Words joined by spaces, punctuation attached to the word before it."""
    out = ""
    for t in tokens:
        out += t if (t in PUNCTUATION or not out) else " " + t
    return out


def words(text: str) -> List[str]:
    """Runs of letters and digits, lower-cased (the run watch's words)."""
    return re.findall(r"[^\W_]+", text.lower())


def repeated_share(items: Sequence[Any]) -> float:
    """Share of items equal to an earlier item of the sequence."""
    return 0.0 if not items else (len(items) - len(set(items))) / len(items)


def text_stats(captions: Sequence[str]) -> Dict[str, float]:
    """Mean repeated-word share, distinct-1 and distinct-2 (distinct word
    n-grams over all word n-grams of the batch, Li et al. 2016) and mean
    words per caption."""
    ws = [words(c) for c in captions]
    unigrams = [u for w in ws for u in w]
    bigrams = [b for w in ws for b in zip(w, w[1:])]
    return {
        "repeated_words": float(np.mean([repeated_share(w) for w in ws])) if ws else 0.0,
        "distinct_1": len(set(unigrams)) / len(unigrams) if unigrams else 0.0,
        "distinct_2": len(set(bigrams)) / len(bigrams) if bigrams else 0.0,
        "mean_words": len(unigrams) / len(ws) if ws else 0.0,
    }


def rl_step(
    client: Any,
    policy: Any,
    images: Sequence[Any],
    groups: Sequence[int],
    samples: int,
    rng: np.random.Generator,
    *,
    run: str,
    step: int,
    guard: Optional[Mapping[str, Any]] = None,
    run_thresholds: Optional[Mapping[str, Any]] = None,
    learn: bool = True,
) -> Dict[str, Any]:
    """One step: sample `samples` captions for each image in `groups`, get
    befit's rewards and advantages, update the policy (unless `learn` is
    false) and return the step's numbers."""
    captions, handle = policy.sample(groups, samples, rng)
    out = client.rewards(
        [images[g] for g in groups],
        captions,
        baseline="mean-of-others",
        guard=guard,
        run=run,
        step=step,
        run_thresholds=run_thresholds,
    )
    if learn:
        adv = np.asarray(out.advantage, dtype=np.float64)
        policy.update(handle, adv / (adv.std() + 1e-8))
    flat = [c for g in captions for c in g]
    rec: Dict[str, Any] = {
        "step": step,
        "reward": float(np.mean(out.reward)),
        "reward_std": float(np.std(out.reward)),
        "cosine": float(np.mean(out.cosine)),
        "samples": len(flat),
        "warnings": sorted({w["signal"] for w in out.warnings}),
        "example": flat[0],
    }
    # With a guard on a bundle with a fluency head, the samples' mean fluency.
    fluency = [s["fluency"] for g in (out.signals or []) for s in g if "fluency" in s]
    if fluency:
        rec["fluency"] = float(np.mean(fluency))
    rec.update(text_stats(flat))
    return rec


def _softmax(logits: np.ndarray) -> np.ndarray:
    z = np.exp(logits - logits.max(axis=-1, keepdims=True))
    return z / z.sum(axis=-1, keepdims=True)


class PositionalPolicy:
    """A numpy stand-in for the decoder: one softmax over `vocab` per word
    position (image-blind), trained by REINFORCE with plain gradient steps."""

    def __init__(self, vocab: Sequence[str], length: int, rng: np.random.Generator, lr: float = 0.5) -> None:
        self.vocab = list(vocab)
        self.logits = rng.normal(0.0, 0.1, size=(length, len(self.vocab)))
        self.lr = lr

    def sample(self, groups: Sequence[int], k: int, rng: np.random.Generator):
        p = _softmax(self.logits)
        ids = np.stack([[[rng.choice(len(self.vocab), p=row) for row in p] for _ in range(k)] for _ in groups])
        captions = [[detokenize([self.vocab[i] for i in sample]) for sample in group] for group in ids]
        return captions, ids

    def update(self, handle: np.ndarray, advantages: np.ndarray) -> None:
        p = _softmax(self.logits)
        grad = np.zeros_like(self.logits)
        for group, adv in zip(handle, advantages):
            for sample, a in zip(group, adv):
                onehot = np.zeros_like(self.logits)
                onehot[np.arange(len(sample)), sample] = 1.0
                grad += a * (onehot - p)  # d log pi / d logits of each position
        self.logits += self.lr * grad / advantages.size
