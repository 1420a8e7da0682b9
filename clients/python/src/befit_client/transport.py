"""HTTP with retries: one keep-alive connection per thread, exponential
backoff with jitter on 503 and 429 answers and dropped connections,
``Retry-After`` honoured; the API key, when there is one, in
``Authorization: Bearer``.

Every route the client uses is safe to repeat (rewards and vectors are pure
functions of the request, image registration is idempotent), so a request
whose connection dropped mid-way is simply sent again.

The retry loop is kept by hand rather than taken from urllib3's ``Retry`` or
tenacity: the client depends on numpy alone and speaks ``http.client``; of
the policy below, urllib3's ``Retry`` (2.x) has the backoff, the jitter and
``Retry-After`` on 503/429 but neither a deadline over all attempts, nor a
ceiling on the ``Retry-After`` it will wait for, nor the rule that a refused
connection fails at once until the server has answered once; tenacity has
none of the ``Retry-After`` handling. Each would be the loop below plus
adapters, and the tests drive this one with injected sleep, clock and random
numbers (``tests/client/``).
"""

from __future__ import annotations

import email.utils
import http.client
import logging
import os
import random
import ssl
import socket
import threading
import time
import urllib.parse
from dataclasses import dataclass, field
from typing import Callable, FrozenSet, Mapping, Optional, Tuple

from .errors import ApiError, TransportError, from_response

log = logging.getLogger("befit_client")


@dataclass(frozen=True)
class RetryPolicy:
    """When and how long to wait before sending a failed request again.

    The n-th retry (n = 1, 2, ...) waits ``min(max_delay, initial_delay *
    multiplier**(n-1))``, shortened by a random fraction up to ``jitter`` so
    that trainers shed at the same moment do not come back in lockstep. When
    the answer carries ``Retry-After: s``, the wait is at least ``s`` (and up
    to ``jitter / 4`` of ``s`` more); a ``Retry-After`` above
    ``max_retry_after`` is not waited for: the error is raised at once.
    No attempt starts later than ``deadline`` seconds after the first one.
    """

    max_attempts: int = 8
    initial_delay: float = 0.2
    multiplier: float = 2.0
    max_delay: float = 10.0
    jitter: float = 0.5
    max_retry_after: float = 60.0
    deadline: Optional[float] = 300.0
    # 503: shed or loading; 429: over the key's rate. Both say when to come back.
    retry_statuses: FrozenSet[int] = field(default_factory=lambda: frozenset({503, 429}))
    retry_on_timeout: bool = True
    # A refused connection before this transport ever had an answer means no
    # server is listening: fail at once instead of retrying for seconds. Once
    # the server has answered, a refusal is a restart and is retried.
    retry_refused_at_first: bool = False

    def __post_init__(self) -> None:
        if self.max_attempts < 1:
            raise ValueError("RetryPolicy.max_attempts must be at least 1")
        if not 0.0 <= self.jitter <= 1.0:
            raise ValueError("RetryPolicy.jitter is a fraction between 0 and 1")
        if self.initial_delay < 0 or self.max_delay < 0 or self.multiplier < 1:
            raise ValueError("RetryPolicy delays must be >= 0 and multiplier >= 1")

    def backoff(self, retry: int) -> float:
        """The wait before retry number ``retry`` (1-based), before jitter."""
        return min(self.max_delay, self.initial_delay * self.multiplier ** (retry - 1))

    def delay(self, retry: int, retry_after: Optional[float], rng: random.Random) -> float:
        """The jittered wait before retry number ``retry``."""
        wait = self.backoff(retry) * (1.0 - self.jitter * rng.random())
        if retry_after is not None:
            wait = max(wait, retry_after * (1.0 + 0.25 * self.jitter * rng.random()))
        return wait


NO_RETRY = RetryPolicy(max_attempts=1)

#: The environment variable a key is read from when none is given.
KEY_ENV = "BEFIT_API_KEY"


