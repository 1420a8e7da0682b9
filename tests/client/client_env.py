"""Where the client's tests find things, and a running `befit serve`.

The binary is `target/release/befit` (or `$BEFIT_BIN`); the ONNX Runtime
library comes from `$ORT_DYLIB_PATH`, which the Makefile exports, or from
the Makefile's cache folder when run by hand. Importing this module puts the
client's source and the examples on `sys.path`, so the tests need no install.
(Named apart from `conftest` so that test files can import it even when
pytest also collects `tests/reference`, which has a conftest of its own.)
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import List, Optional

import pytest

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO / "clients/python/src"))
sys.path.insert(0, str(REPO / "examples"))

# Overridable so the tests can run from a checkout whose fixtures live elsewhere.
PROBE_DIR = Path(os.environ.get("BEFIT_PROBE_DIR", REPO / "fixtures/probe"))
BUNDLE = Path(os.environ.get("BEFIT_BUNDLE", REPO / "fixtures/models/blocks-v1"))
ORT_DEFAULT = REPO / ".cache/onnxruntime/libonnxruntime.so.1.31.1"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class BefitProcess:
    """A running `befit serve`; `url` is where it listens."""

    def __init__(self, bundle: Path, data_dir: Path, log: Path, extra: Optional[List[str]] = None) -> None:
        binary = Path(os.environ.get("BEFIT_BIN", REPO / "target/release/befit"))
        if not binary.exists():
            pytest.fail(f"{binary} not found: build it first (make build)")
        env = dict(os.environ)
        if "ORT_DYLIB_PATH" not in env and ORT_DEFAULT.exists():
            env["ORT_DYLIB_PATH"] = str(ORT_DEFAULT)
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.log = log
        cmd = [
            str(binary),
            "serve",
            "--bundle",
            str(bundle),
            "--listen",
            f"127.0.0.1:{self.port}",
            "--data-dir",
            str(data_dir),
            "--image-root",
            str(PROBE_DIR),
            *(extra or []),
        ]
        self._log_file = open(log, "wb")
        self.proc = subprocess.Popen(cmd, stdout=self._log_file, stderr=subprocess.STDOUT, env=env, cwd=REPO)
        self._wait_ready(timeout=120)

    def _wait_ready(self, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                self.stop()
                pytest.fail(f"befit exited with {self.proc.returncode}:\n{self.log.read_text()[-3000:]}")
            try:
                with urllib.request.urlopen(self.url + "/readyz", timeout=2) as r:
                    if r.status == 200:
                        return
            except (urllib.error.URLError, ConnectionError, OSError):
                pass
            time.sleep(0.1)
        self.stop()
        pytest.fail(f"befit not ready within {timeout} s:\n{self.log.read_text()[-3000:]}")

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self._log_file.close()
