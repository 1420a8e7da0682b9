"""Scale-out on loopback: three reward replicas and a bank replica (real
processes, each with its own data folder, configured by the ConfigMap's
files), a proxy with the Ingress's routes, and the sharded client.

The reference for every reward is one plain `befit serve` with the same
bundle, asked through the plain client: rewards are a pure function of the
image and the captions, so the cluster must answer the same numbers whichever
replica answers. The last test kills a replica in the middle of a run.
"""

from __future__ import annotations

import json
import threading
from typing import Dict, Iterator, List, Tuple

import numpy as np
import pytest
from befit_client import Client, ImageId, ShardedClient, UnknownImageError, clip_s, content_id, rendezvous_order

from .cluster_env import BUNDLE, Cluster
from client.client_env import PROBE_DIR, BefitProcess

GROUPS = 96  # probe images in the workload
CALLS = 24  # rewards calls in the run a replica dies in
PER_CALL = 8  # groups per call


@pytest.fixture(scope="module")
def workload() -> List[Tuple[bytes, List[str]]]:
    """Probe images (file bytes) with their five captions each."""
    rows = [json.loads(line) for line in (PROBE_DIR / "probe.jsonl").read_text().splitlines() if line.strip()]
    return [((PROBE_DIR / r["image"]).read_bytes(), list(r["captions"])) for r in rows[:GROUPS]]


@pytest.fixture(scope="module")
def single(tmp_path_factory: pytest.TempPathFactory) -> Iterator[BefitProcess]:
    """One plain server: the reference."""
    tmp = tmp_path_factory.mktemp("single")
    proc = BefitProcess(BUNDLE, tmp / "data", tmp / "befit.log")
    yield proc
    proc.stop()


@pytest.fixture(scope="module")
def reference(single: BefitProcess, workload) -> Dict[str, np.ndarray]:
    """The single server's rewards for the whole workload."""
    with Client(single.url) as c:
        out = c.rewards([w[0] for w in workload], [w[1] for w in workload], scale=clip_s(2.5), baseline="mean-of-others")
    return {"cosine": out.cosine, "reward": out.reward, "advantage": out.advantage}


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Cluster]:
    c = Cluster(tmp_path_factory.mktemp("cluster"))
    try:
        yield c
    finally:
        c.stop()


def known_on(url: str, image_id: str) -> bool:
    """Whether the replica at ``url`` holds the image (its /v1/vectors answers
    for the id, or says unknown_image)."""
    with Client(url) as c:
        try:
            c.vectors([ImageId(image_id)])
            return True
        except UnknownImageError:
            return False


def assert_same(got, want: Dict[str, np.ndarray], rows: slice = slice(None)) -> None:
    # Same bundle, same ONNX Runtime, same inputs: the cosines agree to float32
    # rounding whatever the batch they were computed in (common practice: a
    # few ulps of float32; 1e-6 absolute on values in [-1, 1]).
    np.testing.assert_allclose(got.cosine, want["cosine"][rows], rtol=0, atol=1e-6)
    np.testing.assert_allclose(got.reward, want["reward"][rows], rtol=0, atol=2.5e-6)
    np.testing.assert_allclose(got.advantage, want["advantage"][rows], rtol=0, atol=5e-6)


def test_sharded_rewards_equal_the_single_servers_and_each_image_lives_on_its_replica(cluster, workload, reference):
    with ShardedClient(cluster.urls, bank_url=cluster.proxy.url, pin_digest="first") as sc:
        got = sc.rewards([w[0] for w in workload], [w[1] for w in workload], scale=clip_s(2.5), baseline="mean-of-others")
        assert sc.failovers == 0
    assert_same(got, reference)
    ids = [content_id(w[0]) for w in workload]
    assert got.image_ids == ids
    # Each image was registered on the replica rendezvous hashing ranks first,
    # and only there (sampled: every eighth image, on every replica).
    for image_id in ids[::8]:
        owner = rendezvous_order(image_id, cluster.urls)[0]
        assert [known_on(u, image_id) for u in cluster.urls] == [u == owner for u in cluster.urls]
    # Every replica took a share.
    owners = {rendezvous_order(i, cluster.urls)[0] for i in ids}
    assert owners == set(cluster.urls)