def resolve_key(key: Optional[str]) -> Optional[str]:
    """The key given, else ``$BEFIT_API_KEY``, else None (a server without keys)."""
    if key is None:
        key = os.environ.get(KEY_ENV) or None
    if key is not None and (not key.strip() or any(c in key for c in "\r\n")):
        raise ValueError(f"an API key is one line of text (from `befit keys new`); check key= or ${KEY_ENV}")
    return key.strip() if key is not None else None


def parse_retry_after(value: Optional[str], now: Optional[float] = None) -> Optional[float]:
    """Seconds to wait from a ``Retry-After`` header: delta-seconds or an
    HTTP-date (RFC 9110, section 10.2.3). None when absent or unreadable."""
    if value is None:
        return None
    value = value.strip()
    try:
        return max(0.0, float(int(value)))
    except ValueError:
        pass
    try:
        when = email.utils.parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    if when is None:
        return None
    return max(0.0, when.timestamp() - (time.time() if now is None else now))


@dataclass
class Response:
    status: int
    headers: Mapping[str, str]
    body: bytes


# Failures after which the request is sent again on a fresh connection.
_DROPPED = (
    ConnectionError,  # refused, reset, aborted, broken pipe; http.client.RemoteDisconnected
    http.client.BadStatusLine,
    http.client.IncompleteRead,
    http.client.CannotSendRequest,
    http.client.ResponseNotReady,
)


