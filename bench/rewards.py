"""Throughput of POST /v1/rewards against an in-process ONNX Runtime (Python) loop.

Both sides score the same captions against the same registered images with the same
text encoder (the bundle's text.onnx and tokenizer.json); the reference loop tokenises
with the `tokenizers` package, pads to the batch's longest caption, runs onnxruntime
and takes cosines with numpy. befit runs with its caption cache off, so every caption
is encoded, as in the reference. Run from the repository root: `python bench/rewards.py`.
"""

from __future__ import annotations

import argparse
import http.client
import json
import os
import pathlib
import random
import socket
import subprocess
import sys
import tempfile
import threading
import time
import tomllib

import numpy as np

REPO = pathlib.Path(__file__).resolve().parents[1]


def captions_pool(n: int, seed: int) -> list[str]:
    """Distinct blocks-world captions, so no cache can help either side."""
    rng = random.Random(seed)
    colours = ["red", "green", "blue", "yellow", "purple", "orange", "white", "black"]
    shapes = ["circle", "square", "triangle", "cross", "ring"]
    sizes = ["small", "large", "big", "tiny"]
    relations = ["left of", "right of", "above", "below"]
    out: set[str] = set()
    while len(out) < n:
        a = f"a {rng.choice(sizes)} {rng.choice(colours)} {rng.choice(shapes)}"
        b = f"a {rng.choice(colours)} {rng.choice(shapes)}"
        form = rng.randrange(3)
        if form == 0:
            out.add(f"{a} {rng.choice(relations)} {b}")
        elif form == 1:
            out.add(f"there is {a} on the table")
        else:
            out.add(f"{a} and {b} with {rng.randrange(2, 9)} marks")
    return sorted(out)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Client:
    def __init__(self, port: int):
        self.conn = http.client.HTTPConnection("127.0.0.1", port, timeout=120)

    def post(self, path: str, body: dict) -> dict:
        data = json.dumps(body).encode()
        self.conn.request("POST", path, data, {"Content-Type": "application/json"})
        response = self.conn.getresponse()
        payload = response.read()
        if response.status != 200:
            raise RuntimeError(f"{path}: {response.status} {payload[:300]!r}")
        return json.loads(payload)


