#!/usr/bin/env python3
"""Policy-gradient captioning of blocks-world scenes, rewarded by befit.

A per-image factorised policy (see `blocks_policy.py`) writes captions for a
few hundred probe images; every reward it learns from is befit's answer over
HTTP (`POST /v1/rewards`), with a mean-of-others or self-critical (greedy)
baseline. Correctness is judged separately, against the scene facts stored in
`probe.jsonl`, so the plot shows whether befit's reward leads to true
captions and not merely to high rewards.

    make serve &                                   # befit on 127.0.0.1:7878
    python examples/blocks_rl.py --url http://127.0.0.1:7878

Uses the installed `befit_client` (`pip install ./clients/python`), or the
checkout's copy when none is installed; matplotlib draws the plot when
present (otherwise a plain PNG of the curves is written, without text).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Dict, List

import numpy as np

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "examples"))
try:
    import befit_client  # noqa: F401
except ImportError:  # not installed: use the checkout's copy
    sys.path.insert(0, str(REPO / "clients/python/src"))

from blocks_policy import FactorisedPolicy, chance_correctness, judge, parse, render, true_action  # noqa: E402

from befit_client import Client, encode_png  # noqa: E402


def parse_args(argv: List[str]) -> argparse.Namespace:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--url", default="http://127.0.0.1:7878", help="befit server (default %(default)s)")
    p.add_argument(
        "--probe", type=Path, default=REPO / "fixtures/probe/probe.jsonl", help="probe rows with scene facts"
    )
    p.add_argument("--images", type=int, default=300, help="probe images to caption (default %(default)s)")
    p.add_argument("--steps", type=int, default=300, help="policy updates (default %(default)s)")
    p.add_argument("--samples", type=int, default=8, help="captions sampled per image and step (default %(default)s)")
    p.add_argument(
        "--baseline",
        choices=("mean-of-others", "greedy"),
        default="mean-of-others",
        help="befit's baseline: mean of the other samples (Luo 2020) or the greedy caption (self-critical)",
    )
    p.add_argument("--scale", default="cosine", choices=("cosine", "clip-s"), help="reward scale (default %(default)s)")
    p.add_argument("--lr", type=float, default=0.05, help="Adam step size on the logits (default %(default)s)")
    p.add_argument(
        "--entropy", type=float, default=0.0, help="weight of an entropy bonus on every slot (default %(default)s)"
    )
    p.add_argument("--seed", type=int, default=0, help="random seed of the policy and image choice")
    p.add_argument("--model", default=None, help="befit model id or name (default: the server's)")
    p.add_argument(
        "--no-normalise", action="store_true", help="use befit's advantages as they are, not divided by their std"
    )
    p.add_argument("--plot", type=Path, default=Path("blocks_rl.png"), help="output plot (default %(default)s)")
    p.add_argument("--log", type=Path, default=None, help="also write per-step metrics as JSON here")
    p.add_argument("--every", type=int, default=20, help="print progress every this many steps")
    args = p.parse_args(argv)
    if args.samples < 2 and args.baseline == "mean-of-others":
        p.error("mean-of-others needs --samples 2 or more")
    if args.images < 1 or args.steps < 1:
        p.error("--images and --steps must be positive")
    return args


def load_rows(path: Path, n: int, rng: np.random.Generator) -> List[dict]:
    rows = [json.loads(line) for line in path.read_text().splitlines() if line.strip()]
    if n > len(rows):
        raise SystemExit(f"{path} has {len(rows)} rows, fewer than --images {n}")
    keep = np.sort(rng.choice(len(rows), size=n, replace=False))
    return [rows[i] for i in keep]


_VERDICTS: Dict[tuple, tuple] = {}


def _judge(caption: str, scene: dict, key: int) -> tuple:
    """(verdict, per mentioned piece: do its size and colour lie on the
    table?), memoised: a converging policy repeats its captions."""
    k = (key, caption)
    if k not in _VERDICTS:
        present = {(p["size"], p["colour"]) for p in scene["pieces"]}
        _VERDICTS[k] = (judge(caption, scene), [(m[0], m[1]) in present for m in parse(caption).pieces])
    return _VERDICTS[k]


def correctness(captions: List[str], scenes: List[dict], keys: List[int]) -> Dict[str, float]:
    """Share of correct captions and of each kind of true claim; `keys`
    name each caption's image (for the memo)."""
    judged = [_judge(c, s, k) for c, s, k in zip(captions, scenes, keys)]
    verdicts = [v for v, _ in judged]
    # Size and colour alone, shape aside: how much of each piece is right.
    size_colour = [ok for _, oks in judged for ok in oks]
    count = [v.count_ok for v in verdicts if v.count_ok is not None]
    rel = [v.relation_ok for v in verdicts if v.relation_ok is not None]
    return {
        "correct": float(np.mean([v.correct for v in verdicts])),
        "count": float(np.mean(count)) if count else float("nan"),
        "pieces": float(sum(v.pieces_ok for v in verdicts) / max(1, sum(v.pieces_stated for v in verdicts))),
        "relation": float(np.mean(rel)) if rel else float("nan"),
        "size_colour": float(np.mean(size_colour)) if size_colour else float("nan"),
    }


