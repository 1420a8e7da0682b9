"""Rewards per second through one reward replica and through three, with the
sharded client (`make cluster-throughput`). A measurement, not a test: it
prints the figures and their ratio.

Every replica runs on this machine, so three replicas share its cores: on a
2-core machine the ratio shows the cost of more processes (more encoder
threads than cores, three caches to fill), not a speed-up. The speed-up
comes when replicas have cores of their own, one machine or pod each.
"""

from __future__ import annotations

import argparse
import itertools
import json
import os
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Iterator, List

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from cluster.cluster_env import Cluster  # noqa: E402
from client.client_env import PROBE_DIR  # noqa: E402

from befit_client import ShardedClient, clip_s  # noqa: E402


SAMPLES = 5  # captions sampled per image, as a policy would per step


def images(n: int) -> List[bytes]:
    rows = [json.loads(line) for line in (PROBE_DIR / "probe.jsonl").read_text().splitlines() if line.strip()]
    return [(PROBE_DIR / r["image"]).read_bytes() for r in rows[:n]]


def captions() -> Iterator[str]:
    """Tabletop captions, every one new (a policy's samples rarely repeat,
    so the encoders work rather than the caption caches)."""
    colours = ["red", "blue", "green", "yellow", "purple", "orange", "violet", "white"]
    shapes = ["square", "circle", "triangle", "cross", "ring", "disc", "star"]
    sizes = ["small", "big", "large", "little"]
    relations = ["left of", "right of", "above", "below"]
    for s1, c1, h1, r, s2, c2, h2 in itertools.product(sizes, colours, shapes, relations, sizes, colours, shapes):
        yield f"a {s1} {c1} {h1} {r} a {s2} {c2} {h2}"


def measure(urls: List[str], work: List[bytes], texts: Iterator[str], trainers: int, calls: int, per_call: int) -> float:
    """Groups per second over ``calls`` rewards calls of ``per_call`` groups
    of new captions, sent by ``trainers`` threads at once, images registered
    beforehand."""
    lock = threading.Lock()
    with ShardedClient(urls) as sc:
        sc.register_images(work)

        def trainer(t: int) -> None:
            for k in range(t, calls, trainers):
                rows = [(k * per_call + j) % len(work) for j in range(per_call)]
                with lock:
                    caps = [[next(texts) for _ in range(SAMPLES)] for _ in rows]
                sc.rewards([work[r] for r in rows], caps, scale=clip_s(2.5), baseline="mean-of-others")

        threads = [threading.Thread(target=trainer, args=(t,)) for t in range(trainers)]
        started = time.perf_counter()
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        return calls * per_call / (time.perf_counter() - started)


def peak_memory_mb(pid: int) -> int:
    """The process's peak resident set (VmHWM of /proc/PID/status), in MB."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) // 1024
    return 0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--images", type=int, default=600)
    ap.add_argument("--calls", type=int, default=600)
    ap.add_argument("--per-call", type=int, default=16)
    ap.add_argument("--trainers", type=int, default=6)
    args = ap.parse_args()
    work = images(args.images)
    texts = captions()
    results = {}
    for replicas in (1, 3):
        with tempfile.TemporaryDirectory(prefix="befit-throughput-") as tmp:
            cluster = Cluster(Path(tmp), rewards=replicas, proxy=False, bank=False)
            try:
                measure(cluster.urls, work[:64], texts, args.trainers, 2 * args.trainers, args.per_call)  # warm-up
                results[replicas] = measure(cluster.urls, work, texts, args.trainers, args.calls, args.per_call)
                peaks = [peak_memory_mb(r.proc.pid) for r in cluster.replicas]
            finally:
                cluster.stop()
        print(
            f"{replicas} replica(s): {results[replicas]:8.1f} groups/s ({results[replicas] * SAMPLES:8.1f} new captions/s);"
            f" peak resident memory per replica: {', '.join(f'{p} MB' for p in peaks)}",
            flush=True,
        )
    print(
        f"3 replicas / 1 replica: {results[3] / results[1]:.2f} on {os.cpu_count()} cores "
        f"({args.trainers} trainer threads, {args.per_call} groups of {SAMPLES} captions per call)"
    )


if __name__ == "__main__":
    main()
