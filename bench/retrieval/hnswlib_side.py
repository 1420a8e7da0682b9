"""Retrieval benchmark, hnswlib's side: the same vectors, M, ef_construction
and search breadths as befit's side (bench/retrieval/main.rs), one JSON line
per figure on standard output.

    python hnswlib_side.py --dir target/retrieval/blocks-100000 --kind blocks \
        --m 16 --ef-construction 200 --ef-search 16,32,64 --threads 2 --k 10
"""

import argparse
import json
import tempfile
import time
from pathlib import Path

import hnswlib
import numpy as np

# Same rule as befit::bank::recall (ann-benchmarks' knn_threshold, with a
# tighter epsilon): a hit counts when its cosine reaches the exact k-th one.
RECALL_EPSILON = 1e-6


def recall(exact_cos: np.ndarray, approx_cos: np.ndarray, k: int) -> float:
    threshold = exact_cos[:, k - 1:k] - RECALL_EPSILON
    return float(np.mean(np.sum(approx_cos[:, :k] >= threshold, axis=1) / k))


def resident_bytes() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    return 0


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--dir", required=True, type=Path)
    p.add_argument("--kind", required=True)
    p.add_argument("--m", type=int, default=16)
    p.add_argument("--ef-construction", type=int, default=200)
    p.add_argument("--ef-search", default="16,32,64,96,128,256")
    p.add_argument("--threads", type=int, default=2)
    p.add_argument("--k", type=int, default=10)
    p.add_argument("--query-threads", type=int, default=1,
                   help="above 1: also search with this many threads sharing the queries")
    a = p.parse_args()

    base = np.load(a.dir / "base.npy")
    queries = np.load(a.dir / "queries.npy")
    exact_cos = np.load(a.dir / "exact_cos.npy")
    n, dim = base.shape

    before = resident_bytes()
    index = hnswlib.Index(space="ip", dim=dim)
    index.init_index(max_elements=n, M=a.m, ef_construction=a.ef_construction, random_seed=100)
    index.set_num_threads(a.threads)
    t = time.perf_counter()
    index.add_items(base, np.arange(n), num_threads=a.threads)
    build = time.perf_counter() - t
    per_caption = (resident_bytes() - before) / n
    print(json.dumps({"side": "hnswlib", "kind": a.kind, "n": n, "what": "build", "seconds": build,
                      "threads": a.threads, "m": a.m, "ef_construction": a.ef_construction,
                      "bytes_per_caption": per_caption}), flush=True)
    with tempfile.TemporaryDirectory(dir=a.dir) as tmp:
        path = str(Path(tmp) / "hnswlib.bin")
        t = time.perf_counter()
        index.save_index(path)
        dump = time.perf_counter() - t
        t = time.perf_counter()
        loaded = hnswlib.Index(space="ip", dim=dim)
        loaded.load_index(path, max_elements=n)
        load = time.perf_counter() - t
        del loaded
    print(json.dumps({"side": "hnswlib", "kind": a.kind, "n": n, "what": "dump",
                      "dump_seconds": dump, "load_seconds": load}), flush=True)

    # One thread, then (with --query-threads above 1) several; all queries in
    # one call: the loop runs in C++, as befit's runs in Rust, so neither side
    # pays for Python per query.
    passes = [(1, "search")] + ([(a.query_threads, "search_threads")] if a.query_threads > 1 else [])
    for threads, what in passes:
        for ef in [int(x) for x in a.ef_search.split(",")]:
            index.set_ef(ef)
            t = time.perf_counter()
            _, distances = index.knn_query(queries, k=a.k, num_threads=threads)
            secs = time.perf_counter() - t
            row = {"side": "hnswlib", "kind": a.kind, "n": n, "what": what, "ef_search": ef,
                   "qps": len(queries) / secs, "recall": recall(exact_cos, 1.0 - distances, a.k)}
            if threads > 1:
                row["query_threads"] = threads
            print(json.dumps(row), flush=True)

if __name__ == "__main__":
    main()
