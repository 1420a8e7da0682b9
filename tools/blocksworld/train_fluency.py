"""Train, export and check a bundle's fluency head: is a caption well-formed?

    python tools/blocksworld/train_fluency.py blocks-v1     # or blocks-v2

The head reads the token ids the bundle's text tower gets (same tokenizer,
same right padding, same mask) and answers the probability that the caption
is a well-formed sentence of the blocks grammar. It is trained as in J. Cho
et al., "Fine-grained Image Captioning with CLIP Reward" (NAACL Findings
2022): positives are true captions, negatives the same captions edited into
wrong ones. The edits here are a word repeated, two words swapped, a word
dropped, a phrase duplicated, the caption cut short, a word inserted, and
the start of one caption run into the end of another (two templates
spliced); plus, for a policy that breaks a caption in several places at
once, two to three edits stacked. The last two kinds were added after a
policy trained on CLIP-S + fluency learnt to splice templates ("two shapes:
a large violet cross beneath a large violet cross"), which the first five
never showed the head (README, the degenerate-policy runs).
Contrast captions (one fact changed: false, but well-formed) count as
positives, so the head learns form, not truth; that is the cosine's job.

An edit whose result is still a sentence of the grammar (`well_formed`: "a
big red circle left of a small blue ring" cut short after "ring" from a
three-piece caption, two colours swapped) is not a negative and is drawn
again.

Writes (towers untouched):
- `fixtures/models/<name>/fluency.onnx` and the `[fluency]` section of
  `bundle.toml`; `card.json` gains `fluency` (architecture, training, the
  held-out accuracy overall and per edit kind, ONNX-vs-PyTorch differences)
  and the file's entry under `files`;
- `fixtures/golden/<name>/fluency.json`: texts (each with the set it comes
  from), their ids and the PyTorch probabilities, for check_goldens.py and
  befit's parity test;
- `.cache/blocksworld/<name>-fluency/head.pt`, the weights.

Held out: the probe set's captions and contrasts (scene stream 1000); the
training captions come from the bundle's own training stream (seed 1 or 2).
"""

from __future__ import annotations

import argparse
import json
import re
import sys
import time
import tomllib
from pathlib import Path

import numpy as np
import torch
from torch import nn
from tokenizers import Tokenizer

from bundle_files import fluency_toml, sha256, versions
from captions import (
    COLOUR_WORDS,
    COUNT_WORDS,
    NOUNS,
    RELATION_WORDS,
    SHAPE_WORDS,
    SIZE_WORDS,
    contrasts,
    render,
    true_captions,
)
from encoders import last_and_mean
from evaluate import read_rows
from export import OPSET, _export
from intake import Encoded, TextSpec, encode, pad
from world import sample_scene

TOLERANCE = 1e-5
EDITS = ("repeat", "swap", "drop", "duplicate", "cut", "insert", "splice")
# The training stream of each bundle's towers; the probe is stream 1000.
SEEDS = {"blocks-v1": 1, "blocks-v2": 2}
PRESET = {"embed": 32, "hidden": 64, "steps": 1200, "batch": 192, "lr": 3e-3, "scenes": 6000, "stacked": 0.2}


def _alt(words) -> str:
    return "(?:" + "|".join(re.escape(w) for w in sorted(set(words), key=len, reverse=True)) + ")"


