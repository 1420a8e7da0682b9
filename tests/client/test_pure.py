"""The client's pure parts: backoff schedule, Retry-After, chunking, error
parsing and the shaping of answers into arrays."""

from __future__ import annotations

import email.utils
import json
import random
import socket

import numpy as np
import pytest
from befit_client import (
    ApiError,
    InvalidFieldError,
    Limits,
    OverloadedError,
    ProtocolError,
    RequestTooLargeError,
    RetryPolicy,
    UnknownModelError,
    clip_s,
    parse_retry_after,
    scale_json,
)
from befit_client.client import check_reward_args
from befit_client.chunking import (
    group_captions,
    json_size,
    plan_image_chunks,
    plan_reward_chunks,
    split,
)
from befit_client.errors import from_response
from befit_client.results import assemble_rewards

# -- backoff --------------------------------------------------------------


def test_backoff_doubles_up_to_the_cap():
    p = RetryPolicy(initial_delay=0.1, multiplier=2.0, max_delay=1.0)
    assert [round(p.backoff(n), 6) for n in range(1, 7)] == [0.1, 0.2, 0.4, 0.8, 1.0, 1.0]


def test_jitter_stays_within_its_fraction():
    p = RetryPolicy(initial_delay=1.0, multiplier=2.0, max_delay=100.0, jitter=0.5)
    rng = random.Random(7)
    waits = [p.delay(3, None, rng) for _ in range(2000)]
    assert min(waits) >= 2.0 and max(waits) <= 4.0
    # Spread over the range, not a constant: the point of jitter.
    assert max(waits) - min(waits) > 1.5


def test_retry_after_is_a_floor_with_a_little_spread():
    p = RetryPolicy(initial_delay=0.1, jitter=0.5)
    rng = random.Random(3)
    waits = [p.delay(1, 2.0, rng) for _ in range(1000)]
    assert min(waits) >= 2.0
    assert max(waits) <= 2.0 * (1 + 0.25 * 0.5)
    assert len(set(waits)) > 100


def test_no_jitter_gives_the_exact_schedule():
    p = RetryPolicy(initial_delay=0.5, multiplier=3.0, max_delay=10.0, jitter=0.0)
    assert p.delay(2, None, random.Random()) == pytest.approx(1.5)
    assert p.delay(2, 4.0, random.Random()) == pytest.approx(4.0)


def test_policy_rejects_nonsense():
    with pytest.raises(ValueError):
        RetryPolicy(max_attempts=0)
    with pytest.raises(ValueError):
        RetryPolicy(jitter=1.5)


def test_parse_retry_after_forms():
    assert parse_retry_after("3") == 3.0
    assert parse_retry_after(" 0 ") == 0.0
    assert parse_retry_after(None) is None
    assert parse_retry_after("soon") is None
    # RFC 9110 10.2.3: an HTTP-date is also allowed.
    now = 1_700_000_000.0
    date = email.utils.formatdate(now + 30, usegmt=True)
    assert parse_retry_after(date, now=now) == pytest.approx(30.0, abs=1.0)
    assert parse_retry_after(email.utils.formatdate(now - 30, usegmt=True), now=now) == 0.0


# -- errors -------------------------------------------------------------------


def test_error_body_becomes_a_typed_error():
    body = json.dumps(
        {
            "error": {
                "code": "invalid_field",
                "message": "groups[3].captions must not be empty",
                "field": "groups[3].captions",
            }
        }
    ).encode()
    err = from_response(400, body)
    assert isinstance(err, InvalidFieldError)
    assert (err.status, err.code, err.field) == (400, "invalid_field", "groups[3].captions")
    assert "must not be empty" in str(err) and "groups[3].captions" in str(err)


def test_overloaded_carries_retry_after_and_unknown_codes_stay_generic():
    err = from_response(503, b'{"error": {"code": "overloaded", "message": "queue full"}}', retry_after=2.0)
    assert isinstance(err, OverloadedError) and err.retry_after == 2.0 and err.field is None
    other = from_response(418, b'{"error": {"code": "teapot", "message": "short and stout"}}')
    assert type(other) is ApiError and other.code == "teapot"
    assert isinstance(from_response(404, b'{"error": {"code": "unknown_model", "message": "x"}}'), UnknownModelError)


