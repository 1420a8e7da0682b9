"""Writes the fuzz targets' starting corpora from the project's own fixtures (`make fuzz`).

Each target's first input byte picks a variant (a preprocessing rule, a request type, a file of
the dump), so every seed is written once per variant byte. Corpora go to fuzz/corpus/TARGET/.
"""

from __future__ import annotations

import json
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
CORPUS = REPO / "fuzz" / "corpus"


def put(target: str, name: str, data: bytes) -> None:
    folder = CORPUS / target
    folder.mkdir(parents=True, exist_ok=True)
    (folder / name).write_bytes(data)


def main() -> None:
    images = sorted((REPO / "fixtures/probe/images").glob("*.png"))[:4]
    images += sorted((REPO / "fixtures/probe/odd").glob("*"))
    for i, image in enumerate(images):
        for variant in (0, 1):
            put("image_bytes", f"seed-{i}-{variant}", bytes([variant]) + image.read_bytes())
    for bundle in sorted((REPO / "fixtures/models").glob("*/bundle.toml")):
        put("bundle_toml", f"seed-{bundle.parent.name}", bundle.read_bytes())
    probe = (REPO / "fixtures/probe/probe.jsonl").read_bytes().splitlines(keepends=True)
    put("probe_jsonl", "seed-5", bytes([0]) + b"".join(probe[:5]))
    put("probe_jsonl", "seed-1-skip", bytes([1]) + probe[0])
    row = json.loads(probe[0])
    rewards = {"scale": {"kind": "clip-s"}, "baseline": "mean-of-others",
               "guard": {"nearest_bank": True, "penalties": {}},
               "groups": [{"image": {"path": row["image"]}, "captions": row["captions"][:3]}]}
    bodies = {
        0: {"texts": row["captions"][:2], "images": [{"path": row["image"]}]},
        1: {"tag": "seed", "captions": ["a red circle", {"text": "a blue square", "tag": "t"}]},
        2: {"text": row["captions"][0], "k": 5, "tag": "seed"},
        3: {"probe": [row], "options": {}, "skip_bad": True},
        4: {"from": "blocks@v1", "to": "blocks@v2", "probe": [row],
            "save_map": {"name": "seed", "kind": "affine"}},
        5: {"images": [{"id": "0" * 64}, {"path": row["image"]}]},
        6: rewards,
        7: {**rewards, "run": "seed-run", "step": 3},
    }
    for variant, body in bodies.items():
        put("request_bodies", f"seed-{variant}", bytes([variant]) + json.dumps(body).encode())
    maps = [
        {"kind": "affine", "a": 0.87, "b": 0.15},
        {"kind": "monotone", "knots": [[-0.25, -0.26], [-0.23, -0.24], [0.05, 0.01]]},
    ]
    for i, fitted in enumerate(maps):
        end = {"id": "blocks@v1", "digest": "ab" * 32}
        text = json.dumps({"applies_to": end, "lands_on": end, "map": fitted})
        put("map_json", f"seed-{i}", text.encode())
    for variant in (0, 1, 2, 0x81, 0x82):
        put("bank_dump", f"seed-{variant}", bytes([variant]) + b"\x10\x00\xff\x20\x00\x00")


if __name__ == "__main__":
    main()
