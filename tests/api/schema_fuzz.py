"""Schema-driven API fuzzing of the release binary: `make api-fuzz` (part of `make test`).

Starts `befit serve` on loopback with both blocks bundles, a few bank captions and the probe
images' folder as image root, then runs schemathesis (PyPI) against the server's own
`GET /openapi.json` for every documented operation, bounded by --max-time. The checks:

- not_a_server_error: no answer with a 5xx status;
- status_code_conformance, content_type_conformance, response_headers_conformance,
  response_schema_conformance: every answer is one the document lists, in the documented media
  type, with a body valid against its schema.

Also checks first that `docs/openapi.json` is valid OpenAPI 3.1 (openapi-spec-validator) and
that the served document is byte-for-byte that file.

    python tests/api/schema_fuzz.py [--max-time SECONDS] [--bin PATH]
"""

from __future__ import annotations

import argparse
import http.client
import json
import os
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
CHECKS = ",".join([
    "not_a_server_error",
    "status_code_conformance",
    "content_type_conformance",
    "response_headers_conformance",
    "response_schema_conformance",
])
BANK = ["a red circle left of a blue square", "two green triangles on the table",
        "a yellow ring above a purple cross"]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def request(port: int, method: str, path: str, body: dict | None = None) -> tuple[int, bytes]:
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    data = json.dumps(body).encode() if body is not None else None
    conn.request(method, path, body=data, headers={"Content-Type": "application/json"})
    response = conn.getresponse()
    return response.status, response.read()


def wait_ready(port: int, proc: subprocess.Popen, seconds: float = 60.0) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise SystemExit(f"befit serve exited with {proc.returncode} before it was ready")
        try:
            if request(port, "GET", "/readyz")[0] == 200:
                return
        except OSError:
            pass
        time.sleep(0.2)
    raise SystemExit("befit serve was not ready within 60 s")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--max-time", type=int, default=90, help="schemathesis's time budget (s)")
    parser.add_argument("--bin", default=str(REPO / "target" / "release" / "befit"))
    parser.add_argument("--schemathesis", default=str(Path(sys.executable).parent / "schemathesis"))
    args = parser.parse_args()
    # The committed document is valid OpenAPI 3.1 (openapi-spec-validator, PyPI).
    from openapi_spec_validator import validate

    validate(json.loads((REPO / "docs" / "openapi.json").read_text()))
    port = free_port()
    with tempfile.TemporaryDirectory(prefix="befit-api-fuzz-") as data_dir:
        proc = subprocess.Popen(
            [args.bin, "serve", "--bundle", str(REPO / "fixtures/models/blocks-v1"),
             "--bundle", str(REPO / "fixtures/models/blocks-v2"), "--listen", f"127.0.0.1:{port}",
             "--data-dir", data_dir, "--image-root", str(REPO / "fixtures/probe")],
            stdout=subprocess.DEVNULL, stderr=open(Path(data_dir) / "server.log", "wb"),
        )
        try:
            wait_ready(port, proc)
            status, served = request(port, "GET", "/openapi.json")
            committed = (REPO / "docs" / "openapi.json").read_bytes()
            if status != 200 or served != committed:
                print("GET /openapi.json is not docs/openapi.json", file=sys.stderr)
                return 1
            # A bank with captions, so searches have something to find.
            status, _ = request(port, "POST", "/v1/bank", {"captions": BANK})
            if status != 200:
                print(f"appending bank captions answered {status}", file=sys.stderr)
                return 1
            command = [args.schemathesis, "run", f"http://127.0.0.1:{port}/openapi.json",
                       "--checks", CHECKS, "--max-time", str(args.max_time), "--workers", "2",
                       "--request-timeout", "30", "--suppress-health-check", "all",
                       "--warnings", "off", "--no-color"]
            env = dict(os.environ, SCHEMATHESIS_HOOKS="")
            started = time.monotonic()
            # Its own cache folder goes to the temporary data folder, not the checkout.
            result = subprocess.run(command, env=env, cwd=data_dir)
            print(f"schemathesis ran {time.monotonic() - started:.0f} s, exit {result.returncode}")
            if proc.poll() is not None:
                print(f"befit serve died during the run (exit {proc.returncode})", file=sys.stderr)
                return 1
            return result.returncode
        finally:
            proc.terminate()
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                proc.kill()
            if proc.returncode not in (0, -15, None):
                log = (Path(data_dir) / "server.log").read_text(errors="replace")
                print(log[-4000:], file=sys.stderr)


if __name__ == "__main__":
    sys.exit(main())