def start_befit(bundle: pathlib.Path, port: int, data_dir: str, extra: list[str]) -> subprocess.Popen:
    binary = REPO / "target" / "release" / "befit"
    proc = subprocess.Popen(
        [str(binary), "serve", "--bundle", str(bundle), "--listen", f"127.0.0.1:{port}", "--data-dir", data_dir,
         "--caption-cache", "0", *extra],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    deadline = time.time() + 60
    while time.time() < deadline:
        try:
            c = http.client.HTTPConnection("127.0.0.1", port, timeout=2)
            c.request("GET", "/readyz")
            if c.getresponse().status == 200:
                return proc
        except OSError:
            pass
        time.sleep(0.1)
    proc.kill()
    raise RuntimeError("befit did not become ready")


def reference_loop(bundle: pathlib.Path, image_vectors: np.ndarray, requests: list[list[list[str]]]) -> float:
    """Seconds for the in-process loop to score every request."""
    import onnxruntime as ort
    from tokenizers import Tokenizer

    manifest = tomllib.loads((bundle / "bundle.toml").read_text())
    text = manifest["text"]
    options = ort.SessionOptions()
    options.intra_op_num_threads = int(os.environ.get("BENCH_ORT_THREADS", "2"))
    session = ort.InferenceSession(str(bundle / text["file"]), options, providers=["CPUExecutionProvider"])
    tokenizer = Tokenizer.from_file(str(bundle / text.get("tokenizer", "tokenizer.json")))
    tokenizer.no_padding()
    tokenizer.enable_truncation(text["max_tokens"])
    pad = text.get("pad_id", 0)
    started = time.perf_counter()
    for request in requests:
        flat = [c for group in request for c in group]
        encodings = tokenizer.encode_batch([text.get("prefix", "") + c for c in flat])
        width = max(len(e.ids) for e in encodings)
        ids = np.full((len(flat), width), pad, dtype=np.int64)
        mask = np.zeros((len(flat), width), dtype=np.int64)
        for i, e in enumerate(encodings):
            ids[i, : len(e.ids)] = e.ids
            mask[i, : len(e.ids)] = 1
        feeds = {text["ids_input"]: ids}
        if text.get("mask_input"):
            feeds[text["mask_input"]] = mask
        vectors = session.run([text["output"]], feeds)[0]
        vectors /= np.linalg.norm(vectors, axis=1, keepdims=True)
        at = 0
        for g, group in enumerate(request):
            _ = vectors[at : at + len(group)] @ image_vectors[g % len(image_vectors)]
            at += len(group)
    return time.perf_counter() - started


def run(args: argparse.Namespace) -> list[str]:
    bundle = REPO / args.bundle
    rows = [json.loads(line) for line in (REPO / "fixtures/probe/probe.jsonl").read_text().splitlines()[: args.images]]
    pool = captions_pool(args.requests * args.groups * args.samples + 16 * args.small_requests * 4, args.seed)
    lines = []
    with tempfile.TemporaryDirectory() as data_dir:
        port = free_port()
        proc = start_befit(bundle, port, data_dir, ["--image-root", str(REPO / "fixtures/probe")])
        try:
            client = Client(port)
            reg = client.post("/v1/images", {"images": [{"path": r["image"]} for r in rows]})
            ids = [i["id"] for i in reg["images"]]
            vecs = client.post("/v1/vectors", {"images": [{"id": i} for i in ids]})
            image_vectors = np.array([v["vector"] for v in vecs["images"]], dtype=np.float32)
            it = iter(pool)
            requests = [[[next(it) for _ in range(args.samples)] for _ in range(args.groups)] for _ in range(args.requests)]
            # Warm-up on other captions.
            client.post("/v1/rewards", {"groups": [{"image": {"id": ids[0]}, "captions": ["a red ring", "a blue cross"]}]})
            started = time.perf_counter()
            for request in requests:
                body = {"baseline": "mean-of-others",
                        "groups": [{"image": {"id": ids[g % len(ids)]}, "captions": caps} for g, caps in enumerate(request)]}
                client.post("/v1/rewards", body)
            befit_seconds = time.perf_counter() - started
            # 16 concurrent clients, small batches (1 group of 4 captions per request).
            small = [[[next(it) for _ in range(4)]] for _ in range(16 * args.small_requests)]
            errors: list[Exception] = []

            def worker(k: int) -> None:
                c = Client(port)
                try:
                    for j in range(args.small_requests):
                        caps = small[k * args.small_requests + j][0]
                        c.post("/v1/rewards", {"groups": [{"image": {"id": ids[(k + j) % len(ids)]}, "captions": caps}]})
                except Exception as e:  # surfaced below
                    errors.append(e)

            threads = [threading.Thread(target=worker, args=(k,)) for k in range(16)]
            started = time.perf_counter()
            for t in threads:
                t.start()
            for t in threads:
                t.join()
            concurrent_seconds = time.perf_counter() - started
            if errors:
                raise errors[0]
        finally:
            proc.terminate()
            proc.wait()
    reference_seconds = reference_loop(bundle, image_vectors, requests)
    small_reference = reference_loop(bundle, image_vectors, small)
    n_captions = args.requests * args.groups * args.samples
    n_small = 16 * args.small_requests * 4
    lines.append(f"rewards, {args.requests} requests x {args.groups} groups x {args.samples} captions (bundle {args.bundle})")
    lines.append(f"  befit HTTP        {args.requests / befit_seconds:9.1f} req/s {n_captions / befit_seconds:10.0f} captions/s")
    lines.append(f"  Python ORT loop   {args.requests / reference_seconds:9.1f} req/s {n_captions / reference_seconds:10.0f} captions/s")
    lines.append(f"  ratio befit/reference (captions/s): {reference_seconds / befit_seconds:.2f}")
    lines.append(f"16 concurrent clients, {args.small_requests} requests each of 1 group x 4 captions")
    lines.append(f"  befit HTTP        {16 * args.small_requests / concurrent_seconds:9.1f} req/s {n_small / concurrent_seconds:10.0f} captions/s")
    lines.append(f"  Python ORT loop, one request at a time {16 * args.small_requests / small_reference:9.1f} req/s {n_small / small_reference:10.0f} captions/s")
    lines.append(f"  ratio befit/reference (captions/s): {small_reference / concurrent_seconds:.2f}")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--bundle", default="fixtures/models/blocks-v1")
    parser.add_argument("--images", type=int, default=64)
    parser.add_argument("--requests", type=int, default=60)
    parser.add_argument("--groups", type=int, default=16)
    parser.add_argument("--samples", type=int, default=16)
    parser.add_argument("--small-requests", type=int, default=40)
    parser.add_argument("--seed", type=int, default=7)
    for line in run(parser.parse_args()):
        print(line, flush=True)


if __name__ == "__main__":
    sys.exit(main())
