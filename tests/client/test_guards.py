"""Reward guards and the run watch against the real `befit serve`, every
signal recomputed here independently of befit's Rust code:

- words with Python's `re` (runs of Unicode letters and digits), the
  repeated-word share as (n - distinct) / n (an earlier equal word exists
  for every occurrence but the first), bigrams likewise;
- tokens and unknown tokens from the bundle's `tokenizer.json` read as data
  (its Lowercase normalizer, its Whitespace pre-tokenizer pattern
  `\\w+|[^\\w\\s]+` from the `tokenizers` documentation, its WordLevel vocab);
- cosines, CLIP-S (Hessel et al. 2021, eq. 1) and the mean-of-others
  baseline (Luo 2020) with numpy from `/v1/vectors`;
- distinct-n (Li et al. 2016: distinct n-grams / all n-grams) with Python
  sets, reward mean and spread with numpy (`np.std`, ddof = 0);
- the fluency probability by running the bundle's `[fluency]` graph with
  the onnxruntime Python package on ids tokenised here, and the combined
  reward `CLIP-S + lambda * fluency` (Cho et al. 2022) with numpy.
"""

from __future__ import annotations

import json
import re
import tomllib
import urllib.request

import numpy as np
import pytest
from befit_client import Client, InvalidFieldError, clip_s

from .client_env import BUNDLE, PROBE_DIR, BefitProcess

GUARD = {
    "nearest_bank": True,
    "penalties": {
        "repeated_words": {"above": 0.25, "weight": 2.0},
        "repeated_bigrams": {"above": 0.1, "weight": 1.0},
        "unknown_tokens": {"above": 0.0, "weight": 0.5},
        "bank_cosine": {"above": 0.9, "weight": 1.5},
        "length": {"below": 6, "weight": 1.0},
    },
}

BANK = ["a big yellow square", "three objects on the table", "a little blue hoop and a red cross"]


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("befit-guards")
    proc = BefitProcess(BUNDLE, tmp / "data", tmp / "befit.log")
    yield proc
    proc.stop()


@pytest.fixture(scope="module")
def client(server):
    with Client(server.url) as c:
        yield c


def words(text):
    return re.findall(r"[^\W_]+", text.lower())


def repeated_share(items):
    return 0.0 if not items else (len(items) - len(set(items))) / len(items)


def tokenizer():
    doc = json.loads((BUNDLE / "tokenizer.json").read_text())
    assert doc["normalizer"]["type"] == "Lowercase" and doc["pre_tokenizer"]["type"] == "Whitespace"
    assert doc["model"]["type"] == "WordLevel" and doc["post_processor"] is None
    return set(doc["model"]["vocab"]), doc["model"]["unk_token"]


def tokens(text, vocab):
    pieces = re.findall(r"\w+|[^\w\s]+", text.lower())
    return len(pieces), sum(p not in vocab for p in pieces)


def penalty_of(rw, rb, n_tokens, unknown, bank_cos):
    p = GUARD["penalties"]
    total, flags = 0.0, []
    for name, value in (
        ("repeated_words", rw),
        ("repeated_bigrams", rb),
        ("unknown_tokens", unknown),
        ("bank_cosine", bank_cos),
    ):
        rule = p[name]
        if value is not None and value > rule["above"]:
            total += rule["weight"] * (value - rule["above"]) / (1 - rule["above"])
            flags.append(name)
    if n_tokens < p["length"]["below"]:
        total += p["length"]["weight"] * (p["length"]["below"] - n_tokens) / p["length"]["below"]
        flags.append("length")
    return total, flags


