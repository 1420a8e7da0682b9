"""The reports' example thumbnails against Pillow: each row's image is the probe image its line names.

`make test` writes the reports with `befit calibrate --report` and `befit drift --report` on the
bundled probe set into target/stats-export/. For every thumbnail in them, Pillow opens the probe
image of the line the row names, shrinks it the same way (fit in 128 px, aspect kept; Pillow's
`Image.thumbnail`), and the thumbnail must be that picture: its size equal, its pixels close (JPEG
at quality 80 and a different triangle filter leave a few levels of difference), and closer than
to any other probe image (so a row can not show a wrong image that merely looks similar).
"""

import base64
import io
import json
import re

import numpy as np
import pytest
from PIL import Image

from conftest import REPO

EXPORT = REPO / "target" / "stats-export"
PROBE = REPO / "fixtures" / "probe" / "probe.jsonl"
IMG = re.compile(r'<img class="thumb" src="data:image/jpeg;base64,([A-Za-z0-9+/=]+)" alt="probe image at line (\d+)">')


def probe_images():
    rows = [json.loads(line) for line in PROBE.read_text().splitlines() if line.strip()]
    return {i + 1: PROBE.parent / row["image"] for i, row in enumerate(rows)}


def pillow_thumbnail(path):
    with Image.open(path) as image:
        image = image.convert("RGB")
        image.thumbnail((128, 128), Image.Resampling.BILINEAR)
        return np.asarray(image, dtype=np.float64)


@pytest.mark.parametrize("report", ["calibration-blocks-v1.html", "drift-blocks-v1-v2.html"])
def test_every_thumbnail_is_its_rows_probe_image(report):
    path = EXPORT / report
    if not path.exists():
        pytest.fail(f"{path} missing: make test writes it with befit calibrate/drift --report")
    html = path.read_text()
    shown = IMG.findall(html)
    assert shown, "the report shows no example image"
    images = probe_images()
    references = {line: pillow_thumbnail(p) for line, p in images.items()}
    for b64, line in shown:
        line = int(line)
        ours = np.asarray(Image.open(io.BytesIO(base64.b64decode(b64))).convert("RGB"), dtype=np.float64)
        own = references[line]
        assert ours.shape == own.shape, f"line {line}: {ours.shape} vs Pillow {own.shape}"
        error = np.abs(ours - own).mean()
        assert error < 6.0, f"line {line}: mean abs difference {error:.2f} levels from Pillow's thumbnail"
        others = [np.abs(ours - ref).mean() for other, ref in references.items() if other != line and ref.shape == ours.shape]
        assert all(error < o for o in others), f"line {line} looks more like another probe image"