def run(args: argparse.Namespace) -> Dict[str, object]:
    rng = np.random.default_rng(args.seed)
    rows = load_rows(args.probe, args.images, rng)
    scenes = [r["scene"] for r in rows]
    chance = chance_correctness(scenes)
    client = Client(args.url, model=args.model, pin_digest="first")
    client.wait_ready(timeout=120)
    ids = client.register_images([args.probe.parent / r["image"] for r in rows])
    # What befit gives each scene's own facts, worded as the policy would:
    # a policy whose reward passes this has found the reward model's errors.
    truth = [render(true_action(s)) for s in scenes]
    true_reward = client.rewards(ids, [[t] for t in truth], scale=args.scale).reward[:, 0]
    policy = FactorisedPolicy(len(rows), rng, lr=args.lr)
    history: List[Dict[str, float]] = []
    model = None
    started = time.monotonic()
    request_seconds = 0.0
    print(
        f"{len(rows)} images, {args.samples} samples each, baseline {args.baseline}, scale {args.scale}; "
        f"chance of a correct caption {chance:.4f}"
    )
    for step in range(args.steps + 1):
        actions = policy.sample(args.samples, rng)
        captions = [[render(a) for a in per_image] for per_image in actions]
        greedy = [render(a) for a in policy.greedy()]
        t0 = time.monotonic()
        out = client.rewards(ids, captions, scale=args.scale, baseline=args.baseline, greedy=greedy)
        request_seconds += time.monotonic() - t0
        model = out.model
        g = correctness(greedy, scenes, list(range(len(scenes))))
        s = correctness(
            [c for caps in captions for c in caps],
            [sc for sc in scenes for _ in range(args.samples)],
            [i for i in range(len(scenes)) for _ in range(args.samples)],
        )
        history.append(
            {
                "step": step,
                "seconds": time.monotonic() - started,
                "reward": float(out.reward.mean()),
                "greedy_reward": float(np.nanmean(out.greedy_reward)),
                "true_reward": float(true_reward.mean()),
                "greedy_correct": g["correct"],
                "greedy_count": g["count"],
                "greedy_pieces": g["pieces"],
                "greedy_relation": g["relation"],
                "greedy_size_colour": g["size_colour"],
                "sample_correct": s["correct"],
            }
        )
        h = history[-1]
        if step % args.every == 0 or step == args.steps:
            print(
                f"step {step:4d}  {h['seconds']:6.1f}s  reward {h['reward']:.4f}  greedy reward {h['greedy_reward']:.4f}  "
                f"greedy correct {h['greedy_correct']:.3f} (count {h['greedy_count']:.2f}, pieces {h['greedy_pieces']:.2f}, "
                f"size+colour {h['greedy_size_colour']:.2f}, relation {h['greedy_relation']:.2f})  "
                f"sampled correct {h['sample_correct']:.3f}",
                flush=True,
            )
        if step == args.steps:
            break  # the last round only measures the final policy
        adv = np.asarray(out.advantage, dtype=np.float64)
        if not args.no_normalise:
            adv = adv / (adv.std() + 1e-8)
        grad = policy.gradient(actions, adv)
        if args.entropy:
            grad += args.entropy * policy.entropy_gradient()
        policy.step(grad)
    elapsed = time.monotonic() - started
    final_ok = np.array([judge(c, s).correct for c, s in zip(greedy, scenes)])
    above = out.greedy_reward > true_reward + 1e-6
    summary = {
        "model": None if model is None else {"id": model.id, "digest": model.digest},
        "images": len(rows),
        "samples": args.samples,
        "baseline": args.baseline,
        "scale": args.scale,
        "steps": args.steps,
        "seconds": elapsed,
        "request_seconds": request_seconds,
        "chance": chance,
        "greedy_correct_start": history[0]["greedy_correct"],
        "greedy_correct_end": history[-1]["greedy_correct"],
        # First step (and its second) at which greedy correctness reached each level.
        "steps_to": {
            str(level): next(
                ([h["step"], round(h["seconds"], 1)] for h in history if h["greedy_correct"] >= level), None
            )
            for level in (0.05, 0.1, 0.15, 0.25, 0.5)
        },
        "retries": client.transport.retries_done,
        "true_caption_reward": float(true_reward.mean()),
        # Images whose wrong greedy caption befit rewards above the true one.
        "wrong_above_truth": float((above & ~final_ok).mean()),
    }
    print(
        f"done: {args.steps} steps in {elapsed:.1f}s ({request_seconds:.1f}s waiting for befit, "
        f"{client.transport.retries_done} retries); greedy correctness {summary['greedy_correct_start']:.3f} -> "
        f"{summary['greedy_correct_end']:.3f} (chance {chance:.4f}); reached "
        + ", ".join(f"{k} at step {v[0]} ({v[1]}s)" if v else f"{k} never" for k, v in summary["steps_to"].items())
        + f"; reward model {model.id if model else '?'} {model.digest[:12] if model else ''}"
    )
    print(
        f"greedy reward {history[-1]['greedy_reward']:.4f} vs {summary['true_caption_reward']:.4f} for the true captions; "
        f"on {summary['wrong_above_truth']:.0%} of the images befit rewards the wrong greedy caption above the true one "
        "(errors of the reward model, not of the loop)"
    )
    plot(history, chance, args)
    if args.log is not None:
        args.log.write_text(json.dumps({"summary": summary, "history": history}, indent=1))
    return summary