def test_non_json_error_body_keeps_status_and_text():
    err = from_response(502, b"<html>Bad Gateway</html>")
    assert type(err) is ApiError
    assert err.code == "http_502" and "Bad Gateway" in err.message


# -- chunking ---------------------------------------------------------------


def group(n: int, greedy: bool = False, refs: int = 0, text: str = "a small red circle") -> dict:
    g = {"image": {"id": "0" * 64}, "captions": [text] * n}
    if refs:
        g["references"] = [text] * refs
    if greedy:
        g["greedy"] = text
    return g


def test_group_captions_counts_samples_references_and_greedy():
    assert group_captions(group(4)) == 4
    assert group_captions(group(4, greedy=True, refs=3)) == 8


def test_split_keeps_order_and_every_limit():
    costs = [3, 1, 4, 1, 5, 9, 2, 6]
    runs = split(costs, 3, lambda c: c, 10, lambda c: 1, 100)
    assert [i for r in runs for i in r] == list(range(len(costs)))
    for r in runs:
        assert len(r) <= 3 and sum(costs[i] for i in r) <= 10
    assert runs == [[0, 1, 2], [3, 4], [5], [6, 7]]


def test_reward_chunks_respect_groups_captions_and_bytes():
    groups = [group(5, greedy=True) for _ in range(10)]
    limits = Limits(max_groups=4, max_captions=13)
    runs = plan_reward_chunks(groups, limits)
    assert [len(r) for r in runs] == [2, 2, 2, 2, 2]  # 6 captions a group, 13 allowed
    limits = Limits(max_groups=3, max_captions=1000)
    assert [len(r) for r in plan_reward_chunks(groups, limits)] == [3, 3, 3, 1]
    size = json_size(groups[0]) + 1
    limits = Limits(max_body_bytes=int((512 + 2 * size + 5) / 0.9) + 1)
    runs = plan_reward_chunks(groups, limits)
    assert all(len(r) == 2 for r in runs)


def test_a_group_too_big_to_split_names_field_and_limit():
    with pytest.raises(RequestTooLargeError) as e:
        plan_reward_chunks([group(2), group(20)], Limits(max_captions=10))
    assert e.value.field == "groups[1].captions" and e.value.limit == "max_captions"
    with pytest.raises(RequestTooLargeError) as e:
        plan_reward_chunks([group(1, text="x" * 3000)], Limits())
    assert e.value.field == "groups[0].captions[0]" and e.value.limit == "max_caption_bytes"
    # Bytes, not characters: 700 three-byte characters are 2100 bytes.
    with pytest.raises(RequestTooLargeError):
        plan_reward_chunks([group(1, text="\u20ac" * 700)], Limits())


def test_image_chunks_respect_count_and_body():
    assert [len(r) for r in plan_image_chunks([10] * 600, Limits())] == [256, 256, 88]
    limits = Limits(max_body_bytes=int((512 + 300) / 0.9) + 1)
    runs = plan_image_chunks([100] * 7, limits)
    assert [len(r) for r in runs] == [3, 3, 1]
    with pytest.raises(RequestTooLargeError):
        plan_image_chunks([10_000], limits)


def test_scale_json_forms():
    assert scale_json("cosine") == {"kind": "cosine"}
    assert scale_json(clip_s(2.0)) == {"kind": "clip-s", "weight": 2.0}
    with pytest.raises(TypeError):
        scale_json(2.5)


# -- answers into arrays ---------------------------------------------------------


MODEL = {"id": "blocks@v1", "name": "blocks", "version": "v1", "digest": "ab" * 32}


