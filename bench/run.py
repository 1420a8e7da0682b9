"""`make bench`: every benchmark of befit, each printing befit beside its reference from one run.

1. rewards: POST /v1/rewards against an in-process ONNX Runtime (Python) loop (bench/rewards.py);
2. retrieval: the caption index against hnswlib and the exact scan (bench/retrieval/run.py);
3. libraries: hand-written code against the crates and Pillow that could replace it
   (bench/libraries/run.py);
4. base: speed at a real encoder size, HTTP beside the encoder alone, int8 beside fp32, thread
   layouts (bench/base_size.py; needs `make base-bundles`, else says so and skips).

Extra arguments go to the retrieval part (e.g. `--sizes 100000`); BENCH_PARTS=rewards runs one part.
"""

import os
import pathlib
import subprocess
import sys

HERE = pathlib.Path(__file__).resolve().parent


def main() -> int:
    parts = os.environ.get("BENCH_PARTS", "rewards,retrieval,libraries,base").split(",")
    code = 0
    if "rewards" in parts:
        code |= subprocess.call([sys.executable, str(HERE / "rewards.py")])
    if "retrieval" in parts:
        code |= subprocess.call([sys.executable, str(HERE / "retrieval" / "run.py"), *sys.argv[1:]])
    if "libraries" in parts:
        code |= subprocess.call([sys.executable, str(HERE / "libraries" / "run.py")])
    if "base" in parts:
        code |= subprocess.call([sys.executable, str(HERE / "base_size.py")])
    return code


if __name__ == "__main__":
    sys.exit(main())
