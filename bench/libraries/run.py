"""Hand-written code beside the well-kept libraries that could replace it, from one run.

Runs `cargo bench --bench libraries` (befit's registry against prometheus-client, befit's dot
product against simsimd, befit's Pillow-compatible resize) and times Pillow's own bicubic resize of
the same 640x480 -> 224x168 here, then prints each pair and its ratio (the other's time / befit's:
above 1.0, befit is faster).

    python bench/libraries/run.py
"""

import io
import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from PIL import Image

ROOT = Path(__file__).resolve().parent.parent.parent


def befit_side():
    cmd = ["cargo", "bench", "--locked", "--bench", "libraries"]
    print("+ " + " ".join(cmd), file=sys.stderr, flush=True)
    out = subprocess.run(cmd, check=True, stdout=subprocess.PIPE, text=True, cwd=ROOT).stdout
    return [json.loads(line) for line in out.splitlines() if line.startswith("{")]


def pillow_resize_ms(calls=100):
    """Best of three rounds of `calls` resizes, like the Rust side."""
    rng = np.random.default_rng(3)
    image = Image.fromarray(rng.integers(0, 256, size=(480, 640, 3), dtype=np.uint8))
    best = float("inf")
    for _ in range(3):
        start = time.perf_counter()
        for _ in range(calls):
            image.resize((224, 168), Image.Resampling.BICUBIC)
        best = min(best, (time.perf_counter() - start) / calls)
    return best * 1e3


SCENE = ROOT / "target" / "libraries" / "scene.jpg"
MEAN = np.array([0.48145466, 0.4578275, 0.40821073], dtype=np.float32)
STD = np.array([0.26862954, 0.26130258, 0.27577711], dtype=np.float32)


def write_scene():
    """A 640x480 photo-like JPEG for both sides: a probe scene enlarged, plus seeded noise."""
    probe = ROOT / "fixtures" / "probe" / "images" / "00000.png"
    rng = np.random.default_rng(5)
    big = np.asarray(Image.open(probe).convert("RGB").resize((640, 480), Image.Resampling.BICUBIC), dtype=np.int16)
    noisy = np.clip(big + rng.integers(-12, 13, size=big.shape), 0, 255).astype(np.uint8)
    SCENE.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(noisy).save(SCENE, quality=90)


def pillow_intake_ms(calls=50):
    """Decode, shorter side to 224 (bicubic), centre crop, normalise: Pillow and numpy, one core."""
    data = SCENE.read_bytes()
    best = float("inf")
    for _ in range(3):
        start = time.perf_counter()
        for _ in range(calls):
            image = Image.open(io.BytesIO(data)).convert("RGB")
            w, h = image.size
            scale = 224 / min(w, h)
            rw, rh = int(w * scale + 0.5), int(h * scale + 0.5)
            image = image.resize((rw, rh), Image.Resampling.BICUBIC)
            left, top = int((rw - 224) / 2 + 0.5), int((rh - 224) / 2 + 0.5)
            image = image.crop((left, top, left + 224, top + 224))
            x = (np.asarray(image, dtype=np.float32) / 255.0 - MEAN) / STD
            np.ascontiguousarray(x.transpose(2, 0, 1))
        best = min(best, (time.perf_counter() - start) / calls)
    return best * 1e3


def main():
    write_scene()
    rows = befit_side()
    pillow_ms = pillow_resize_ms()
    table = [
        ("metrics: one request recorded (ns, 2 threads)", "metrics_record", "befit_ns", "prometheus_client_ns", "prometheus-client"),
        ("metrics: one scrape rendered (us)", "metrics_render", "befit_us", "prometheus_client_us", "prometheus-client"),
    ]
    print(f"{'what':58} {'befit':>10} {'other':>10} {'ratio':>7}  other")
    for label, what, ours, theirs, name in table:
        r = next(r for r in rows if r["what"] == what)
        print(f"{label:58} {r[ours]:10.2f} {r[theirs]:10.2f} {r[theirs] / r[ours]:7.2f}  {name}")
    for line in (r for r in rows if r["what"] == "dot_scan"):
        label = f"dot: scan of {int(line['rows'])} rows at {int(line['dim'])}-d (ms)"
        print(f"{label:58} {line['befit_ms']:10.3f} {line['simsimd_ms']:10.3f} "
              f"{line['simsimd_ms'] / line['befit_ms']:7.2f}  simsimd (max |diff| {line['max_abs_difference']:.1e})")
    resize = next(r for r in rows if r["what"] == "resize_bicubic_640x480_to_224x168")["befit_ms"]
    label = "resize: bicubic 640x480 -> 224x168 (ms)"
    print(f"{label:58} {resize:10.3f} {pillow_ms:10.3f} {pillow_ms / resize:7.2f}  Pillow {Image.__version__}")
    intake = next((r for r in rows if r["what"] == "intake_jpeg_640x480_to_224"), None)
    if intake:
        theirs = pillow_intake_ms()
        label = "intake: JPEG 640x480 -> 224 crop, normalised (ms)"
        print(f"{label:58} {intake['befit_ms']:10.3f} {theirs:10.3f} {theirs / intake['befit_ms']:7.2f}  Pillow + numpy")


if __name__ == "__main__":
    main()
