"""The RL example end to end: a short run against the real befit must learn
captions that the scene facts judge correct far more often than chance."""

from __future__ import annotations

import json
import os
import subprocess
import sys

from .client_env import PROBE_DIR, REPO


def test_short_run_learns_correct_captions_from_befit(befit, tmp_path):
    log, plot = tmp_path / "run.json", tmp_path / "run.png"
    env = dict(os.environ, PYTHONPATH=str(REPO / "clients/python/src"))
    cmd = [
        sys.executable,
        str(REPO / "examples/blocks_rl.py"),
        "--url", befit.url,
        "--probe", str(PROBE_DIR / "probe.jsonl"),
        "--images", "60",
        "--steps", "100",
        "--samples", "8",
        "--lr", "0.1",
        "--seed", "3",
        "--plot", str(plot),
        "--log", str(log),
    ]  # fmt: skip
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    summary = json.loads(log.read_text())["summary"]
    history = json.loads(log.read_text())["history"]
    assert len(history) == 101 and summary["model"]["id"] == "blocks@v1"
    assert summary["chance"] < 0.01 and summary["greedy_correct_start"] < 0.05
    # Whole captions right far above chance. The ceiling is the reward
    # model's: blocks-v1 tells shapes apart less well than colours and sizes.
    assert summary["greedy_correct_end"] >= max(0.05, 20 * summary["chance"]), done.stdout[-2000:]
    last = history[-1]
    assert last["greedy_count"] >= 0.8  # chance 1/3
    assert last["greedy_size_colour"] >= 0.7  # about 0.2 at the start
    # The policy followed befit's reward, not noise.
    assert last["reward"] > history[0]["reward"] + 0.5
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "greedy correctness" in done.stdout
