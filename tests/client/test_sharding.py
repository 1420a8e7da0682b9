"""The sharded client: rendezvous routing (its defining properties), and
failover against the real server, a dead address and a stub that sheds.
tests/cluster/ runs it against a real cluster of replicas."""

from __future__ import annotations

import hashlib
from collections import Counter
from typing import Iterator, List, Sequence

import pytest
from befit_client import (
    Client,
    Limits,
    ModelMismatchError,
    RetryPolicy,
    ServerPath,
    ShardedClient,
    TransportError,
    content_id,
    rendezvous_order,
    replica_urls,
)
from befit_client.sharding import rendezvous_weight

from .client_env import PROBE_DIR, free_port
from .test_retries import Stub

REPLICAS = [f"http://10.0.0.{i}:7878" for i in range(1, 6)]
KEYS = [hashlib.sha256(str(i).encode()).hexdigest() for i in range(3000)]


def owners(replicas: List[str]) -> List[str]:
    return [rendezvous_order(k, replicas)[0] for k in KEYS]


def test_the_weight_is_the_first_eight_bytes_of_sha256():
    # The definition, computed with hashlib directly.
    want = int.from_bytes(hashlib.sha256(b"http://a:1\0key").digest()[:8], "big")
    assert rendezvous_weight("http://a:1", "key") == want
    order = rendezvous_order("key", ["http://a:1", "http://b:2", "http://c:3"])
    weights = [rendezvous_weight(r, "key") for r in order]
    assert weights == sorted(weights, reverse=True)


def test_removing_a_replica_moves_only_its_own_keys():
    # Highest random weight (Thaler and Ravishankar 1996): a key's ranking of
    # the other replicas does not depend on the one removed.
    before = owners(REPLICAS)
    after = owners(REPLICAS[:2] + REPLICAS[3:])
    moved = [k for k, b, a in zip(KEYS, before, after) if b != a]
    assert moved and all(b == REPLICAS[2] for b, a in zip(before, after) if b != a)
    # ... and each moved key goes to its second choice.
    for k, b, a in zip(KEYS, before, after):
        if b != a:
            assert a == rendezvous_order(k, REPLICAS)[1]


def test_adding_a_replica_moves_keys_only_onto_it():
    before = owners(REPLICAS[:4])
    after = owners(REPLICAS)
    assert all(a == REPLICAS[4] for b, a in zip(before, after) if b != a)


def test_keys_spread_evenly():
    counts = Counter(owners(REPLICAS))
    # 3000 keys over 5 replicas: 600 each expected, binomial sd ~22; the
    # bounds are over 4 sd away (common practice for a deterministic sample).
    assert set(counts) == set(REPLICAS)
    assert all(500 <= n <= 700 for n in counts.values()), counts


def images(n: int, spread_over: Sequence[str] = ()) -> List[bytes]:
    """The first ``n`` probe images, and more until every replica of
    ``spread_over`` owns one (replica URLs carry random free ports)."""
    out: List[bytes] = []
    for i in range(1000):
        out.append((PROBE_DIR / f"images/{i:05d}.png").read_bytes())
        owned = {rendezvous_order(str(content_id(b)), list(spread_over))[0] for b in out} if spread_over else set()
        if len(out) >= n and owned == set(spread_over):
            return out
    raise AssertionError("the probe images do not reach every replica")


CAPTIONS = ["a large purple cross", "two pieces on the table", "a small red circle"]


def test_a_dead_replica_is_passed_over_and_answers_match_one_server(befit):
    dead = f"http://127.0.0.1:{free_port()}"
    imgs = images(12, [dead, befit.url])
    caps = [CAPTIONS] * len(imgs)
    want = Client(befit.url).rewards(imgs, caps, baseline="mean-of-others")
    now = [100.0]
    sc = ShardedClient([dead, befit.url], down_for=5.0, clock=lambda: now[0])
    got = sc.rewards(imgs, caps, baseline="mean-of-others")
    assert got.reward.tolist() == want.reward.tolist()
    assert got.image_ids == want.image_ids
    assert sc.failovers == 1 and sc.is_down(dead)
    # While it is down, its keys go straight to the next replica.
    sc.rewards(imgs, caps)
    assert sc.failovers == 1
    # Once down_for has passed it is tried again (and fails over again).
    now[0] += 5.1
    assert not sc.is_down(dead)
    sc.rewards(imgs, caps)
    assert sc.failovers == 2


@pytest.fixture
def stub(befit) -> Iterator[Stub]:
    s = Stub(befit.url)
    yield s
    s.close()


def test_a_replica_answering_503_is_failed_over(stub, befit):
    imgs = images(12, [stub.url, befit.url])
    sc = ShardedClient([stub.url, befit.url])
    stub.script = [("503", 30)] * 50
    got = sc.rewards(imgs, [CAPTIONS] * len(imgs))
    assert got.reward.shape == (len(imgs), 3)
    # The stub saw one request (its part, shed), not a retry loop on it.
    assert len(stub.seen) == 1 and sc.failovers == 1


def test_when_every_replica_fails_the_client_backs_off_in_rounds():
    dead = [f"http://127.0.0.1:{free_port()}" for _ in range(2)]
    waits: List[float] = []
    policy = RetryPolicy(max_attempts=3, initial_delay=0.5, multiplier=2.0, jitter=0.0)
    sc = ShardedClient(dead, retry=policy, sleep=waits.append)
    with pytest.raises(TransportError):
        sc.rewards(images(1), [CAPTIONS])
    # Three rounds over both replicas: two waits between them, as the policy says.
    assert waits == [0.5, 1.0]
    assert sc.failovers == 6


def test_replicas_serving_different_bundles_are_refused(befit, befit_copy):
    imgs = images(12, [befit.url, befit_copy.url])
    # befit_copy runs with --max-groups 4 (conftest).
    sc = ShardedClient([befit.url, befit_copy.url], pin_digest="first", limits=Limits(max_groups=4))
    with pytest.raises(ModelMismatchError):
        sc.rewards(imgs, [CAPTIONS[:2]] * len(imgs))


def test_a_replica_that_lost_its_images_gets_them_again(befit, befit_copy):
    imgs = images(3)
    sc = ShardedClient([befit.url], limits=Limits(max_groups=4))
    sc.register_images(imgs)
    # The replica's address now reaches a server with another data folder
    # (a pod restarted with an empty volume): it answers unknown_image.
    sc.replicas[befit.url].transport = Client(befit_copy.url).transport
    out = sc.rewards(imgs, [CAPTIONS[:2]] * 3)
    assert out.model.id == "blocks@v1-copy" and out.reward.shape == (3, 2)


def test_server_paths_route_by_path_and_bank_calls_need_a_bank_url(befit):
    sc = ShardedClient([befit.url])
    ids = sc.register_images([ServerPath("images/00000.png")])
    assert ids == [content_id((PROBE_DIR / "images/00000.png").read_bytes())]
    with pytest.raises(ValueError, match="bank_url"):
        sc.bank_info()
    with pytest.raises(ValueError, match="list of one or more"):
        ShardedClient(befit.url)


def test_replica_urls_are_one_per_resolved_address():
    assert replica_urls("127.0.0.1", 7878) == ["http://127.0.0.1:7878"]
    assert replica_urls("::1", 9000) == ["http://[::1]:9000"]