def _grammar() -> re.Pattern:
    """The caption grammar of captions.py as one regex over space-joined tokens."""
    size = _alt(w for ws in SIZE_WORDS.values() for w in ws)
    colour = _alt(w for ws in COLOUR_WORDS.values() for w in ws)
    shape = _alt(w for ws in SHAPE_WORDS.values() for w in ws)
    rel = _alt(w for ws in RELATION_WORDS.values() for w in ws)
    noun1, nouns = _alt(n[0] for n in NOUNS), _alt(n[1] for n in NOUNS)
    counts = {1: f"{_alt(COUNT_WORDS[1])} {noun1}", 2: f"{_alt(COUNT_WORDS[2])} {nouns}",
              3: f"{_alt(COUNT_WORDS[3])} {nouns}"}
    piece = f"a {size} {colour} {shape}"
    the = f"the {size} {colour} {shape}"
    listings = {1: piece, 2: f"{piece} and {piece}", 3: f"{piece} , {piece} and {piece}"}
    listing = f"(?:{listings[1]}|{listings[2]}|{listings[3]})"
    # A stated count need not agree with the pieces listed (a count contrast
    # is false, not ill-formed); "is" goes with one, "are" with more.
    forms = []
    for n in (1, 2, 3):
        count, verb = counts[n], "is" if n == 1 else "are"
        forms += [f"{count} : {listing}", f"a table with {count} , {listing}",
                  f"there {verb} {count} on the table : {listing}"]
    any_count = f"(?:{counts[1]}|{counts[2]}|{counts[3]})"
    forms += [
        f"{listing} on the table",
        f"just {piece} , nothing else",
        f"{piece} {rel} {piece}",
        f"{the} is {rel} {the}",
        f"{any_count} ; {the} is {rel} {the}",
        f"{any_count} on the table , with {piece} {rel} {piece}",
        f"{piece} {rel} {piece} , and {piece}",
    ]
    return re.compile("|".join(f"(?:{f})" for f in forms))


GRAMMAR = _grammar()


def well_formed(tokens: list[str]) -> bool:
    return GRAMMAR.fullmatch(" ".join(tokens)) is not None


def edit(tokens: list[str], kind: str, rng: np.random.Generator, pool: list[list[str]]) -> list[str]:
    """`tokens` with one edit of `kind` (may leave them unchanged on short captions);
    `insert` and `splice` draw their words from another caption of `pool`."""
    n = len(tokens)
    t = list(tokens)
    if n == 0:
        return t
    if kind == "repeat":
        words = [i for i, w in enumerate(t) if w.isalnum()] or list(range(n))
        i = int(rng.choice(words))
        return t[: i + 1] + [t[i]] * int(rng.integers(1, 3)) + t[i + 1 :]
    if kind == "swap":
        if n < 2:
            return t
        i, j = (int(k) for k in rng.choice(n, size=2, replace=False))
        t[i], t[j] = t[j], t[i]
        return t
    if kind == "drop":
        i = int(rng.integers(n))
        return t[:i] + t[i + 1 :]
    if kind == "duplicate":
        length = int(rng.integers(2, 5))
        if n < length:
            return t + t
        i = int(rng.integers(n - length + 1))
        return t[: i + length] + t[i : i + length] + t[i + length :]
    if kind == "cut":
        if n < 3:
            return t[:1]
        return t[: int(rng.integers(1, n - 1))]
    other = pool[int(rng.integers(len(pool)))]
    if kind == "insert":
        i = int(rng.integers(n + 1))
        return t[:i] + [other[int(rng.integers(len(other)))]] + t[i:]
    if kind == "splice":
        # The start of one caption run into the end of another: two templates
        # joined ("two shapes : a big red cross beneath a big red cross").
        return t[: int(rng.integers(1, n + 1))] + other[int(rng.integers(1, len(other))) :]
    raise ValueError(f"unknown edit {kind}")


def negative(
    tokens: list[str], kinds: tuple[str, ...], rng: np.random.Generator, pool: list[list[str]]
) -> list[str] | None:
    """`tokens` edited by each of `kinds` in turn; None when no draw leaves the grammar."""
    for _ in range(20):
        t = tokens
        for kind in kinds:
            t = edit(t, kind, rng, pool)
        if t and t != tokens and not well_formed(t):
            return t
    return None