def test_signals_and_guarded_rewards_match_an_independent_computation(server, client, probe_rows):
    request = urllib.request.Request(
        f"{server.url}/v1/bank",
        data=json.dumps({"captions": BANK}).encode(),
        headers={"content-type": "application/json"},
    )
    with urllib.request.urlopen(request) as r:
        assert r.status == 200
    rows = probe_rows[:4]
    captions = [
        [rows[0]["captions"][0], "cross cross cross cross cross", "a big yellow square"],
        [rows[1]["captions"][1], "a zorb zorb triangle, a zorb", rows[1]["contrasts"][0]["caption"]],
        [rows[2]["captions"][2], "blue blue ring ring blue ring", "two"],
        [rows[3]["captions"][0], rows[3]["captions"][3], "the the the"],
    ]
    images = [PROBE_DIR / r["image"] for r in rows]
    out = client.rewards(images, captions, scale=clip_s(2.5), baseline="mean-of-others", guard=GUARD)
    assert out.guard["penalties"] == GUARD["penalties"]
    flat = [c for g in captions for c in g]
    v = client.vectors(images, flat + BANK)
    text_vecs = v.texts[: len(flat)].reshape(len(rows), 3, -1)
    bank_vecs = v.texts[len(flat) :]
    vocab, _ = tokenizer()
    rewards = np.zeros((len(rows), 3))
    for g in range(len(rows)):
        for j, text in enumerate(captions[g]):
            s = out.signals[g][j]
            w = words(text)
            rw = repeated_share(w)
            rb = repeated_share(list(zip(w, w[1:])))
            n_tokens, n_unknown = tokens(text, vocab)
            unknown = n_unknown / n_tokens
            bank_cos = float(np.max(bank_vecs @ text_vecs[g, j]))
            assert s["repeated_words"] == pytest.approx(rw, abs=1e-6), text
            assert s["repeated_bigrams"] == pytest.approx(rb, abs=1e-6), text
            assert s["tokens"] == n_tokens, text
            assert s["unknown_tokens"] == pytest.approx(unknown, abs=1e-6), text
            assert s["bank_cosine"] == pytest.approx(bank_cos, abs=1e-4), text
            penalty, flags = penalty_of(rw, rb, n_tokens, unknown, bank_cos)
            assert s["penalty"] == pytest.approx(penalty, abs=1e-4), text
            assert s["flagged"] == flags, text
            cosine = float(v.images[g] @ text_vecs[g, j])
            rewards[g, j] = 2.5 * max(cosine, 0.0) - penalty
    np.testing.assert_allclose(out.reward, rewards, atol=1e-4)
    baseline = (rewards.sum(axis=1, keepdims=True) - rewards) / 2
    np.testing.assert_allclose(out.advantage, rewards - baseline, atol=1e-4)
    # "a big yellow square" is a bank caption: cosine 1, flagged.
    assert out.signals[0][2]["bank_cosine"] == pytest.approx(1.0, abs=1e-5)


def fluency_by_onnxruntime(texts):
    """The bundle's fluency head run with onnxruntime on ids made here from tokenizer.json."""
    import onnxruntime as ort

    manifest = tomllib.loads((BUNDLE / "bundle.toml").read_text())
    head, text = manifest["fluency"], manifest["text"]
    doc = json.loads((BUNDLE / "tokenizer.json").read_text())
    vocab, unk = doc["model"]["vocab"], doc["model"]["vocab"][doc["model"]["unk_token"]]
    rows = [[vocab.get(p, unk) for p in re.findall(r"\w+|[^\w\s]+", t.lower())][: text["max_tokens"]] for t in texts]
    width = max(len(r) for r in rows)
    ids = np.full((len(rows), width), text["pad_id"], dtype=np.int64)
    mask = np.zeros((len(rows), width), dtype=np.int64)
    for i, r in enumerate(rows):
        ids[i, : len(r)], mask[i, : len(r)] = r, 1
    session = ort.InferenceSession(str(BUNDLE / head["file"]), providers=["CPUExecutionProvider"])
    return session.run([head["output"]], {head["ids_input"]: ids, head["mask_input"]: mask})[0]


