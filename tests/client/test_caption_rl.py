"""The token-level RL loop of examples/caption_rl.py (the loop that
examples/blocks_decoder.py runs with PyTorch) with its numpy policy, a few
steps against the real befit: the run watch must record exactly what the
loop sent (its aggregates against the loop's own computation, Li et al.
2016 for distinct-2), and a deliberately repetitive batch must be flagged."""

from __future__ import annotations

import json

import numpy as np
import pytest

from befit_client import Client

from caption_rl import PositionalPolicy, detokenize, rl_step, text_stats

from .client_env import BUNDLE, PROBE_DIR


def test_detokenize_attaches_punctuation():
    assert detokenize(["two", "shapes", ":", "a", "red", "cube", ",", "a"]) == "two shapes: a red cube, a"


def test_text_stats_by_hand():
    s = text_stats(["red red red red", "a big cube"])
    # Repeated words 3/4 and 0; bigrams (red red) x3 + (a big) (big cube): 3 distinct of 5.
    assert s["repeated_words"] == pytest.approx(0.375)
    assert s["distinct_2"] == pytest.approx(3 / 5)
    assert s["distinct_1"] == pytest.approx(4 / 7)


def test_numpy_loop_is_recorded_by_the_run_watch(befit, probe_rows):
    vocab = list(json.loads((BUNDLE / "tokenizer.json").read_text())["model"]["vocab"])[2:]  # no [PAD], [UNK]
    images = [PROBE_DIR / r["image"] for r in probe_rows[:6]]
    rng = np.random.default_rng(7)
    policy = PositionalPolicy(vocab, 8, rng, lr=2.0)
    before = policy.logits.copy()
    records = []
    with Client(befit.url) as client:
        for step in range(4):
            rec = rl_step(
                client,
                policy,
                images,
                list(range(len(images))),
                4,
                rng,
                run="smoke-numpy",
                step=step,
                run_thresholds={"min_samples": 8} if step == 0 else None,
            )
            records.append(rec)
        # The policy learned from befit's advantages.
        assert np.abs(policy.logits - before).max() > 1e-3
        series = {s["step"]: s for s in client.run("smoke-numpy")["series"]}
        assert sorted(series) == [0, 1, 2, 3]
        for rec in records:
            s = series[rec["step"]]
            assert s["samples"] == rec["samples"] == 24
            assert s["reward"]["mean"] == pytest.approx(rec["reward"], abs=1e-6)
            assert s["reward"]["std"] == pytest.approx(rec["reward_std"], abs=1e-5)
            assert s["repeated_words"] == pytest.approx(rec["repeated_words"], abs=1e-6)
            assert s["distinct_2"] == pytest.approx(rec["distinct_2"], abs=1e-12)
            assert s["mean_words"] == pytest.approx(rec["mean_words"], abs=1e-12)

        # A collapsed policy: every sample the same repetitive caption.
        class Collapsed:
            def sample(self, groups, k, rng):
                return [["red cube red cube red cube red cube"] * k for _ in groups], None

        rec = rl_step(client, Collapsed(), images, list(range(6)), 4, rng, run="smoke-numpy", step=4, learn=False)
        # Repeated words 6/8 > 0.3; distinct-2 2/168 < 0.1 (the documented defaults).
        assert rec["repeated_words"] == pytest.approx(0.75)
        assert rec["distinct_2"] == pytest.approx(2 / 168)
        assert {"repeated_words", "distinct_2"} <= set(rec["warnings"])
