"""Runs the retrieval benchmark on both sides and prints one table.

befit's side (cargo bench --bench retrieval) generates the vectors, builds
its index and the exact scan and writes everything to --out; hnswlib's side
(hnswlib_side.py) reads the same files. Ratios are befit / hnswlib from this
one run (queries per second: higher is better for befit above 1; build
seconds: lower is better for befit below 1).

    python bench/retrieval/run.py --sizes 100000           # the smaller size only
    python bench/retrieval/run.py                          # 100k and 1M
    python bench/retrieval/run.py --filtered --sizes 100000  # tag filters only (about 8 min)
    python bench/retrieval/run.py --sizes 100000 --kinds blocks --backends usearch,usearch-flat
    python bench/retrieval/run.py --sizes 100000 --kinds blocks --query-threads 2  # also 2 query threads

The backend `usearch-flat` is befit's default way with usearch: searches go
through the flat copy of usearch's graph (`src/bank/index/frozen.rs`). Asked
for beside `usearch`, the usearch run (`--flat`) measures the index's own
searches through the copy first, then sets the copy aside, so the `usearch`
rows are usearch's own search; it also times one more freeze and sizes the
copy. Without `usearch-flat`, the `usearch` rows are the default (the copy).
"""

import argparse
import json
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent


def lines(cmd):
    print("+ " + " ".join(cmd), file=sys.stderr, flush=True)
    out = subprocess.run(cmd, check=True, stdout=subprocess.PIPE, text=True, cwd=ROOT).stdout
    return [json.loads(line) for line in out.splitlines() if line.startswith("{")]


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--sizes", default="100000,1000000")
    p.add_argument("--kinds", default="uniform,blocks")
    p.add_argument("--ef-search", default="16,32,64,96,128,256")
    p.add_argument("--m", type=int, default=16)
    p.add_argument("--ef-construction", type=int, default=200)
    p.add_argument("--threads", type=int, default=2)
    p.add_argument("--queries", type=int, default=1000)
    p.add_argument("--query-threads", type=int, default=1,
                   help="above 1: also time each side's default search with this many threads")
    p.add_argument("--dim", type=int, default=64)
    p.add_argument("--backends", default="usearch,hnsw-rs",
                   help="befit's index backends, each run beside the same hnswlib run")
    p.add_argument("--out", default=str(ROOT / "target" / "retrieval"))
    p.add_argument("--json", help="also write every figure to this file")
    p.add_argument("--filtered", action="store_true",
                   help="only tag-filtered search: the filtered graph walk against over-fetching")
    a = p.parse_args()
    if a.filtered:
        filtered(a)
        return

    common = ["--m", str(a.m), "--ef-construction", str(a.ef_construction),
              "--ef-search", a.ef_search, "--threads", str(a.threads),
              "--query-threads", str(a.query_threads)]
    befit = []
    backends = a.backends.split(",")
    flat = "usearch-flat" in backends
    runs = [b for b in backends if b != "usearch-flat"]
    if flat and "usearch" not in runs:
        runs.append("usearch")
    for backend in runs:
        extra = ["--flat"] if flat and backend == "usearch" else []
        befit += [dict(r, side=f"befit {backend}-flat" if r.get("copy") == "flat" else f"befit {backend}")
                  for r in lines(["cargo", "bench", "--quiet", "--bench", "retrieval", "--",
                                  "--sizes", a.sizes, "--kinds", a.kinds, "--queries", str(a.queries),
                                  "--dim", str(a.dim), "--backend", backend, "--out", a.out]
                                 + extra + common)]
    hnsw = []
    for size in a.sizes.split(","):
        for kind in a.kinds.split(","):
            hnsw += lines([sys.executable, str(HERE / "hnswlib_side.py"),
                           "--dir", str(Path(a.out) / f"{kind}-{size}"), "--kind", kind] + common)
    rows = befit + hnsw
    if a.json:
        Path(a.json).write_text(json.dumps(rows, indent=1))

    def get(side, kind, n, what, ef=None):
        for r in rows:
            if (r["side"], r["kind"], r["n"], r["what"]) == (side, kind, n, what) and r.get("ef_search") == ef:
                return r
        return None

    print(f"M={a.m} ef_construction={a.ef_construction} build threads={a.threads}, "
          f"{a.queries} queries on one thread, k=10, dim {a.dim}")
    for n in [int(s) for s in a.sizes.split(",")]:
        for kind in a.kinds.split(","):
            hb, hd = get("hnswlib", kind, n, "build"), get("hnswlib", kind, n, "dump")
            print(f"\n{kind}, n={n}: hnswlib build {hb['seconds']:.1f} s, "
                  f"{hb['bytes_per_caption']:.0f} bytes/caption resident, "
                  f"dump {hd['dump_seconds']:.2f} s, load {hd['load_seconds']:.2f} s")
            for backend in a.backends.split(","):
                side = f"befit {backend}"
                if backend == "usearch-flat":
                    fb = get(side, kind, n, "build")
                    print(f"  {backend}: freeze {fb['freeze_seconds']:.2f} s after usearch's build; "
                          f"copy {fb['bytes_per_caption']:.0f} bytes/caption "
                          f"({fb['bytes_per_caption'] / hb['bytes_per_caption']:.2f}x hnswlib's resident), "
                          f"resident growth {fb['resident_growth_per_caption']:.0f} bytes/caption")
                    continue
                bb, ex, dump = get(side, kind, n, "build"), get(side, kind, n, "exact"), get(side, kind, n, "dump")
                print(f"  {backend}: build {bb['seconds']:.1f} s (ratio to hnswlib "
                      f"{bb['seconds'] / hb['seconds']:.2f}); {bb['bytes_per_caption']:.0f} bytes/caption "
                      f"resident with the exact rows ({bb['exact_rows_bytes_per_caption']:.0f} of them), "
                      f"graph alone {(bb['bytes_per_caption'] - bb['exact_rows_bytes_per_caption']) / hb['bytes_per_caption']:.2f}x hnswlib's; "
                      f"exact scan {ex['qps']:.0f} q/s"
                      + (f"; dump {dump['dump_seconds']:.2f} s, restart {dump['load_seconds']:.2f} s" if dump else ""))
                parts = bb.get("parts_bytes_per_caption")
                if parts:
                    named = [("exact rows", parts["exact_rows"]), ("library's vectors", parts["library_vectors"]),
                             ("library's graph", parts["library_graph"]), ("copy", parts["copy"])]
                    print("    by part, bytes/caption (the index's own count): "
                          + ", ".join(f"{name} {v:.0f}" for name, v in named if v is not None)
                          + (" (hnsw_rs does not count its own)" if parts["library_vectors"] is None else ""))
            print(f"{'ef_search':>9} | " + " | ".join(f"{b + ' q/s':>16} {'recall':>7} {'ratio':>6}" for b in a.backends.split(","))
                  + f" | {'hnswlib q/s':>11} {'recall':>7}")
            for ef in [int(x) for x in a.ef_search.split(",")]:
                h = get("hnswlib", kind, n, "search", ef)
                cells = []
                for backend in a.backends.split(","):
                    b = get(f"befit {backend}", kind, n, "search", ef)
                    cells.append(f"{b['qps']:>16.0f} {b['recall']:>7.4f} {b['qps'] / h['qps']:>6.2f}")
                print(f"{ef:>9} | " + " | ".join(cells) + f" | {h['qps']:>11.0f} {h['recall']:>7.4f}")
            if a.query_threads > 1:
                print(f"with {a.query_threads} query threads (befit's default way: the copy for usearch)")
                print(f"{'ef_search':>9} | " + " | ".join(f"{b + ' q/s':>16} {'recall':>7} {'ratio':>6}" for b in runs)
                      + f" | {'hnswlib q/s':>11} {'recall':>7}")
                for ef in [int(x) for x in a.ef_search.split(",")]:
                    h = get("hnswlib", kind, n, "search_threads", ef)
                    cells = []
                    for backend in runs:
                        b = get(f"befit {backend}", kind, n, "search_threads", ef)
                        cells.append(f"{b['qps']:>16.0f} {b['recall']:>7.4f} {b['qps'] / h['qps']:>6.2f}")
                    print(f"{ef:>9} | " + " | ".join(cells) + f" | {h['qps']:>11.0f} {h['recall']:>7.4f}")


