"""Exact search, befit beside numpy + OpenBLAS in one run.

Runs befit's side (`cargo bench --bench retrieval -- --batched`), then
exact_numpy.py on the same files with OpenBLAS on one thread and its
core-type overrides removed for that command alone (this machine sets
OPENBLAS_CORETYPE and OPENBLAS_L2_SIZE for old OpenBLAS builds; a current
numpy runs its generic kernels under them, which would flatter befit), and
prints the ratios: numpy's seconds / befit's, so above 1.0 means befit is
faster.

    python bench/retrieval/exact_run.py                       # 100k x 64 and 100k x 512
    python bench/retrieval/exact_run.py --size 20000 --dims 64
"""

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent


def lines(cmd, env=None):
    print("+ " + " ".join(cmd), file=sys.stderr, flush=True)
    out = subprocess.run(cmd, check=True, stdout=subprocess.PIPE, text=True, cwd=ROOT, env=env).stdout
    return [json.loads(line) for line in out.splitlines() if line.startswith("{")]


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--size", type=int, default=100_000)
    p.add_argument("--dims", default="64,512")
    p.add_argument("--queries", type=int, default=1000)
    p.add_argument("--singles", type=int, default=100)
    p.add_argument("--k", type=int, default=10)
    p.add_argument("--out", default=str(ROOT / "target" / "retrieval"))
    p.add_argument("--json", help="also write every figure to this file")
    a = p.parse_args()

    befit = lines(["cargo", "bench", "--quiet", "--bench", "retrieval", "--", "--batched",
                   "--sizes", str(a.size), "--dims", a.dims, "--queries", str(a.queries),
                   "--singles", str(a.singles), "--k", str(a.k), "--out", a.out])
    env = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")}
    env["OPENBLAS_NUM_THREADS"] = "1"
    numpy = []
    for row in befit:
        numpy += lines([sys.executable, str(HERE / "exact_numpy.py"), "--dir", row["dir"],
                        "--k", str(a.k), "--singles", str(a.singles)], env=env)
    if a.json:
        Path(a.json).write_text(json.dumps(befit + numpy, indent=1))

    print(f"exact search, k={a.k}, one thread each; numpy {numpy[0]['numpy']}, BLAS {numpy[0]['blas']}")
    print(f"{'bank':>12} | {'batch of ' + str(a.queries):>22} | {'single query':>24} | same rows")
    print(f"{'':>12} | {'befit s':>7} {'numpy s':>7} {'ratio':>6} | {'befit ms':>8} {'numpy ms':>8} {'ratio':>6} |")
    for b, n in zip(befit, numpy):
        print(f"{str(b['n']) + ' x ' + str(b['dim']):>12} | {b['batch_seconds']:>7.3f} {n['batch_seconds']:>7.3f} "
              f"{n['batch_seconds'] / b['batch_seconds']:>6.2f} | {b['single_seconds'] * 1e3:>8.2f} "
              f"{n['single_seconds'] * 1e3:>8.2f} {n['single_seconds'] / b['single_seconds']:>6.2f} | "
              f"{n['same_rows_as_befit']}/{n['queries']} (single = batch: {b['single_equals_batch']}/{b['singles']})")
    print("numpy's matrix product alone (no top-k): "
          + ", ".join(f"{n['n']} x {n['dim']}: {n['product_seconds']:.3f} s" for n in numpy))


if __name__ == "__main__":
    main()