def test_vectors_spread_over_replicas_equal_the_single_servers(cluster, single, workload):
    images = [w[0] for w in workload[:20]]
    texts = [w[1][0] for w in workload[:20]]
    with ShardedClient(cluster.urls) as sc, Client(single.url) as one:
        got = sc.vectors(images, texts)
        want = one.vectors(images, texts)
    np.testing.assert_allclose(got.images, want.images, rtol=0, atol=1e-6)
    np.testing.assert_allclose(got.texts, want.texts, rtol=0, atol=1e-6)
    assert got.image_ids == want.image_ids
    assert list(got.tokens) == list(want.tokens)


def test_the_proxy_routes_as_the_ingress_and_keeps_a_client_on_one_replica(cluster, workload, reference):
    # A plain client through the proxy: it registers images, then names them
    # by id; the reward Service's client-address affinity keeps both on one
    # replica, so no unknown_image comes back.
    with Client(cluster.proxy.url) as c:
        got = c.rewards([w[0] for w in workload[:32]], [w[1] for w in workload[:32]], scale=clip_s(2.5), baseline="mean-of-others")
    assert_same(got, reference, slice(0, 32))


def test_bank_routes_go_to_the_bank_replica_only(cluster):
    captions = ["a red square left of a blue circle", "two green triangles on the table", "a small yellow ring"]
    with ShardedClient(cluster.urls, bank_url=cluster.proxy.url) as sc:
        added = sc.bank_append(captions, tag="cluster-test")
        assert len(added["captions"]) == 3
        near = sc.neighbors(text="a red square", k=1, exact=True)
        assert near["neighbors"][0]["text"] == captions[0]
        assert sc.bank_info()["captions"] == 3
    # The reward replicas' banks stay empty: bank writes reach one writer.
    for url in cluster.urls:
        with Client(url) as c:
            assert c._get("/v1/bank")["captions"] == 0
    with Client(cluster.bank.url) as c:
        assert c._get("/v1/bank")["captions"] == 3


def test_a_replica_killed_mid_run_loses_no_request_and_changes_no_reward(cluster, workload, reference):
    victim = cluster.replicas[1]
    # Images the victim owns: after it dies their requests must go elsewhere.
    owned = [i for i, w in enumerate(workload) if rendezvous_order(content_id(w[0]), cluster.urls)[0] == victim.url]
    assert owned, "the workload gives the victim a share"
    sc = ShardedClient(cluster.urls, pin_digest="first", down_for=60.0)
    results: Dict[int, object] = {}
    errors: List[BaseException] = []
    halfway = threading.Event()
    killed = threading.Event()
    lock = threading.Lock()

    def calls(worker: int) -> None:
        for k in range(worker, CALLS, 2):
            # The last half waits for the kill, so it surely meets a dead
            # replica; calls of the second third may be in flight when it dies.
            if k >= CALLS // 2:
                killed.wait(timeout=120)
            rows = [(k * PER_CALL + j) % GROUPS for j in range(PER_CALL)]
            try:
                out = sc.rewards(
                    [workload[r][0] for r in rows],
                    [workload[r][1] for r in rows],
                    scale=clip_s(2.5),
                    baseline="mean-of-others",
                )
            except BaseException as exc:  # noqa: BLE001 - collected and asserted below
                with lock:
                    errors.append(exc)
                continue
            with lock:
                results[k] = (rows, out)
                if len(results) == CALLS // 3:
                    halfway.set()

    threads = [threading.Thread(target=calls, args=(w,)) for w in range(2)]
    for t in threads:
        t.start()
    try:
        assert halfway.wait(timeout=120), "the run did not reach its first third"
        victim.proc.kill()
        victim.proc.wait(timeout=10)
    finally:
        killed.set()
        for t in threads:
            t.join(timeout=300)
        sc.close()
    assert not errors, errors
    assert sorted(results) == list(range(CALLS))
    for rows, out in results.values():
        assert out.image_ids == [str(content_id(workload[r][0])) for r in rows]
        assert_same(out, reference, rows)  # type: ignore[arg-type]
    assert sc.failovers >= 1
    # The victim's images were registered again on the replicas next in their
    # ranking (the last half of the run asks every image again).
    asked = {r for rows, _ in results.values() for r in rows}
    moved = [i for i in owned if i in asked]
    assert moved
    for i in moved[:6]:
        image_id = str(content_id(workload[i][0]))
        heir = [u for u in rendezvous_order(image_id, cluster.urls) if u != victim.url][0]
        assert known_on(heir, image_id)