def plot(history: List[Dict[str, float]], chance: float, args: argparse.Namespace) -> None:
    steps = np.array([h["step"] for h in history])
    series = {k: np.array([h[k] for h in history]) for k in history[0]}
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        plain_plot(
            steps,
            [series["reward"], series["greedy_reward"], series["true_reward"]],
            [series["greedy_correct"], series["sample_correct"]],
            args.plot,
        )
        print(f"wrote {args.plot} (matplotlib not installed: curves only, no text)")
        return
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(7, 7), sharex=True)
    top.plot(steps, series["reward"], label="sampled captions (mean)")
    top.plot(steps, series["greedy_reward"], label="greedy caption (mean)")
    top.plot(steps, series["true_reward"], "--", color="grey", label="true captions (mean)")
    top.set_ylabel(f"befit reward ({args.scale})")
    top.legend(loc="lower right")
    top.grid(alpha=0.3)
    bottom.plot(steps, series["greedy_correct"], label="greedy caption correct")
    bottom.plot(steps, series["sample_correct"], label="sampled caption correct")
    bottom.plot(steps, series["greedy_count"], ":", label="greedy: count right")
    bottom.plot(steps, series["greedy_pieces"], ":", label="greedy: pieces present (size, colour, shape)")
    bottom.plot(steps, series["greedy_size_colour"], ":", label="greedy: size and colour of pieces present")
    bottom.plot(steps, series["greedy_relation"], ":", label="greedy: relation right (when stated)")
    bottom.axhline(chance, color="grey", linestyle="--", label=f"chance ({chance:.4f})")
    bottom.set_ylim(-0.02, 1.02)
    bottom.set_xlabel("policy step")
    bottom.set_ylabel("share of captions (judged by scene facts)")
    bottom.legend(loc="upper left", fontsize=8)
    bottom.grid(alpha=0.3)
    fig.suptitle(f"blocks world, {args.images} images x {args.samples} samples, baseline {args.baseline}", fontsize=11)
    fig.tight_layout()
    fig.savefig(args.plot, dpi=100)
    plt.close(fig)
    print(f"wrote {args.plot}")


def plain_plot(steps: np.ndarray, top: List[np.ndarray], bottom: List[np.ndarray], path: Path) -> None:
    """Two panels of polylines on white, drawn with numpy: no labels."""
    w, h, pad = 640, 240, 12
    colours = [(31, 119, 180), (255, 127, 14), (128, 128, 128)]
    img = np.full((2 * h, w, 3), 255, dtype=np.uint8)
    for panel, curves in enumerate((top, bottom)):
        y0 = panel * h
        img[y0 + pad, pad : w - pad] = img[y0 + h - pad, pad : w - pad] = 0
        img[y0 + pad : y0 + h - pad, pad] = img[y0 + pad : y0 + h - pad, w - pad] = 0
        values = np.concatenate(curves)
        lo, hi = (0.0, 1.0) if panel == 1 else (float(np.nanmin(values)), float(np.nanmax(values)))
        span = max(hi - lo, 1e-9)
        xs = pad + (steps - steps.min()) / max(1, steps.max() - steps.min()) * (w - 2 * pad - 1)
        for c, ys in enumerate(curves):
            py = y0 + h - pad - (np.nan_to_num(ys, nan=lo) - lo) / span * (h - 2 * pad - 1)
            for i in range(len(xs) - 1):
                n = int(max(abs(xs[i + 1] - xs[i]), abs(py[i + 1] - py[i]))) + 1
                for t in np.linspace(0, 1, n + 1):
                    x = int(round(xs[i] + t * (xs[i + 1] - xs[i])))
                    y = int(round(py[i] + t * (py[i + 1] - py[i])))
                    img[max(0, y - 1) : y + 1, max(0, x - 1) : x + 1] = colours[c % len(colours)]
    path.write_bytes(encode_png(img))


if __name__ == "__main__":
    run(parse_args(sys.argv[1:]))
