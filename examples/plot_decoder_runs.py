#!/usr/bin/env python3
"""Plot runs of examples/blocks_decoder.py side by side: reward, cosine (the
reward before any guard term), judged correctness on held-out probe scenes,
repeated-word share and distinct-2 per step, with the steps on which befit's
run watch warned marked.

    python examples/plot_decoder_runs.py docs/blocks_decoder/*.json --out docs/blocks_decoder.png
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("logs", nargs="+", type=Path)
    p.add_argument("--out", type=Path, required=True)
    args = p.parse_args()
    panels = [
        ("reward", "reward (befit, mean of samples)"),
        ("cosine", "cosine (befit, mean of samples)"),
        ("fluency", "fluency (blocks-v1 head, mean of samples)"),
        ("correct", "greedy captions judged correct (probe)"),
        ("repeated_words", "repeated-word share (samples)"),
        ("distinct_2", "distinct-2 (samples)"),
    ]
    fig, grid = plt.subplots(2, 3, figsize=(13, 7))
    axes = grid.ravel()
    for log in args.logs:
        doc = json.loads(log.read_text())
        h = doc["history"]
        name = doc["args"]["run"]
        steps = [r["step"] for r in h]
        for ax, (key, title) in zip(axes, panels):
            line = ax.plot(steps, [r[key] for r in h], label=name)[0]
            warned = [r for r in h if r["warnings"]]
            ax.plot(
                [r["step"] for r in warned],
                [r[key] for r in warned],
                "x",
                color=line.get_color(),
                ms=4,
                label=f"{name}: run watch warned" if key == "reward" else None,
            )
            ax.set_title(title, fontsize=9)
            ax.set_xlabel("step")
    axes[0].legend(fontsize=7)
    fig.tight_layout()
    args.out.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(args.out, dpi=90)


if __name__ == "__main__":
    main()
