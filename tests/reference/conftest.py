"""Shared set-up of the Python reference checks: where the repository and the befit binary are."""

import os
import pathlib

import pytest

REPO = pathlib.Path(__file__).resolve().parents[2]


@pytest.fixture(scope="session")
def befit_bin() -> pathlib.Path:
    """The befit binary that `make test` built (release), or a debug build."""
    for candidate in (REPO / "target" / "release" / "befit", REPO / "target" / "debug" / "befit"):
        if candidate.exists():
            return candidate
    pytest.fail("no befit binary: run `cargo build --release` first (make test does)")


@pytest.fixture(scope="session")
def ort_lib() -> str:
    path = os.environ.get("ORT_DYLIB_PATH") or str(REPO / ".cache" / "onnxruntime" / "libonnxruntime.so.1.31.1")
    if not pathlib.Path(path).exists():
        pytest.fail(f"ONNX Runtime library missing at {path}: run `make ort`")
    return path