class Transport:
    """Sends requests to one befit server, retrying as ``retry`` says.

    ``timeout`` bounds each socket operation (connect, each send, each read),
    in seconds. ``key`` is the API key (default: ``$BEFIT_API_KEY``); it is
    sent on every request and never logged. ``ssl_context`` verifies an
    ``https`` server (e.g. one trusting a private CA's certificate).
    ``sleep``, ``clock`` and ``rng`` can be replaced (tests, simulations).
    """

    def __init__(
        self,
        url: str,
        timeout: float = 150.0,
        retry: Optional[RetryPolicy] = None,
        user_agent: str = "befit-client",
        sleep: Callable[[float], None] = time.sleep,
        rng: Optional[random.Random] = None,
        clock: Callable[[], float] = time.monotonic,
        key: Optional[str] = None,
        ssl_context: Optional[ssl.SSLContext] = None,
    ) -> None:
        parts = urllib.parse.urlsplit(url if "://" in url else "http://" + url)
        if parts.scheme not in ("http", "https") or not parts.hostname:
            raise ValueError(f"a befit URL looks like http://127.0.0.1:7878, got {url!r}")
        self.scheme = parts.scheme
        self.host = parts.hostname
        self.port = parts.port or (443 if parts.scheme == "https" else 80)
        self.prefix = parts.path.rstrip("/")
        self.timeout = timeout
        self.retry = retry or RetryPolicy()
        self.user_agent = user_agent
        self._key = resolve_key(key)
        self.ssl_context = ssl_context
        self.sleep = sleep
        self.clock = clock
        self.rng = rng or random.Random()
        self._local = threading.local()
        self._count_lock = threading.Lock()
        # Totals over this transport's life, for logs and tests.
        self.requests_sent = 0  # attempts, retries included
        self.retries_done = 0
        self.answered = False  # some request got an HTTP answer

    def __repr__(self) -> str:
        # The key stays out of reprs, and so out of logs and tracebacks.
        return f"Transport({self.base_url!r}, key={'set' if self._key else None})"

    @property
    def has_key(self) -> bool:
        return self._key is not None

    @property
    def base_url(self) -> str:
        return f"{self.scheme}://{self.host}:{self.port}{self.prefix}"

    def _connection(self) -> http.client.HTTPConnection:
        conn = getattr(self._local, "conn", None)
        if conn is None:
            if self.scheme == "https":
                conn = http.client.HTTPSConnection(self.host, self.port, timeout=self.timeout, context=self.ssl_context)
            else:
                conn = http.client.HTTPConnection(self.host, self.port, timeout=self.timeout)
            self._local.conn = conn
        return conn

    def _drop_connection(self) -> None:
        conn = getattr(self._local, "conn", None)
        if conn is not None:
            conn.close()
            self._local.conn = None

    def close(self) -> None:
        """Closes this thread's connection (others close when their thread ends)."""
        self._drop_connection()

    def _send_once(self, method: str, path: str, body: Optional[bytes], headers: Mapping[str, str]) -> Response:
        conn = self._connection()
        with self._count_lock:
            self.requests_sent += 1
        try:
            conn.request(method, self.prefix + path, body=body, headers=dict(headers))
            resp = conn.getresponse()
            data = resp.read()
        except BaseException:
            self._drop_connection()
            raise
        if resp.will_close:
            self._drop_connection()
        self.answered = True
        return Response(resp.status, {k.lower(): v for k, v in resp.getheaders()}, data)

    def request(
        self,
        method: str,
        path: str,
        body: Optional[bytes] = None,
        content_type: str = "application/json",
        retry: Optional[RetryPolicy] = None,
    ) -> Response:
        """Sends one request; returns a 2xx answer or raises the typed error
        of the last attempt (:class:`ApiError` or :class:`TransportError`)."""
        policy = retry or self.retry
        headers = {"User-Agent": self.user_agent, "Accept": "application/json"}
        if self._key is not None:
            headers["Authorization"] = f"Bearer {self._key}"
        if body is not None:
            headers["Content-Type"] = content_type
        started = self.clock()
        attempt = 0
        while True:
            attempt += 1
            retry_after: Optional[float] = None
            failure: Tuple[str, BaseException]
            try:
                resp = self._send_once(method, path, body, headers)
            except socket.timeout as exc:  # also TimeoutError on Python >= 3.10
                if not policy.retry_on_timeout:
                    raise TransportError(f"{method} {path}: no answer within {self.timeout} s", attempt) from exc
                failure = ("timeout", exc)
            except ConnectionRefusedError as exc:
                if not self.answered and not policy.retry_refused_at_first:
                    raise TransportError(
                        f"{method} {self.base_url}{path}: connection refused: is befit running there? "
                        "(start it with `make serve`; Client.wait_ready() waits for a server that is starting)",
                        attempt,
                    ) from exc
                failure = ("connection refused", exc)
            except _DROPPED as exc:
                failure = ("connection dropped", exc)
            except OSError as exc:
                # Name resolution and the like: retrying will not help.
                raise TransportError(f"{method} {self.base_url}{path}: {exc}", attempt) from exc
            else:
                if 200 <= resp.status < 300:
                    return resp
                retry_after = parse_retry_after(resp.headers.get("retry-after"))
                err = from_response(resp.status, resp.body, retry_after)
                err.attempts = attempt
                if resp.status not in policy.retry_statuses:
                    raise err
                failure = (f"answer {resp.status}", err)
            # Decide whether another attempt is allowed.
            wait = policy.delay(attempt, retry_after, self.rng)
            too_late = policy.deadline is not None and self.clock() - started + wait > policy.deadline
            if (
                attempt >= policy.max_attempts
                or too_late
                or (retry_after is not None and retry_after > policy.max_retry_after)
            ):
                kind, exc = failure
                if isinstance(exc, ApiError):
                    raise exc
                raise TransportError(
                    f"{method} {self.base_url}{path}: {kind} failed after {attempt} attempt(s): {exc!r}", attempt
                ) from exc
            with self._count_lock:
                self.retries_done += 1
            kind, exc = failure
            log.warning(
                "%s %s%s: %s (%s); retry %d of %d in %.2f s",
                method,
                self.base_url,
                path,
                kind,
                exc,
                attempt,
                policy.max_attempts - 1,
                wait,
            )
            self.sleep(wait)
