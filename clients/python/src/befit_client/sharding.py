"""Several befit reward replicas behind one client.

Each image is sent to the replica that rendezvous hashing picks for its
content id (highest random weight: Thaler and Ravishankar, "A Name-Based
Mapping Scheme for Rendezvous", 1996): every replica ranks by a hash of
(replica, key) and the highest wins. The same image always lands on the same
replica, so each replica's image store and caches hold their own share of the
images and stay hot; a replica leaving moves only its own share, to the next
replica in each image's ranking, and a replica joining takes only a share.

When a replica is down (connection refused or dropped, a timeout) or answers
503 (overloaded, not ready) or a proxy's 502/504, the request goes to the next
replica of each image's ranking; rewards and vectors are pure functions of the
request, so sending one again elsewhere is safe. The replica that takes over
does not hold the images yet: it answers ``unknown_image`` and they are
registered there from the sources the call was given, then the request is
sent again. A replica that failed is passed over for ``down_for`` seconds,
then tried again. When every replica fails, the client waits as its
``retry`` policy says and tries another round.

The caption bank has one writer (one replica owns ``bank.sqlite``): bank
routes go to ``bank_url`` only, never to the reward replicas.
"""

from __future__ import annotations

import hashlib
import random
import socket
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, Set, Tuple, TypeVar

import numpy as np

from .chunking import Limits
from .client import Client, ScaleSpec, check_reward_args
from .errors import ApiError, ModelMismatchError, ProtocolError, TransportError
from .images import ImageId, ServerPath, content_id, source_bytes
from .results import ModelInfo, Rewards, Vectors, assemble_rewards
from .transport import RetryPolicy

T = TypeVar("T")

# Answers after which the same request goes to another replica: the replica
# shed it or is not ready (503), or a proxy in front of it found it gone.
FAILOVER_STATUSES = frozenset({502, 503, 504})

# Each replica's own transport: one immediate second try on a fresh
# connection (a keep-alive connection the replica closed while idle is not a
# failure), then the error goes to the sharded client, which fails over.
REPLICA_RETRY = RetryPolicy(
    max_attempts=2,
    initial_delay=0.0,
    jitter=0.0,
    retry_statuses=frozenset(),
    retry_on_timeout=False,
    deadline=None,
)


def rendezvous_weight(replica: str, key: str) -> int:
    """The weight of ``replica`` for ``key``: the first 8 bytes of
    sha256(replica NUL key), as an unsigned integer."""
    digest = hashlib.sha256(replica.encode("utf-8") + b"\0" + key.encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "big")


def rendezvous_order(key: str, replicas: Sequence[str]) -> List[str]:
    """``replicas`` ranked for ``key``, highest weight first (ties, which
    sha256 makes vanishingly rare, broken by name)."""
    return sorted(replicas, key=lambda r: (-rendezvous_weight(r, key), r))


def replica_urls(host: str, port: int = 7878, scheme: str = "http") -> List[str]:
    """A URL for every address ``host`` resolves to, sorted: the name of a
    headless Service (``befit-reward-replicas`` in deploy/kubernetes/)
    resolves to each ready replica. Resolve again to follow scaling."""
    infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    addresses = sorted({str(info[4][0]) for info in infos})
    return [f"{scheme}://[{a}]:{port}" if ":" in a else f"{scheme}://{a}:{port}" for a in addresses]


def image_key(source: Any) -> Tuple[str, Any]:
    """The routing key of an image source and what to send in its place:
    the content id with the file bytes (encoded once, here), an id as is, or
    a server path keyed by its path."""
    if isinstance(source, ImageId):
        return str(source), source
    if isinstance(source, ServerPath):
        return "path:" + source.path, source
    data = source_bytes(source)
    assert data is not None
    return str(content_id(data)), data


def _model_json(info: ModelInfo) -> Dict[str, str]:
    return {"id": info.id, "name": info.name, "version": info.version, "digest": info.digest}


class _Part:
    """Items of one call assigned to one replica, by their index in the call."""

    def __init__(self, replica: str, indices: List[int]) -> None:
        self.replica = replica
        self.indices = indices


