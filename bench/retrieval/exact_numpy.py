"""numpy's side of the exact-search benchmark (see exact_run.py).

Times the same work befit's `--batched` mode does on the very same vectors:
the scores of every query against every bank row as one matrix product
(`queries @ bank.T`), the best k per query by partial selection
(`np.argpartition`) and those k sorted best first; then single queries, one
matrix-vector product and the same selection each. Checks that numpy's
batched answers name the same rows as befit's. Prints one JSON line.

    python bench/retrieval/exact_numpy.py --dir target/retrieval/exact-100000x64
"""

import argparse
import json
import time
from pathlib import Path

import numpy as np


def top_k(scores: np.ndarray, k: int) -> np.ndarray:
    """Row-wise indices of the k highest scores, best first."""
    part = np.argpartition(-scores, k - 1, axis=-1)[..., :k]
    order = np.argsort(-np.take_along_axis(scores, part, axis=-1), axis=-1, kind="stable")
    return np.take_along_axis(part, order, axis=-1)


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--dir", required=True)
    p.add_argument("--k", type=int, default=10)
    p.add_argument("--singles", type=int, default=100)
    a = p.parse_args()
    d = Path(a.dir)
    bank = np.load(d / "bank.npy")
    queries = np.load(d / "queries.npy")
    befit_ids = np.load(d / "befit_ids.npy")

    top_k(queries[:8] @ bank.T, a.k)  # untimed warm-up, as on befit's side
    started = time.perf_counter()
    ids = top_k(queries @ bank.T, a.k)
    batch_seconds = time.perf_counter() - started

    # The matrix product alone, to show where numpy's time goes.
    started = time.perf_counter()
    queries @ bank.T
    product_seconds = time.perf_counter() - started

    singles = min(a.singles, len(queries))
    started = time.perf_counter()
    for q in queries[:singles]:
        top_k(bank @ q, a.k)
    single_seconds = (time.perf_counter() - started) / singles

    same = int(sum(set(x) == set(y) for x, y in zip(ids.tolist(), befit_ids.tolist())))
    try:
        from threadpoolctl import threadpool_info
        blas = [(i.get("internal_api"), i.get("architecture"), i.get("num_threads"))
                for i in threadpool_info()]
    except ImportError:
        blas = "threadpoolctl not installed"
    print(json.dumps({
        "side": "numpy", "what": "exact", "n": bank.shape[0], "dim": bank.shape[1], "k": a.k,
        "queries": len(queries), "batch_seconds": batch_seconds, "product_seconds": product_seconds,
        "single_seconds": single_seconds, "singles": singles,
        "same_rows_as_befit": same, "blas": blas, "numpy": np.__version__,
    }))


if __name__ == "__main__":
    main()