def filtered(a) -> None:
    """befit's two ways of searching a tag through the graph, side by side
    with the exact scan of the tag's rows (no hnswlib side: the question is
    which of befit's own ways to use), for each backend of --backends."""
    size = a.sizes.split(",")[0]
    backends = [b for b in a.backends.split(",") if b != "usearch-flat"]
    rows = []
    for backend in backends:
        rows += [dict(r, backend=backend)
                 for r in lines(["cargo", "bench", "--quiet", "--bench", "retrieval", "--", "--filtered",
                                 "--sizes", size, "--queries", str(a.queries), "--out", a.out,
                                 "--dim", str(a.dim), "--backend", backend,
                                 "--m", str(a.m), "--ef-construction", str(a.ef_construction),
                                 "--threads", str(a.threads)])]
    if a.json:
        Path(a.json).write_text(json.dumps(rows, indent=1))
    for backend in backends:
        by_share = {}
        for r in rows:
            if r["what"] == "filtered" and r["backend"] == backend:
                by_share.setdefault(r["share"], {})[r["walk"]] = r
        print(f"\n{backend}: tag filters, n={size}, dim {a.dim}, {a.queries} queries, k=10: "
              "queries/s and recall@10 against the exact scan of the tag's rows")
        print(f"{'share':>6} {'tagged':>8} | {'walk q/s':>8} {'recall':>6} | {'over-fetch q/s':>14} "
              f"{'recall':>6} {'fell back':>9} | {'scan q/s':>8} | {'over-fetch/walk':>15} {'scan/over-fetch':>15}")
        for share, ways in by_share.items():
            w, o = ways["within"], ways["over_fetch"]
            print(f"{share:>6.1%} {w['tagged']:>8} | {w['qps']:>8.1f} {w['recall']:>6.3f} | "
                  f"{o['qps']:>14.1f} {o['recall']:>6.3f} {o['fell_back']:>9} | {w['exact_qps']:>8.0f} | "
                  f"{o['qps'] / w['qps']:>15.2f} {w['exact_qps'] / o['qps']:>15.2f}")


if __name__ == "__main__":
    main()