class ShardedClient:
    """A client over several befit reward replicas.

    - ``urls``: the reward replicas (e.g. each pod of a headless Service).
    - ``bank_url``: the replica that owns the caption bank (or an address
      routing bank routes to it); bank calls need it.
    - ``model``, ``pin_digest``, ``timeout``, ``limits``: as for
      :class:`Client`, for every replica; the pin holds across replicas, so
      a replica serving another bundle raises :class:`ModelMismatchError`.
    - ``retry``: rounds over the replicas when every one of them failed
      (default ``RetryPolicy()``); within a round a failure moves on to the
      next replica at once.
    - ``down_for``: seconds a replica that failed is passed over.

    Threads may share a ShardedClient. ``failovers`` counts requests sent
    again to another replica.
    """

    def __init__(
        self,
        urls: Sequence[str],
        *,
        bank_url: Optional[str] = None,
        model: Optional[str] = None,
        pin_digest: Optional[str] = None,
        timeout: float = 150.0,
        retry: Optional[RetryPolicy] = None,
        limits: Optional[Limits] = None,
        down_for: float = 5.0,
        sleep: Callable[[float], None] = time.sleep,
        clock: Callable[[], float] = time.monotonic,
        rng: Optional[random.Random] = None,
        key: Optional[str] = None,
    ) -> None:
        if isinstance(urls, str) or not urls:
            raise ValueError("ShardedClient takes a list of one or more replica URLs")
        self.replicas: Dict[str, Client] = {}
        for url in urls:
            replica = Client(url, model=model, timeout=timeout, retry=REPLICA_RETRY, limits=limits, key=key)
            self.replicas.setdefault(replica.transport.base_url, replica)
        self.bank = (
            Client(bank_url, model=model, timeout=timeout, retry=retry or RetryPolicy(), limits=limits, key=key)
            if bank_url is not None
            else None
        )
        self.model = model
        self.retry = retry or RetryPolicy()
        self.down_for = down_for
        self.sleep = sleep
        self.clock = clock
        self.rng = rng or random.Random()
        self._pin_first = pin_digest == "first"
        self._pin: Optional[str] = None if self._pin_first or pin_digest is None else ImageId(pin_digest)
        self._lock = threading.Lock()
        self._down_until: Dict[str, float] = {}
        self.failovers = 0

    # -- plumbing -------------------------------------------------------

    def __enter__(self) -> "ShardedClient":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def close(self) -> None:
        for replica in self.replicas.values():
            replica.close()
        if self.bank is not None:
            self.bank.close()

    @property
    def pinned_digest(self) -> Optional[str]:
        return self._pin

    def _check_model(self, info: ModelInfo) -> None:
        with self._lock:
            if self._pin is None and self._pin_first:
                self._pin = info.digest
            if self._pin is not None and info.digest != self._pin:
                raise ModelMismatchError(self._pin, info.digest, info.id)

    def is_down(self, replica: str) -> bool:
        """True while ``replica`` is passed over after a failure."""
        with self._lock:
            return self._down_until.get(replica, float("-inf")) > self.clock()

    def _mark(self, replica: str, down: bool) -> None:
        with self._lock:
            if down:
                self._down_until[replica] = self.clock() + self.down_for
            else:
                self._down_until.pop(replica, None)

    def owner(self, key: str, exclude: Optional[Set[str]] = None) -> Optional[str]:
        """The replica a key goes to now: the first of its ranking that is
        neither excluded nor down (a down one when all are down)."""
        ranked = [r for r in rendezvous_order(key, list(self.replicas)) if r not in (exclude or ())]
        live = [r for r in ranked if not self.is_down(r)]
        return (live or ranked or [None])[0]

    def _plan(self, keys: Sequence[str], pending: Sequence[int], exclude: Set[str]) -> List[_Part]:
        parts: Dict[str, List[int]] = {}
        for i in pending:
            replica = self.owner(keys[i], exclude)
            assert replica is not None
            parts.setdefault(replica, []).append(i)
        return [_Part(r, ix) for r, ix in parts.items()]

    def _spread(self, keys: Sequence[str], call: Callable[[Client, List[int]], T]) -> List[Tuple[List[int], T]]:
        """Runs ``call(replica, indices)`` for every item's owner, at once,
        moving the items of a replica that fails to their next replica;
        returns each successful part's indices and answer."""
        done: List[Tuple[List[int], T]] = []
        pending = list(range(len(keys)))
        failed: Set[str] = set()
        errors: List[BaseException] = []
        started = self.clock()
        rounds = 1
        while pending:
            if len(failed) == len(self.replicas):
                # Every replica failed this round: wait, then start over.
                retry_after = max((e.retry_after or 0.0 for e in errors if isinstance(e, ApiError)), default=None)
                wait = self.retry.delay(rounds, retry_after, self.rng)
                late = self.retry.deadline is not None and self.clock() - started + wait > self.retry.deadline
                if rounds >= self.retry.max_attempts or late:
                    raise errors[-1]
                self.sleep(wait)
                rounds += 1
                failed.clear()
                errors.clear()
            parts = self._plan(keys, pending, failed)
            pending = []
            for part, (answer, error) in zip(parts, self._run_parts(parts, call)):
                if error is None:
                    self._mark(part.replica, False)
                    done.append((part.indices, answer))  # type: ignore[arg-type]
                    continue
                failed.add(part.replica)
                errors.append(error)
                self._mark(part.replica, True)
                with self._lock:
                    self.failovers += 1
                pending.extend(part.indices)
            pending.sort()
        return done

    def _run_parts(
        self, parts: List[_Part], call: Callable[[Client, List[int]], T]
    ) -> List[Tuple[Optional[T], Optional[BaseException]]]:
        def one(part: _Part) -> Tuple[Optional[T], Optional[BaseException]]:
            try:
                return call(self.replicas[part.replica], part.indices), None
            except TransportError as exc:
                return None, exc
            except ApiError as exc:
                if exc.status in FAILOVER_STATUSES:
                    return None, exc
                raise

        if len(parts) == 1:
            return [one(parts[0])]
        with ThreadPoolExecutor(max_workers=len(parts)) as pool:
            return list(pool.map(one, parts))

    # -- service state --------------------------------------------------

    def ready_replicas(self) -> List[str]:
        """The replicas whose ``/readyz`` says ready now."""
        return [url for url, c in self.replicas.items() if c.ready()]

    def wait_ready(self, timeout: float = 60.0, interval: float = 0.1) -> None:
        """Waits until every replica (and the bank replica) is ready."""
        deadline = time.monotonic() + timeout
        clients = list(self.replicas.values()) + ([self.bank] if self.bank is not None else [])
        for c in clients:
            c.wait_ready(timeout=max(0.0, deadline - time.monotonic()), interval=interval)

    # -- images, rewards, vectors ---------------------------------------

    def register_images(self, images: Sequence[Any]) -> List[ImageId]:
        """Content ids of ``images``, each registered on its replica."""
        routed = [image_key(src) for src in images]
        keys = [k for k, _ in routed]
        ids: List[Optional[ImageId]] = [None] * len(images)
        for indices, got in self._spread(keys, lambda c, ix: c.register_images([routed[i][1] for i in ix])):
            for i, image_id in zip(indices, got):
                ids[i] = image_id
        return [x for x in ids if x is not None]

    def rewards(
        self,
        images: Sequence[Any],
        captions: Sequence[Sequence[str]],
        *,
        scale: ScaleSpec = "cosine",
        baseline: str = "none",
        references: Optional[Sequence[Optional[Sequence[str]]]] = None,
        greedy: Optional[Sequence[Optional[str]]] = None,
        remap: Optional[str] = None,
        model: Optional[str] = None,
    ) -> Rewards:
        """:meth:`Client.rewards` over the replicas: each group goes to its
        image's replica, the answers come back in request order. Give image
        sources (paths, bytes, arrays), not only ids, so a replica taking
        over can be sent the images it lacks."""
        check_reward_args(images, captions, baseline, references, greedy)
        n = len(images)
        routed = [image_key(src) for src in images]

        def call(c: Client, ix: List[int]) -> Rewards:
            return c.rewards(
                [routed[i][1] for i in ix],
                [captions[i] for i in ix],
                scale=scale,
                baseline=baseline,
                references=None if references is None else [references[i] for i in ix],
                greedy=None if greedy is None else [greedy[i] for i in ix],
                remap=remap,
                model=model,
            )

        parts = self._spread([k for k, _ in routed], call)
        groups: List[Optional[Dict[str, Any]]] = [None] * n
        first = parts[0][1]
        for indices, answer in parts:
            self._check_model(answer.model)
            if answer.model.digest != first.model.digest:
                raise ModelMismatchError(first.model.digest, answer.model.digest, answer.model.id)
            for j, i in enumerate(indices):
                g = answer.group(j)
                groups[i] = {
                    "image": g.image,
                    "samples": [
                        {"cosine": float(c), "reward": float(r), "advantage": float(a), "truncated": bool(t)}
                        for c, r, a, t in zip(g.cosine, g.reward, g.advantage, g.truncated)
                    ],
                    "greedy": None
                    if g.greedy_cosine is None
                    else {"cosine": g.greedy_cosine, "reward": g.greedy_reward},
                }
        if any(g is None for g in groups):
            raise ProtocolError("a replica's answer is missing groups")
        doc = {
            "model": _model_json(first.model),
            "groups": groups,
            "scale": first.scale,
            "baseline": first.baseline,
            "remap": first.remap,
        }
        return assemble_rewards(
            [doc],
            [len(c) for c in captions],
            [greedy is not None and greedy[i] is not None for i in range(n)],
        )

    def vectors(self, images: Sequence[Any] = (), texts: Sequence[str] = (), *, model: Optional[str] = None) -> Vectors:
        """:meth:`Client.vectors` over the replicas: images by their content
        id, texts by their own text, so each replica's caches stay hot."""
        if isinstance(texts, str):
            raise TypeError("texts is a list of strings, not one string")
        if not len(images) and not len(texts):
            raise ValueError("vectors needs at least one image or text")
        routed = [image_key(src) for src in images]
        keys = [k for k, _ in routed] + ["text:" + t for t in texts]
        n_img = len(routed)

        def call(c: Client, ix: List[int]) -> Vectors:
            return c.vectors(
                [routed[i][1] for i in ix if i < n_img],
                [texts[i - n_img] for i in ix if i >= n_img],
                model=model,
            )

        parts = self._spread(keys, call)
        first = parts[0][1]
        dim = first.dimension
        img_rows = np.zeros((n_img, dim), dtype=np.float32)
        txt_rows = np.zeros((len(texts), dim), dtype=np.float32)
        tokens = np.zeros(len(texts), dtype=np.int64)
        truncated = np.zeros(len(texts), dtype=bool)
        image_ids: List[str] = [""] * n_img
        for indices, answer in parts:
            self._check_model(answer.model)
            if answer.model.digest != first.model.digest:
                raise ModelMismatchError(first.model.digest, answer.model.digest, answer.model.id)
            img_ix = [i for i in indices if i < n_img]
            txt_ix = [i - n_img for i in indices if i >= n_img]
            img_rows[img_ix] = answer.images
            txt_rows[txt_ix] = answer.texts
            tokens[txt_ix] = answer.tokens
            truncated[txt_ix] = answer.truncated
            for i, image_id in zip(img_ix, answer.image_ids):
                image_ids[i] = image_id
        return Vectors(first.model, dim, image_ids, img_rows, txt_rows, tokens, truncated)

    # -- the caption bank (its one replica) -----------------------------

    def _bank(self) -> Client:
        if self.bank is None:
            raise ValueError("bank calls need ShardedClient(..., bank_url=...): the replica that owns the bank")
        return self.bank

    def bank_append(self, captions: Sequence[Any], *, tag: Optional[str] = None) -> Mapping[str, Any]:
        """``POST /v1/bank`` on the bank replica: captions (strings or
        ``{"text", "tag"}``) added; answers ``{"model", "captions"}``."""
        doc: Dict[str, Any] = {"captions": list(captions)}
        if tag is not None:
            doc["tag"] = tag
        if self.model is not None:
            doc["model"] = self.model
        return self._bank()._post("/v1/bank", doc)

    def bank_info(self) -> Mapping[str, Any]:
        """``GET /v1/bank`` on the bank replica."""
        return self._bank()._get("/v1/bank")

    def neighbors(
        self,
        *,
        text: Optional[str] = None,
        image: Any = None,
        k: int = 10,
        tag: Optional[str] = None,
        exact: Optional[bool] = None,
    ) -> Mapping[str, Any]:
        """``POST /v1/neighbors`` on the bank replica: the captions nearest
        ``text`` or ``image`` (an image is registered there first)."""
        if (text is None) == (image is None):
            raise ValueError("give exactly one of text= or image=")
        bank = self._bank()
        doc: Dict[str, Any] = {"k": int(k)}
        if text is not None:
            doc["text"] = text
        else:
            doc["image"] = {"id": bank.register_images([image])[0]}
        for name, value in (("tag", tag), ("exact", exact), ("model", self.model)):
            if value is not None:
                doc[name] = value
        return bank._post("/v1/neighbors", doc)
