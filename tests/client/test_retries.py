"""Retries, backoff, Retry-After and dropped connections, through a stub
HTTP server placed in front of the real befit: the stub answers 503, drops
the connection or holds a request unanswered for the first requests as told,
then passes every request through to befit unchanged.

No test measures time: the client's waits go to an injected ``sleep`` that
records them, its jitter comes from a scripted ``rng``, and its deadline is
read from an injected ``clock``."""

from __future__ import annotations

import http.client
import http.server
import json
import threading
import time
from typing import Iterator, List, Optional, Sequence, Tuple

import pytest
from befit_client import (
    Client,
    ImageId,
    Limits,
    InvalidFieldError,
    NotReadyError,
    OverloadedError,
    RetryPolicy,
    ServerPath,
    TransportError,
)
from befit_client.transport import Transport

from .client_env import BUNDLE, BefitProcess


class Stub:
    """Stub server; `script` is consumed one entry per incoming request:
    ("503", retry_after or None), ("not_ready", None), ("drop", None),
    ("hold", None): no answer until the stub is closed; once empty, requests
    pass through to `upstream`. `answered` lists the requests (by arrival
    number) the stub has answered or dropped."""

    def __init__(self, upstream: str) -> None:
        host, port = upstream.split("//", 1)[1].split(":")
        self.upstream = (host, int(port))
        self.script: List[Tuple[str, object]] = []
        self.seen: List[str] = []
        self.answered: List[int] = []
        self.release = threading.Event()
        self.lock = threading.Lock()
        stub = self

        class Handler(http.server.BaseHTTPRequestHandler):
            protocol_version = "HTTP/1.1"

            def log_message(self, *args) -> None:  # keep pytest output clean
                pass

            def handle_any(self) -> None:
                body = self.rfile.read(int(self.headers.get("Content-Length") or 0))
                with stub.lock:
                    number = len(stub.seen)
                    stub.seen.append(f"{self.command} {self.path}")
                    action = stub.script.pop(0) if stub.script else ("pass", None)
                try:
                    self.act(*action, body)
                finally:
                    with stub.lock:
                        stub.answered.append(number)

            def act(self, kind: str, arg: object, body: bytes) -> None:
                if kind == "drop":
                    self.close_connection = True
                    return
                if kind == "hold":
                    # Bounded, so a test that forgets to close the stub cannot hang the run.
                    stub.release.wait(timeout=120)
                    self.close_connection = True
                    return
                if kind in ("503", "not_ready"):
                    code = "overloaded" if kind == "503" else "not_ready"
                    payload = json.dumps({"error": {"code": code, "message": f"stub says {code}"}}).encode()
                    self.send_response(503)
                    self.send_header("Content-Type", "application/json")
                    self.send_header("Content-Length", str(len(payload)))
                    if arg is not None:
                        self.send_header("Retry-After", str(arg))
                    self.end_headers()
                    self.wfile.write(payload)
                    return
                conn = http.client.HTTPConnection(*stub.upstream, timeout=60)
                headers = {k: v for k, v in self.headers.items() if k.lower() in ("content-type", "accept")}
                conn.request(self.command, self.path, body=body or None, headers=headers)
                resp = conn.getresponse()
                data = resp.read()
                conn.close()
                self.send_response(resp.status)
                for k, v in resp.getheaders():
                    if k.lower() in ("content-type", "retry-after"):
                        self.send_header(k, v)
                self.send_header("Content-Length", str(len(data)))
                self.end_headers()
                self.wfile.write(data)

            do_GET = do_POST = handle_any

        self.server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}"
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()

    def close(self) -> None:
        self.release.set()
        self.server.shutdown()
        self.server.server_close()


@pytest.fixture
def stub(befit) -> Iterator[Stub]:
    s = Stub(befit.url)
    yield s
    s.close()


@pytest.fixture(scope="module")
def image_id(befit) -> ImageId:
    with Client(befit.url) as c:
        return c.register_images([ServerPath("images/00000.png")])[0]


class ScriptedRandom:
    """Stands in for ``random.Random``: ``random()`` returns the given
    numbers in turn, so every jittered wait is known in advance."""

    def __init__(self, values: Sequence[float]) -> None:
        self.values = list(values)

    def random(self) -> float:
        return self.values.pop(0)