def answer(groups):
    return {
        "model": MODEL,
        "scale": {"kind": "cosine"},
        "baseline": "none",
        "remap": None,
        "groups": [
            {
                "image": "cd" * 32,
                "samples": [{"cosine": c, "reward": c, "advantage": c - 0.1, "truncated": c > 0.5} for c in g],
                "greedy": None,
            }
            for g in groups
        ],
    }


def test_equal_groups_give_plain_arrays_across_chunks():
    out = assemble_rewards([answer([[0.1, 0.2], [0.3, 0.4]]), answer([[0.6, 0.7]])], [2, 2, 2], [False] * 3)
    assert not out.ragged and type(out.reward) is np.ndarray
    assert out.reward.shape == (3, 2)
    np.testing.assert_allclose(out.cosine[2], [0.6, 0.7])
    np.testing.assert_allclose(out.advantage[0], [0.0, 0.1], atol=1e-12)
    assert out.truncated.dtype == bool and out.truncated[2].all() and not out.truncated[0].any()
    assert np.isnan(out.greedy_reward).all()
    assert out.model.digest == "ab" * 32


def test_ragged_groups_give_masked_arrays():
    out = assemble_rewards([answer([[0.1], [0.2, 0.4, 0.6]])], [1, 3], [False, False])
    assert out.ragged and out.reward.shape == (2, 3)
    assert out.reward.mask.tolist() == [[False, True, True], [False, False, False]]
    np.testing.assert_allclose(out.reward.mean(axis=1), [0.1, 0.4])
    np.testing.assert_allclose(out.group(1).reward, [0.2, 0.4, 0.6])
    assert out.group(0).reward.shape == (1,)
    np.testing.assert_array_equal(out.lengths, [1, 3])


def test_answers_missing_samples_or_groups_are_refused():
    with pytest.raises(ProtocolError, match="2 captions"):
        assemble_rewards([answer([[0.1]])], [2], [False])
    with pytest.raises(ProtocolError, match="groups"):
        assemble_rewards([answer([[0.1]])], [1, 1], [False, False])
    with pytest.raises(ProtocolError, match="greedy"):
        assemble_rewards([answer([[0.1]])], [1], [True])


def test_a_bare_string_is_refused_before_anything_is_sent():
    # One path string would otherwise be iterated character by character.
    with pytest.raises(TypeError, match="images is a single str"):
        check_reward_args("images/00000.png", [["a small green circle"]], "none", None, None)
    with pytest.raises(TypeError, match="captions is a single str"):
        check_reward_args(["images/00000.png"], "a small green circle", "none", None, None)
    with pytest.raises(TypeError, match=r"captions\[0\] is a string"):
        check_reward_args(["a.png"], ["a small green circle"], "none", None, None)


def _closed_port() -> int:
    # A port the kernel just handed out and that nothing listens on any more.
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_a_refused_first_connection_fails_at_once_with_a_hint():
    from befit_client import TransportError
    from befit_client.transport import Transport

    waits = []
    transport = Transport(f"http://127.0.0.1:{_closed_port()}", sleep=waits.append)
    with pytest.raises(TransportError, match="connection refused: is befit running"):
        transport.request("GET", "/v1/models")
    assert waits == [] and transport.requests_sent == 1


def test_refusals_are_retried_and_logged_when_the_policy_says_so(caplog):
    from befit_client import TransportError
    from befit_client.transport import Transport

    waits = []
    policy = RetryPolicy(max_attempts=3, initial_delay=0.5, jitter=0.0, retry_refused_at_first=True)
    transport = Transport(f"http://127.0.0.1:{_closed_port()}", retry=policy, sleep=waits.append)
    with caplog.at_level("WARNING", logger="befit_client"):
        with pytest.raises(TransportError, match="failed after 3 attempt"):
            transport.request("GET", "/v1/models")
    assert waits == [0.5, 1.0]
    retries = [r.getMessage() for r in caplog.records if r.name == "befit_client"]
    assert len(retries) == 2
    assert all("connection refused" in m for m in retries)
    assert "retry 1 of 2 in 0.50 s" in retries[0] and "retry 2 of 2 in 1.00 s" in retries[1]
