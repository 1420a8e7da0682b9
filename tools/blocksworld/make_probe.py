"""Write the committed probe set: held-out images, captions, contrasts, facts.

    python tools/blocksworld/make_probe.py --out fixtures/probe

Writes
  probe.jsonl + images/NNNNN.png   64x64 scenes of stream PROBE_SEED
  large.jsonl + large/*.jpg        larger JPEG renders, one with EXIF orientation 6
  odd/alpha.png, odd/grey.png      decoder cases: RGBA with varying alpha, greyscale

Rows are `{"image", "captions", "contrasts", "scene"}` with paths relative to
the JSONL file. Training draws scenes from other seeds (see train.py), so none
of these scenes is ever trained on.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

from captions import contrasts, render, true_captions
from render import render_scene
from world import sample_scene

PROBE_SEED = 1000
LARGE_SEED = 1001
ODD_SEED = 1002

# EXIF tag number of Orientation; value 6 means "rotate 90 degrees clockwise to display".
ORIENTATION = 0x0112


def caption_rng(seed: int, index: int) -> np.random.Generator:
    """Stream of caption choices of one scene, apart from the scene's own stream."""
    return np.random.default_rng([seed, index, 1])


def row(image: str, scene, width: int, height: int) -> dict:
    """A probe row: five true captions, one contrast per stated kind of fact, the facts."""
    rng = caption_rng(scene.seed, scene.index)
    specs = true_captions(scene, rng)
    return {
        "image": image,
        "captions": [render(s) for s in specs],
        "contrasts": [
            {"caption": render(c), "changed": changed, "from": source}
            for c, changed, source in contrasts(specs, scene, rng)
        ],
        "scene": scene.to_facts(width, height),
    }


def write_jsonl(path: Path, rows: list[dict]) -> None:
    with path.open("w") as f:
        for r in rows:
            f.write(json.dumps(r, separators=(",", ":")) + "\n")


def make_small(out: Path, count: int) -> None:
    (out / "images").mkdir(parents=True, exist_ok=True)
    rows = []
    for i in range(count):
        scene = sample_scene(PROBE_SEED, i)
        name = f"images/{i:05d}.png"
        render_scene(scene).save(out / name, optimize=True)
        rows.append(row(name, scene, 64, 64))
    write_jsonl(out / "probe.jsonl", rows)


def _multi_piece(seed: int, start: int):
    """Scenes with two or three pieces from `start` on (more to see when large)."""
    i = start
    while True:
        scene = sample_scene(seed, i)
        i += 1
        if scene.count >= 2:
            yield scene


def make_large(out: Path) -> None:
    (out / "large").mkdir(parents=True, exist_ok=True)
    rows = []
    scenes = _multi_piece(LARGE_SEED, 0)
    # 4:4:4 chroma: decoders differ most in chroma upsampling, and the goldens
    # hold Pillow's decode.
    jpeg = {"quality": 92, "subsampling": 0}
    for k in range(4):
        scene = next(scenes)
        name = f"large/scene-{k}.jpg"
        render_scene(scene, 640, 480).save(out / name, **jpeg)
        rows.append(row(name, scene, 640, 480))
    # An upright 480x640 (portrait) scene stored as 640x480 pixels turned a
    # quarter to the left, with orientation 6 telling viewers to turn it back.
    scene = next(scenes)
    upright = render_scene(scene, 480, 640)
    stored = upright.transpose(Image.Transpose.ROTATE_90)
    exif = Image.Exif()
    exif[ORIENTATION] = 6
    name = "large/rotated-exif6.jpg"
    stored.save(out / name, exif=exif.tobytes(), **jpeg)
    with Image.open(out / name) as check:
        shown = ImageOps.exif_transpose(check)
        assert shown.size == (480, 640), shown.size
        diff = np.abs(np.asarray(shown, dtype=np.int16) - np.asarray(upright, dtype=np.int16)).mean()
        assert diff < 3, f"orientation round trip differs by {diff}"
    rows.append(row(name, scene, 480, 640))
    write_jsonl(out / "large.jsonl", rows)


def make_odd(out: Path) -> None:
    (out / "odd").mkdir(parents=True, exist_ok=True)
    scenes = _multi_piece(ODD_SEED, 0)
    rgb = render_scene(next(scenes))
    # Alpha varies over the image; decoders must drop it, not composite it.
    yy, xx = np.mgrid[0:64, 0:64]
    alpha = ((xx * 4 + yy * 2) % 256).astype(np.uint8)
    rgba = np.dstack([np.asarray(rgb), alpha])
    Image.fromarray(rgba, "RGBA").save(out / "odd" / "alpha.png")
    # Not square, so the stretch resize has work to do as well.
    render_scene(next(scenes), 80, 60).convert("L").save(out / "odd" / "grey.png")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=Path("fixtures/probe"))
    ap.add_argument("--count", type=int, default=1000)
    args = ap.parse_args()
    make_small(args.out, args.count)
    make_large(args.out)
    make_odd(args.out)


if __name__ == "__main__":
    main()