def test_fluency_term_matches_an_onnxruntime_run_of_the_head(client, probe_rows):
    rows = probe_rows[8:10]
    captions = [
        [rows[0]["captions"][0], rows[0]["captions"][0] + " " + rows[0]["captions"][0], "a big big big red"],
        [rows[1]["captions"][1], "ring the is small a", rows[1]["captions"][2].rsplit(" ", 3)[0]],
    ]
    images = [PROBE_DIR / r["image"] for r in rows]
    lam = 0.6
    out = client.rewards(images, captions, scale=clip_s(2.5), baseline="mean-of-others", guard={"fluency_weight": lam})
    assert out.guard["fluency_weight"] == pytest.approx(lam)
    flat = [c for g in captions for c in g]
    want = fluency_by_onnxruntime(flat).reshape(len(rows), 3)
    got = np.array([[s["fluency"] for s in g] for g in out.signals])
    np.testing.assert_allclose(got, want, atol=1e-5)
    # True captions are well-formed; doubled, stuttered, shuffled or cut ones are not.
    assert (want[:, 0] > 0.9).all() and (want[:, 1:] < 0.1).all(), want
    v = client.vectors(images, flat)
    cos = np.einsum("gd,gjd->gj", v.images, v.texts.reshape(len(rows), 3, -1))
    rewards = 2.5 * np.maximum(cos, 0.0) + lam * want
    np.testing.assert_allclose(out.reward, rewards, atol=1e-4)
    baseline = (rewards.sum(axis=1, keepdims=True) - rewards) / 2
    np.testing.assert_allclose(out.advantage, rewards - baseline, atol=1e-4)


def test_run_watch_aggregates_match_an_independent_computation(client, probe_rows):
    rows = probe_rows[4:8]
    images = [PROBE_DIR / r["image"] for r in rows]
    sent, rewards = {}, {}
    for step in range(3):
        # Later steps degenerate: the policy's captions collapse to one phrase.
        captions = [
            r["captions"][:3] if step == 0 else ["a big cube a big cube a big cube"] * 2 + [r["captions"][0]]
            for r in rows
        ]
        out = client.rewards(
            images,
            captions,
            scale=clip_s(),
            run="py-run",
            step=step,
            run_thresholds={"min_samples": 4} if step == 0 else None,
        )
        assert out.run == {"name": "py-run", "step": step, "step_samples": 12}
        sent[step] = [c for g in captions for c in g]
        rewards[step] = np.asarray(out.reward).ravel()
        signals = {w["signal"] for w in out.warnings}
        if step == 0:
            assert signals == set()
        else:
            # Mean repeated-word share (2 * 6/9 + x) / 3 > 0.3 for every x >= 0.
            assert "repeated_words" in signals and "repeated_bigrams" in signals
    run = client.run("py-run")
    assert [s["step"] for s in run["series"]] == [0, 1, 2]
    for s in run["series"]:
        texts, r = sent[s["step"]], rewards[s["step"]]
        ws = [words(t) for t in texts]
        unigrams = [u for w in ws for u in w]
        bigrams = [b for w in ws for b in zip(w, w[1:])]
        assert s["samples"] == len(texts)
        assert s["reward"]["mean"] == pytest.approx(float(np.mean(r)), abs=1e-6)
        assert s["reward"]["std"] == pytest.approx(float(np.std(r)), abs=1e-5)
        assert s["distinct_1"] == pytest.approx(len(set(unigrams)) / len(unigrams), abs=1e-12)
        assert s["distinct_2"] == pytest.approx(len(set(bigrams)) / len(bigrams), abs=1e-12)
        assert s["vocabulary"] == len(set(unigrams))
        assert s["repeated_words"] == pytest.approx(np.mean([repeated_share(w) for w in ws]), abs=1e-6)
        bi = [repeated_share(list(zip(w, w[1:]))) for w in ws]
        assert s["repeated_bigrams"] == pytest.approx(np.mean(bi), abs=1e-6)
        assert s["mean_words"] == pytest.approx(len(unigrams) / len(texts), abs=1e-12)
    assert client.run("py-run", from_step=1, to_step=1)["series"][0]["step"] == 1
    assert any(r["name"] == "py-run" for r in client.runs())


def test_run_arguments_are_checked(client, probe_rows):
    image = [PROBE_DIR / probe_rows[0]["image"]]
    with pytest.raises(ValueError):
        client.rewards(image, [["a red ring"]], run="r")
    with pytest.raises(ValueError):
        client.rewards(image, [["a red ring"]], run="r", step=-1)
    with pytest.raises(InvalidFieldError) as e:
        client.rewards(image, [["a red ring"]], run="bad name", step=0)
    assert e.value.field == "run"