class FluencyHead(nn.Module):
    """int64 ids and mask [batch, tokens], right padded -> [batch] probability of well-formed.

    A one-way GRU, so padding after a caption cannot change it; its state at
    the last real token and its mean over real tokens go to one logistic unit.
    """

    def __init__(self, vocab: int, embed: int, hidden: int, pad_id: int):
        super().__init__()
        self.embed = nn.Embedding(vocab, embed, padding_idx=pad_id)
        self.gru = nn.GRU(embed, hidden, batch_first=True)
        self.out = nn.Linear(2 * hidden, 1)

    def logits(self, input_ids: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
        states, _ = self.gru(self.embed(input_ids))
        return self.out(last_and_mean(states, attention_mask)).squeeze(-1)

    def forward(self, input_ids: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
        return torch.sigmoid(self.logits(input_ids, attention_mask))


def scene_captions(seed: int, scenes: int) -> tuple[list[str], list[str]]:
    """True captions and contrasts of `scenes` scenes of a stream."""
    true, false = [], []
    for i in range(scenes):
        scene = sample_scene(seed, i)
        rng = np.random.default_rng([seed, i, 1])
        specs = true_captions(scene, rng)
        true += [render(s) for s in specs]
        false += [render(c) for c, _, _ in contrasts(specs, scene, rng)]
    return true, false


class Vocabulary:
    """The bundle's tokenizer: caption text to tokens and tokens to ids."""

    def __init__(self, bundle: Path):
        config = tomllib.loads((bundle / "bundle.toml").read_text())
        self.spec = TextSpec(config["text"]["max_tokens"], config["text"]["pad_id"], config["text"].get("prefix", ""))
        self.tokenizer = Tokenizer.from_file(str(bundle / config["text"]["tokenizer"]))
        self.size = self.tokenizer.get_vocab_size()

    def tokens(self, texts: list[str]) -> list[list[str]]:
        return [e.tokens for e in self.tokenizer.encode_batch(texts)]

    def ids(self, tokens: list[list[str]]) -> list[Encoded]:
        """Ids of token lists, truncated to max_tokens as befit truncates."""
        return encode(self.tokenizer, [" ".join(t) for t in tokens], self.spec)

    def batch(self, tokens: list[list[str]]) -> tuple[torch.Tensor, torch.Tensor]:
        ids, mask = pad(self.ids(tokens), self.spec)
        return torch.from_numpy(ids), torch.from_numpy(mask)


def kinds_for(rng: np.random.Generator, stacked: float) -> tuple[str, ...]:
    if rng.random() < stacked:
        return tuple(str(k) for k in rng.choice(EDITS, size=int(rng.integers(2, 4))))
    return (str(rng.choice(EDITS)),)


def train(vocab: Vocabulary, positives: list[list[str]], seed: int, p: dict) -> tuple[FluencyHead, list[dict]]:
    torch.manual_seed(seed)
    rng = np.random.default_rng([seed, 77])
    head = FluencyHead(vocab.size, p["embed"], p["hidden"], vocab.spec.pad_id)
    opt = torch.optim.AdamW(head.parameters(), lr=p["lr"], weight_decay=1e-4)
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=p["lr"], total_steps=p["steps"], pct_start=0.2)
    loss_fn = nn.BCEWithLogitsLoss()
    half = p["batch"] // 2
    curve = []
    start = time.time()
    for step in range(p["steps"]):
        picks = rng.integers(len(positives), size=2 * half)
        good = [positives[i] for i in picks[:half]]
        bad = []
        for i in picks[half:]:
            t = negative(positives[i], kinds_for(rng, p["stacked"]), rng, positives)
            if t is not None:
                bad.append(t)
        ids, mask = vocab.batch(good + bad)
        target = torch.tensor([1.0] * len(good) + [0.0] * len(bad))
        loss = loss_fn(head.logits(ids, mask), target)
        opt.zero_grad()
        loss.backward()
        nn.utils.clip_grad_norm_(head.parameters(), 2.0)
        opt.step()
        sched.step()
        if step % 100 == 0 or step == p["steps"] - 1:
            curve.append({"step": step, "loss": round(float(loss.detach()), 4), "seconds": round(time.time() - start, 1)})
            print(f"step {step}: loss {float(loss.detach()):.4f} ({time.time() - start:.0f}s)", flush=True)
    return head.eval(), curve


def held_out(vocab: Vocabulary, probe: Path, seed: int) -> dict[str, list[list[str]]]:
    """The probe's captions and contrasts, and one edit of each kind per true caption."""
    rows = read_rows(probe)
    true = vocab.tokens([c for r in rows for c in r["captions"]])
    sets = {"true": true, "contrast": vocab.tokens([c["caption"] for r in rows for c in r["contrasts"]])}
    rng = np.random.default_rng([seed, 1000])
    for kind in EDITS:
        sets[kind] = [t for t in (negative(c, (kind,), rng, true) for c in true) if t is not None]
    sets["stacked"] = [t for t in (negative(c, kinds_for(rng, 1.0), rng, true) for c in true) if t is not None]
    return sets


def probabilities(head: FluencyHead, vocab: Vocabulary, tokens: list[list[str]], batch: int = 512) -> np.ndarray:
    out = []
    with torch.no_grad():
        for s in range(0, len(tokens), batch):
            out.append(head(*vocab.batch(tokens[s : s + batch])).numpy())
    return np.concatenate(out)


def accuracy(head: FluencyHead, vocab: Vocabulary, sets: dict[str, list[list[str]]]) -> dict:
    """Share answered right at 0.5 per set; positives are "true" and "contrast"."""
    per, right, total = {}, 0, 0
    for name, tokens in sets.items():
        p = probabilities(head, vocab, tokens)
        ok = (p >= 0.5) if name in ("true", "contrast") else (p < 0.5)
        per[name] = {"n": len(tokens), "accuracy": round(float(ok.mean()), 4), "mean_probability": round(float(p.mean()), 4)}
        right += int(ok.sum())
        total += len(tokens)
    return {"overall": round(right / total, 4), "n": total, "by_set": per}


def export(head: FluencyHead, path: Path) -> None:
    ids = torch.ones(2, 7, dtype=torch.long)
    mask = torch.ones(2, 7, dtype=torch.long)
    _export(head, (ids, mask), path, ["input_ids", "attention_mask"], "probability", True, None)


def verify(path: Path, head: FluencyHead, vocab: Vocabulary, tokens: list[list[str]]) -> dict:
    """onnxruntime against PyTorch, alone and padded inside one batch."""
    import onnxruntime as ort

    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    encoded = vocab.ids(tokens)
    ids, mask = pad(encoded, vocab.spec, max(len(e.ids) for e in encoded) + 5)
    padded = session.run(["probability"], {"input_ids": ids, "attention_mask": mask})[0]
    worst = {"alone": 0.0, "padded": 0.0}
    for k, e in enumerate(encoded):
        one_ids, one_mask = pad([e], vocab.spec)
        with torch.no_grad():
            want = float(head(torch.from_numpy(one_ids), torch.from_numpy(one_mask))[0])
        alone = float(session.run(["probability"], {"input_ids": one_ids, "attention_mask": one_mask})[0][0])
        worst["alone"] = max(worst["alone"], abs(alone - want))
        worst["padded"] = max(worst["padded"], abs(float(padded[k]) - want))
    for key, value in worst.items():
        if value > TOLERANCE:
            raise SystemExit(f"fluency {key}: ONNX differs from PyTorch by {value:.2e} (> {TOLERANCE})")
    return {k: float(f"{v:.2e}") for k, v in worst.items()}


def golden_texts(golden: Path, sets: dict[str, list[list[str]]]) -> list[tuple[str, str]]:
    """`(set, text)`: the towers' golden texts (set "towers"), then a held-out example of each set."""
    texts = [("towers", t["text"]) for t in json.loads((golden / "golden.json").read_text())["texts"]]
    for name in ("true", "contrast") + EDITS + ("stacked",):
        texts.append((name, " ".join(sets[name][7])))
    return texts


def write_goldens(head: FluencyHead, vocab: Vocabulary, golden: Path, name: str, sets: dict) -> None:
    named = golden_texts(golden, sets)
    encoded = encode(vocab.tokenizer, [t for _, t in named], vocab.spec)
    gold = {"bundle": name, "texts": []}
    for (kind, text), e in zip(named, encoded):
        ids, mask = pad([e], vocab.spec)
        with torch.no_grad():
            prob = float(head(torch.from_numpy(ids), torch.from_numpy(mask))[0])
        gold["texts"].append({"set": kind, "text": text, "ids": e.ids, "probability": prob})
    (golden / "fluency.json").write_text(json.dumps(gold, indent=1) + "\n")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("name", choices=sorted(SEEDS))
    ap.add_argument("--probe", type=Path, default=Path("fixtures/probe/probe.jsonl"))
    ap.add_argument("--steps", type=int, default=PRESET["steps"])
    args = ap.parse_args()
    torch.set_num_threads(2)
    p = dict(PRESET, steps=args.steps)
    seed = SEEDS[args.name]
    bundle = Path("fixtures/models") / args.name
    golden = Path("fixtures/golden") / args.name
    cache = Path(".cache/blocksworld") / f"{args.name}-fluency"
    cache.mkdir(parents=True, exist_ok=True)
    vocab = Vocabulary(bundle)

    start = time.time()
    true, false = scene_captions(seed, p["scenes"])
    positives = vocab.tokens(true + false)
    bad = [t for t in positives if not well_formed(t)]
    assert not bad, f"the grammar refuses true captions: {bad[:3]}"
    sets = held_out(vocab, args.probe, seed)
    assert all(well_formed(t) for t in sets["true"] + sets["contrast"]), "the grammar refuses probe captions"
    seconds_data = time.time() - start
    head, curve = train(vocab, positives, seed, p)
    seconds_train = time.time() - start - seconds_data
    torch.save({"state": head.state_dict(), "preset": p, "vocab": vocab.size}, cache / "head.pt")

    metrics = accuracy(head, vocab, sets)
    print(json.dumps(metrics, indent=1), flush=True)
    export(head, bundle / "fluency.onnx")
    examples = [sets[k][i] for k in sets for i in range(0, 400, 40)]
    checks = verify(bundle / "fluency.onnx", head, vocab, examples)
    print(f"{args.name}: fluency ONNX matches PyTorch: {checks}", flush=True)

    toml = (bundle / "bundle.toml").read_text()
    toml = toml.split("\n[fluency]\n")[0].rstrip("\n") + "\n\n" + fluency_toml()
    (bundle / "bundle.toml").write_text(toml)

    write_goldens(head, vocab, golden, args.name, sets)

    card_path = bundle / "card.json"
    card = json.loads(card_path.read_text())
    card["fluency"] = {
        "about": "probability that a caption is well-formed, from the token ids the text tower gets "
        "(Cho et al. 2022: true captions against the same captions edited)",
        "architecture": f"word embedding {p['embed']} + one-way GRU {p['hidden']}, last and mean state, one logistic unit",
        "training": {"seed": seed, "scenes": p["scenes"], "positives": len(positives), **p,
                     "edits": list(EDITS), "seconds_data": round(seconds_data, 1),
                     "seconds_train": round(seconds_train, 1)},
        "loss_curve": curve,
        "held_out": {"probe": str(args.probe), "threshold": 0.5, **metrics},
        "onnx": {"opset": OPSET, "max_abs_diff_vs_pytorch": checks},
        "packages": versions(),
    }
    for f in ("bundle.toml", "fluency.onnx"):
        card["files"][f] = {"sha256": sha256(bundle / f), "bytes": (bundle / f).stat().st_size}
    card_path.write_text(json.dumps(card, indent=2) + "\n")
    print(f"{args.name}: wrote {bundle / 'fluency.onnx'}, {golden / 'fluency.json'}, card.json", flush=True)


if __name__ == "__main__":
    sys.exit(main())
