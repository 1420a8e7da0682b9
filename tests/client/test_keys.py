"""The client with an API key: the key sent as ``Authorization: Bearer``
(argument or ``BEFIT_API_KEY``), never shown in reprs, 429 retried after
its ``Retry-After`` like 503, and the real `befit serve --keys`.

No test measures time: waits go to an injected ``sleep``."""

from __future__ import annotations

import http.server
import json
import os
import subprocess
import threading
from pathlib import Path
from typing import Iterator, List, Tuple

import pytest
from befit_client import Client, KeyRequiredError, RateLimitedError, RetryPolicy, ScopeMissingError, ServerPath
from befit_client.transport import KEY_ENV, Transport

from .client_env import BUNDLE, REPO, BefitProcess


class KeyStub:
    """Answers 429 (Retry-After: 3) to the first ``limited`` requests, then
    200 with the Authorization header it got; records every header seen."""

    def __init__(self, limited: int) -> None:
        self.limited = limited
        self.seen: List[str] = []
        stub = self

        class Handler(http.server.BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"

            def log_message(self, *args) -> None:
                pass

            def do_GET(self) -> None:
                auth = self.headers.get("Authorization", "")
                stub.seen.append(auth)
                if len(stub.seen) <= stub.limited:
                    body = json.dumps({"error": {"code": "rate_limited", "message": "over"}}).encode()
                    self.send_response(429)
                    self.send_header("Retry-After", "3")
                else:
                    body = json.dumps({"auth": auth}).encode()
                    self.send_response(200)
                self.send_header("Content-Type", "application/json")
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

        self.server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}"
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


@pytest.fixture
def stub_429() -> Iterator[KeyStub]:
    stub = KeyStub(limited=2)
    yield stub
    stub.close()


def test_the_key_is_sent_and_429_is_retried_after_its_retry_after(stub_429: KeyStub) -> None:
    waits: List[float] = []
    transport = Transport(stub_429.url, key="bft_secret", sleep=waits.append, retry=RetryPolicy(jitter=0.0))
    resp = transport.request("GET", "/v1/models")
    assert resp.status == 200
    assert json.loads(resp.body) == {"auth": "Bearer bft_secret"}
    assert stub_429.seen == ["Bearer bft_secret"] * 3
    # Each wait is at least the server's Retry-After (RFC 9110 §10.2.3), as for 503.
    assert waits == [3.0, 3.0]
    assert "bft_secret" not in repr(transport)


def test_429_past_the_attempts_raises_the_typed_error(stub_429: KeyStub) -> None:
    transport = Transport(stub_429.url, key="k", sleep=lambda s: None, retry=RetryPolicy(max_attempts=2))
    with pytest.raises(RateLimitedError) as info:
        transport.request("GET", "/v1/models")
    assert info.value.retry_after == 3.0
    assert info.value.attempts == 2


def test_the_key_comes_from_the_environment_when_not_given(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv(KEY_ENV, "bft_from_env")
    assert Transport("http://127.0.0.1:1")._key == "bft_from_env"
    assert Transport("http://127.0.0.1:1", key="bft_given")._key == "bft_given"
    monkeypatch.delenv(KEY_ENV)
    assert not Transport("http://127.0.0.1:1").has_key
    with pytest.raises(ValueError):
        Transport("http://127.0.0.1:1", key="two\nlines")


def _binary() -> Path:
    return Path(os.environ.get("BEFIT_BIN", REPO / "target/release/befit"))


def _new_key(keys: Path, scope: str, key_id: str) -> str:
    out = subprocess.run(
        [str(_binary()), "keys", "new", "--keys", str(keys), "--scope", scope, "--id", key_id],
        capture_output=True,
        check=True,
        text=True,
    )
    return out.stdout.strip()


@pytest.fixture(scope="module")
def keyed(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Tuple[BefitProcess, str, str]]:
    """befit serve with a keys file: a scoring key and a statistics key."""
    tmp = tmp_path_factory.mktemp("befit-keys")
    keys = tmp / "keys"
    scoring = _new_key(keys, "scoring", "trainer")
    stats = _new_key(keys, "statistics", "analyst")
    proc = BefitProcess(BUNDLE, tmp / "data", tmp / "befit.log", ["--keys", str(keys)])
    yield proc, scoring, stats
    proc.stop()


def test_the_client_works_with_a_key_against_a_server_with_keys(keyed: Tuple[BefitProcess, str, str]) -> None:
    proc, scoring, stats = keyed
    with Client(proc.url, key=scoring) as client:
        default, models = client.models()
        assert default == "blocks@v1"
        rewards = client.rewards([ServerPath("images/00000.png")], [["a red cube"]])
        assert rewards.cosine.shape == (1, 1)
    with Client(proc.url, key="bft_wrong", retry=RetryPolicy(max_attempts=1)) as client:
        with pytest.raises(KeyRequiredError):
            client.models()
    with Client(proc.url, key=stats, retry=RetryPolicy(max_attempts=1)) as client:
        with pytest.raises(ScopeMissingError) as info:
            client.rewards([ServerPath("images/00000.png")], [["a red cube"]])
        assert "analyst" in str(info.value) and "scoring" in str(info.value)
