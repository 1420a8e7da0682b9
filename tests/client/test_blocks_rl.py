"""The RL example end to end: a short run against the real befit must learn
captions that the scene facts judge correct far more often than chance."""

from __future__ import annotations

import json
import os
import subprocess
import sys

from conftest import PROBE_DIR, REPO


def test_short_run_learns_correct_captions_from_befit(befit, tmp_path):
    log, plot = tmp_path / "run.json", tmp_path / "run.png"
    env = dict(os.environ, PYTHONPATH=str(REPO / "clients/python/src"))
    cmd = [
        sys.executable,
        str(REPO / "examples/blocks_rl.py"),
        "--url", befit.url,
        "--probe", str(PROBE_DIR / "probe.jsonl"),
        "--images", "40",
        "--steps", "60",
        "--samples", "8",
        "--seed", "3",
        "--plot", str(plot),
        "--log", str(log),
    ]  # fmt: skip
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    summary = json.loads(log.read_text())["summary"]
    history = json.loads(log.read_text())["history"]
    assert len(history) == 61 and summary["model"]["id"] == "blocks@v1"
    assert summary["chance"] < 0.01
    assert summary["greedy_correct_start"] < 0.1
    assert summary["greedy_correct_end"] >= 0.3, done.stdout[-2000:]
    # Rewards rose with correctness: the policy followed befit, not noise.
    assert history[-1]["reward"] > history[0]["reward"] + 0.05
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "greedy correctness" in done.stdout