def client_via(stub: Stub, retry: RetryPolicy, timeout: float = 30.0, rng: Optional[ScriptedRandom] = None):
    waits: List[float] = []
    transport = Transport(stub.url, timeout=timeout, retry=retry, sleep=waits.append, rng=rng)
    # Limits given, so that the stub's script meets only the requests under test.
    return Client(transport=transport, limits=Limits()), waits


CAPTIONS = [["two pieces", "a large purple cross", "a small red circle"]]


def test_503_is_retried_and_retry_after_honoured(stub, befit, image_id):
    direct = Client(befit.url).rewards([image_id], CAPTIONS)
    stub.script = [("503", 1), ("503", 1), ("503", 2)]
    # Two draws per retry: the backoff's shortening, then Retry-After's lengthening.
    rng = ScriptedRandom([0.2, 0.0, 0.6, 1.0, 0.4, 0.5])
    client, waits = client_via(stub, RetryPolicy(initial_delay=0.01, jitter=0.5), rng=rng)
    out = client.rewards([image_id], CAPTIONS)
    assert len(stub.seen) == 4
    assert client.transport.retries_done == 3 and rng.values == []
    # RetryPolicy's documented rule: max(backoff * (1 - jitter r1), s * (1 + jitter/4 r2)), worked
    # by hand: the backoffs 0.01 * 0.9, 0.02 * 0.7, 0.04 * 0.8 are all below Retry-After, which
    # becomes 1 * (1 + 0.125 * 0), 1 * (1 + 0.125 * 1), 2 * (1 + 0.125 * 0.5).
    assert waits == pytest.approx([1.0, 1.125, 2.125], abs=1e-12)
    assert out.cosine.tolist() == direct.cosine.tolist()


def test_without_retry_after_the_backoff_grows(stub, image_id):
    stub.script = [("503", None)] * 4
    client, waits = client_via(stub, RetryPolicy(initial_delay=0.1, multiplier=2.0, max_delay=0.5, jitter=0.0))
    client.rewards([image_id], CAPTIONS)
    assert waits == pytest.approx([0.1, 0.2, 0.4, 0.5])


def test_jitter_shortens_the_backoff_by_its_fraction(stub, image_id):
    stub.script = [("503", None)] * 3
    rng = ScriptedRandom([0.0, 1.0, 0.5])
    client, waits = client_via(stub, RetryPolicy(initial_delay=0.1, multiplier=2.0, jitter=0.5), rng=rng)
    client.rewards([image_id], CAPTIONS)
    # 0.1 * (1 - 0.5 * 0), 0.2 * (1 - 0.5 * 1), 0.4 * (1 - 0.5 * 0.5), one draw per retry.
    assert waits == pytest.approx([0.1, 0.1, 0.3], abs=1e-12) and rng.values == []


def test_gives_up_after_max_attempts_with_the_servers_error(stub, image_id):
    stub.script = [("503", 0)] * 10
    client, waits = client_via(stub, RetryPolicy(max_attempts=4, initial_delay=0.01))
    with pytest.raises(OverloadedError) as e:
        client.rewards([image_id], CAPTIONS)
    assert e.value.attempts == 4 and e.value.code == "overloaded" and e.value.retry_after == 0
    assert e.value.message == "stub says overloaded"
    assert len(stub.seen) == 4 and len(waits) == 3


def test_a_retry_after_beyond_the_cap_is_not_waited_for(stub, image_id):
    stub.script = [("503", 120)]
    client, waits = client_via(stub, RetryPolicy(max_retry_after=60))
    with pytest.raises(OverloadedError) as e:
        client.rewards([image_id], CAPTIONS)
    assert e.value.retry_after == 120 and e.value.attempts == 1
    assert waits == [] and len(stub.seen) == 1


def test_the_deadline_bounds_the_waiting(stub, image_id):
    stub.script = [("503", 1)] * 5
    now = [0.0]
    waits: List[float] = []

    def sleep(s: float) -> None:
        waits.append(s)
        now[0] += s

    transport = Transport(stub.url, retry=RetryPolicy(deadline=2.5, jitter=0.0), sleep=sleep, clock=lambda: now[0])
    # Waits of 1 s end at t = 1 and 2; the third would end at 3 > 2.5, so it is not taken.
    with pytest.raises(OverloadedError) as e:
        Client(transport=transport, limits=Limits()).rewards([image_id], CAPTIONS)
    assert waits == [1.0, 1.0] and e.value.attempts == 3 and len(stub.seen) == 3


