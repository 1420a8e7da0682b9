"""Speed at a real encoder size: befit over HTTP beside the encoder alone, int8 beside fp32,
and the thread layout, measured side by side in one run.

    python bench/base_size.py            # after `make base-bundles`

Bundles: the blocks toy (fixtures/models/blocks-v1) and the base-size CLIP bundles of
`make base-bundles` (.cache/bundles/base-fp32, base-int8). For each:
- captions/s: POST /v1/rewards (8 groups x 8 distinct captions a request, caption cache off)
  against the encoder alone: the same captions tokenised with `tokenizers`, padded, run through
  onnxruntime and scored with numpy in this process (bench/rewards.py's loop), with the same
  number of threads (2);
- images/s: POST /v1/images of probe images on a fresh data folder (decode, resize, encode,
  store) against the encoder alone on tensors prepared beforehand, batches of 16, 2 threads;
- peak resident memory of the befit process (VmHWM).
befit runs with its default thread layout (chosen by graph size). Then the layouts themselves,
workers x intra-op threads, 2 x 1 and 1 x 2, on blocks-v1 and base-fp32.
Ratios above 1.0 mean befit is faster. Figures also go to target/bench/base_size.json.
"""

from __future__ import annotations

import json
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(REPO / "tools" / "blocksworld"))

from rewards import Client, captions_pool, free_port, reference_loop, start_befit  # noqa: E402

BUNDLES = {"blocks-v1": REPO / "fixtures/models/blocks-v1", "base-fp32": REPO / ".cache/bundles/base-fp32",
           "base-int8": REPO / ".cache/bundles/base-int8"}
GROUPS, SAMPLES = 8, 8
THREADS = 2


def peak_rss_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def probe_rows(n: int) -> list[dict]:
    lines = (REPO / "fixtures/probe/probe.jsonl").read_text().splitlines()
    return [json.loads(line) for line in lines[:n]]


def befit_side(bundle: Path, requests: list, image_rows: list[dict], workers=None, intra=None) -> dict:
    """captions/s and images/s over HTTP, and the process's peak memory; without `workers` and
    `intra`, befit's default thread layout."""
    layout = [] if workers is None else ["--workers", str(workers), "--intra-threads", str(intra)]
    with tempfile.TemporaryDirectory() as data_dir:
        port = free_port()
        proc = start_befit(bundle, port, data_dir, ["--image-root", str(REPO / "fixtures/probe"), *layout])
        try:
            client = Client(port)
            warm = client.post("/v1/images", {"images": [{"path": r["image"]} for r in image_rows[:4]]})
            ids = [i["id"] for i in warm["images"]]
            client.post("/v1/rewards", {"groups": [{"image": {"id": ids[0]}, "captions": ["a red ring", "a blue cross"]}]})
            start = time.perf_counter()
            for request in requests:
                body = {"groups": [{"image": {"id": ids[g % len(ids)]}, "captions": caps} for g, caps in enumerate(request)]}
                client.post("/v1/rewards", body)
            captions = sum(len(c) for r in requests for c in r) / (time.perf_counter() - start)
            rest = image_rows[4:]
            start = time.perf_counter()
            for i in range(0, len(rest), 16):
                client.post("/v1/images", {"images": [{"path": r["image"]} for r in rest[i : i + 16]]})
            images = len(rest) / (time.perf_counter() - start)
            return {"captions_per_s": captions, "images_per_s": images, "peak_rss_mb": peak_rss_mb(proc.pid)}
        finally:
            proc.terminate()
            proc.wait()


def alone_side(bundle: Path, requests: list, image_rows: list[dict]) -> dict:
    """The same work through onnxruntime alone, inputs prepared beforehand for images."""
    import onnxruntime as ort
    from evaluate import OrtBundle
    from intake import image_tensor

    os.environ["BENCH_ORT_THREADS"] = str(THREADS)
    dim = OrtBundle(bundle).embed_tensors(
        np.stack([image_tensor(REPO / "fixtures/probe" / image_rows[0]["image"], OrtBundle(bundle).image_spec)]))
    seconds = reference_loop(bundle, np.ones((len(image_rows), dim.shape[1]), dtype=np.float32), requests)
    captions = sum(len(c) for r in requests for c in r) / seconds
    spec = OrtBundle(bundle).image_spec
    rest = image_rows[4:]
    x = np.stack([image_tensor(REPO / "fixtures/probe" / r["image"], spec) for r in rest]).astype(np.float32)
    options = ort.SessionOptions()
    options.intra_op_num_threads = THREADS
    import tomllib

    manifest = tomllib.loads((bundle / "bundle.toml").read_text())["image"]
    session = ort.InferenceSession(str(bundle / manifest["file"]), options, providers=["CPUExecutionProvider"])
    session.run(None, {manifest["input"]: x[:2]})
    start = time.perf_counter()
    for i in range(0, len(x), 16):
        session.run(None, {manifest["input"]: x[i : i + 16]})
    images = len(x) / (time.perf_counter() - start)
    return {"captions_per_s": captions, "images_per_s": images}


def main() -> int:
    missing = [n for n, p in BUNDLES.items() if not (p / "bundle.toml").exists()]
    if missing:
        print(f"base size: {', '.join(missing)} missing; `make base-bundles` makes them (about 2 minutes)")
        return 0
    figures: dict = {}
    pool = iter(captions_pool(20_000, 11))
    for name, bundle in BUNDLES.items():
        toy = name == "blocks-v1"
        n_requests, n_images = (40, 132) if toy else (6, 52)
        requests = [[[next(pool) for _ in range(SAMPLES)] for _ in range(GROUPS)] for _ in range(n_requests)]
        rows = probe_rows(n_images)
        ours = befit_side(bundle, requests, rows)
        alone = alone_side(bundle, requests, rows)
        figures[name] = {"befit": ours, "alone": alone}
        print(f"{name}: captions/s befit {ours['captions_per_s']:.0f} alone {alone['captions_per_s']:.0f} "
              f"ratio {ours['captions_per_s'] / alone['captions_per_s']:.2f}; images/s befit {ours['images_per_s']:.1f} "
              f"alone {alone['images_per_s']:.1f} ratio {ours['images_per_s'] / alone['images_per_s']:.2f}; "
              f"peak RSS {ours['peak_rss_mb']:.0f} MB", flush=True)
    f, q = figures["base-fp32"]["befit"], figures["base-int8"]["befit"]
    print(f"int8 / fp32 through befit: captions/s {q['captions_per_s'] / f['captions_per_s']:.2f}, "
          f"images/s {q['images_per_s'] / f['images_per_s']:.2f}, peak RSS {q['peak_rss_mb'] / f['peak_rss_mb']:.2f}")
    layouts = {}
    for name in ("blocks-v1", "base-fp32"):
        n_requests, n_images = (40, 132) if name == "blocks-v1" else (6, 52)
        requests = [[[next(pool) for _ in range(SAMPLES)] for _ in range(GROUPS)] for _ in range(n_requests)]
        rows = probe_rows(n_images)
        for workers, intra in ((2, 1), (1, 2)):
            r = befit_side(BUNDLES[name], requests, rows, workers, intra)
            layouts[f"{name} {workers}x{intra}"] = r
            print(f"{name}, {workers} workers x {intra} intra-op threads: captions/s {r['captions_per_s']:.0f}, "
                  f"images/s {r['images_per_s']:.1f}, peak RSS {r['peak_rss_mb']:.0f} MB", flush=True)
    figures["layouts"] = layouts
    out = REPO / "target" / "bench"
    out.mkdir(parents=True, exist_ok=True)
    (out / "base_size.json").write_text(json.dumps(figures, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
