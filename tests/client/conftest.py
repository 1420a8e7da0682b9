"""Fixtures of the client's tests: the real `befit` binary on a free port
(and a second one with a renamed bundle copy), and the probe rows."""

from __future__ import annotations

import json
import shutil
from typing import Dict, Iterator, List

import pytest

from .client_env import BUNDLE, PROBE_DIR, BefitProcess


@pytest.fixture(scope="session")
def befit(tmp_path_factory: pytest.TempPathFactory) -> Iterator[BefitProcess]:
    """The real server with the blocks-v1 bundle, for the whole session."""
    tmp = tmp_path_factory.mktemp("befit")
    proc = BefitProcess(BUNDLE, tmp / "data", tmp / "befit.log")
    yield proc
    proc.stop()


@pytest.fixture(scope="session")
def befit_copy(tmp_path_factory: pytest.TempPathFactory) -> Iterator[BefitProcess]:
    """A second server: a copy of blocks-v1 under another version (so another
    digest), its own data dir and a small --max-groups."""
    tmp = tmp_path_factory.mktemp("befit-copy")
    bundle = tmp / "blocks-copy"
    shutil.copytree(BUNDLE, bundle)
    toml = bundle / "bundle.toml"
    text = toml.read_text()
    assert 'version = "v1"' in text
    toml.write_text(text.replace('version = "v1"', 'version = "v1-copy"', 1))
    proc = BefitProcess(bundle, tmp / "data", tmp / "befit.log", ["--max-groups", "4"])
    yield proc
    proc.stop()


@pytest.fixture(scope="session")
def probe_rows() -> List[Dict]:
    path = PROBE_DIR / "probe.jsonl"
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]