def test_not_ready_is_retried_too(stub, image_id):
    stub.script = [("not_ready", 1)]
    client, waits = client_via(stub, RetryPolicy())
    client.rewards([image_id], CAPTIONS)
    assert len(stub.seen) == 2 and len(waits) == 1


def test_not_ready_is_not_retried_when_503_is_not_listed(stub, image_id):
    stub.script = [("not_ready", 1)]
    client, _ = client_via(stub, RetryPolicy(retry_statuses=frozenset()))
    with pytest.raises(NotReadyError):
        client.rewards([image_id], CAPTIONS)


def test_dropped_connections_are_retried_on_a_fresh_connection(stub, befit, image_id):
    direct = Client(befit.url).rewards([image_id], CAPTIONS)
    stub.script = [("drop", None), ("drop", None)]
    client, waits = client_via(stub, RetryPolicy(initial_delay=0.05, jitter=0.0))
    out = client.rewards([image_id], CAPTIONS)
    assert len(stub.seen) == 3 and waits == pytest.approx([0.05, 0.1])
    assert out.reward.tolist() == direct.reward.tolist()


def test_a_connection_that_always_drops_raises_transport_error(stub, image_id):
    stub.script = [("drop", None)] * 5
    client, _ = client_via(stub, RetryPolicy(max_attempts=3, initial_delay=0.01))
    with pytest.raises(TransportError) as e:
        client.rewards([image_id], CAPTIONS)
    assert e.value.attempts == 3 and len(stub.seen) == 3


def test_a_stalled_answer_times_out_and_is_retried(stub, image_id):
    # The first request is held without an answer for as long as the test runs; the client's
    # socket timeout must give up on it and send the request again.
    stub.script = [("hold", None)]
    client, waits = client_via(stub, RetryPolicy(initial_delay=0.01, jitter=0.0), timeout=0.5)
    out = client.rewards([image_id], CAPTIONS)
    assert len(stub.seen) == 2 and waits == [0.01] and out.reward.shape == (1, 3)
    with stub.lock:
        assert 0 not in stub.answered  # the held request had no answer when the client returned


def test_client_errors_pass_through_and_are_not_retried(stub, image_id):
    client, waits = client_via(stub, RetryPolicy())
    with pytest.raises(InvalidFieldError) as e:
        client.rewards([image_id], [[]])
    assert e.value.status == 400 and e.value.field == "groups[0].captions"
    assert len(stub.seen) == 1 and waits == []


def test_the_default_client_waits_with_the_real_clock(stub, image_id):
    # Without injected functions the client sleeps with time.sleep and reads time.monotonic
    # (what the waits above are recorded in place of), and a retry through them goes through.
    stub.script = [("503", 0)]
    client = Client(stub.url, retry=RetryPolicy(initial_delay=0.01, jitter=0.0), limits=Limits())
    assert client.transport.sleep is time.sleep and client.transport.clock is time.monotonic
    client.rewards([image_id], CAPTIONS)
    assert len(stub.seen) == 2 and client.transport.retries_done == 1


def test_the_real_server_sheds_and_every_call_still_gets_through(tmp_path, probe_rows):
    # befit with --max-inflight 1 answers 503 + Retry-After to all but one
    # request at a time; six trainers at once must all get their rewards.
    server = BefitProcess(BUNDLE, tmp_path / "data", tmp_path / "befit.log", ["--max-inflight", "1"])
    try:
        client = Client(server.url, retry=RetryPolicy(max_attempts=40, initial_delay=0.05, max_delay=0.5))
        rows = probe_rows[:200]
        ids = client.register_images([ServerPath(r["image"]) for r in rows])
        shapes, errors = [], []

        def trainer(k: int) -> None:
            try:
                for step in range(3):
                    caps = [
                        [f"{n} pieces: a small red circle {k} {step} {j}" for j in range(8)] for n in range(len(rows))
                    ]
                    shapes.append(client.rewards(ids, caps).reward.shape)
            except Exception as exc:  # reported below with the assertion
                errors.append(exc)

        threads = [threading.Thread(target=trainer, args=(k,)) for k in range(6)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert errors == []
        assert shapes == [(200, 8)] * 18
        assert client.transport.retries_done > 0  # it did shed
        # GET /v1/limits, one registration, 18 reward calls, and the retries.
        assert client.transport.requests_sent == 1 + 1 + 18 + client.transport.retries_done
    finally:
        server.stop()
