"""Draw `scenes.png` for the README: a few probe scenes with their captions.

    python tools/blocksworld/draw_scenes.py

Each tile shows a probe image (enlarged, pixels kept sharp), two of its true
captions and one contrast caption with the fact it changes.
"""

from __future__ import annotations

import argparse
import json
import textwrap
from pathlib import Path

from PIL import Image, ImageDraw, ImageFont

SCALE = 3
TILE_W, TEXT_H = 64 * SCALE + 250, 64 * SCALE


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--probe", type=Path, default=Path("fixtures/probe/probe.jsonl"))
    ap.add_argument("--out", type=Path, default=Path(__file__).with_name("scenes.png"))
    ap.add_argument("--rows", type=int, nargs="*", default=[0, 1, 2, 3, 5, 7])
    args = ap.parse_args()
    rows = [json.loads(line) for line in args.probe.read_text().splitlines()]
    font = ImageFont.load_default(size=13)
    cols = 2
    n = len(args.rows)
    sheet = Image.new("RGB", (cols * TILE_W + 10, ((n + cols - 1) // cols) * (TEXT_H + 10) + 10), "white")
    draw = ImageDraw.Draw(sheet)
    for k, r_index in enumerate(args.rows):
        row = rows[r_index]
        x0, y0 = 10 + (k % cols) * TILE_W, 10 + (k // cols) * (TEXT_H + 10)
        with Image.open(args.probe.parent / row["image"]) as im:
            sheet.paste(im.convert("RGB").resize((64 * SCALE, 64 * SCALE), Image.Resampling.NEAREST), (x0, y0))
        tx, ty = x0 + 64 * SCALE + 8, y0
        lines = [("#000000", f"{row['image']}")]
        for c in row["captions"][:2]:
            lines += [("#1a5e1a", s) for s in textwrap.wrap("+ " + c, 36)]
        contrast = next((c for c in row["contrasts"] if c["changed"] == "relation"), row["contrasts"][0])
        lines += [("#a01010", s) for s in textwrap.wrap(f"- ({contrast['changed']}) {contrast['caption']}", 36)]
        for colour, line in lines:
            draw.text((tx, ty), line, fill=colour, font=font)
            ty += 16
    sheet.save(args.out, optimize=True)
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
