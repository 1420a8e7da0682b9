"""The bundle digest befit reports, recomputed with Python's hashlib from the definition in docs/bundles.md."""

import hashlib
import json
import pathlib
import subprocess
import tomllib

import pytest

from conftest import REPO

BUNDLES = sorted(p for p in (REPO / "fixtures" / "models").iterdir() if (p / "bundle.toml").exists())


def reference_digest(bundle: pathlib.Path) -> str:
    manifest = tomllib.loads((bundle / "bundle.toml").read_text())
    names = ["bundle.toml", manifest["image"]["file"], manifest["text"]["file"], manifest["text"].get("tokenizer", "tokenizer.json")]
    if "fluency" in manifest:  # the optional head comes last
        names.append(manifest["fluency"]["file"])
    outer = hashlib.sha256()
    for name in names:
        outer.update(name.encode() + b"\0" + hashlib.sha256((bundle / name).read_bytes()).digest())
    return outer.hexdigest()


@pytest.mark.parametrize("bundle", BUNDLES, ids=[b.name for b in BUNDLES])
def test_digest_matches_hashlib(bundle, befit_bin, ort_lib):
    out = subprocess.run([befit_bin, "check-bundle", bundle, "--ort-lib", ort_lib], capture_output=True, text=True, check=True)
    report = json.loads(out.stdout)
    assert report["digest"] == reference_digest(bundle)
    manifest = tomllib.loads((bundle / "bundle.toml").read_text())
    assert report["id"] == f'{manifest["model"]["name"]}@{manifest["model"]["version"]}'


def test_every_bundle_is_checked():
    # A glob that found nothing would make the parametrised test above vacuous.
    assert {"blocks-v1", "blocks-v2", "clip-tiny"} <= {b.name for b in BUNDLES}, [b.name for b in BUNDLES]
