"""The client a training loop holds: register images, ask for rewards and
vectors, with chunking, retries and model pinning done for it."""

from __future__ import annotations

import base64
import json
import os
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, Tuple, Union
from urllib.parse import quote, urlencode

import numpy as np

from .chunking import Limits, json_size, plan_image_chunks, plan_reward_chunks, split
from .errors import (
    ModelMismatchError,
    NotFoundError,
    NotReadyError,
    ProtocolError,
    RequestTooLargeError,
    TransportError,
    UnknownImageError,
)
from .images import ImageId, ServerPath, content_id, source_bytes
from .results import ModelDetails, ModelInfo, Rewards, Vectors, assemble_rewards
from .transport import RetryPolicy, Transport

ScaleSpec = Union[str, Mapping[str, Any]]

BASELINES = ("none", "mean-of-others", "greedy")


def cosine() -> Dict[str, Any]:
    """Reward = cosine similarity."""
    return {"kind": "cosine"}


def clip_s(weight: float = 2.5) -> Dict[str, Any]:
    """CLIPScore (Hessel et al. 2021, eq. 1): ``weight * max(cos, 0)``."""
    return {"kind": "clip-s", "weight": float(weight)}


def ref_clip_s(weight: float = 2.5) -> Dict[str, Any]:
    """RefCLIPScore (Hessel et al. 2021, eq. 2); needs references per group."""
    return {"kind": "ref-clip-s", "weight": float(weight)}


def affine(a: float, b: float) -> Dict[str, Any]:
    """Reward = ``a * cos + b``."""
    return {"kind": "affine", "a": float(a), "b": float(b)}


def scale_json(scale: ScaleSpec) -> Dict[str, Any]:
    """A scale as the API takes it: a kind name (``"clip-s"``) or a dict."""
    if isinstance(scale, str):
        return {"kind": scale}
    if isinstance(scale, Mapping) and "kind" in scale:
        return dict(scale)
    raise TypeError(f"a scale is a kind name or a dict with 'kind', got {scale!r}")


def check_reward_args(
    images: Sequence[Any],
    captions: Sequence[Sequence[str]],
    baseline: str,
    references: Optional[Sequence[Any]],
    greedy: Optional[Sequence[Any]],
) -> None:
    """The local checks of a rewards call, before anything is sent."""
    for name, value in (("images", images), ("captions", captions)):
        if isinstance(value, (str, bytes, os.PathLike)):
            raise TypeError(
                f"{name} is a single {type(value).__name__}; give a list with one entry per group "
                "(images: one image per group; captions: one list of captions per image)"
            )
    if baseline not in BASELINES:
        raise ValueError(f"baseline is one of {BASELINES}, got {baseline!r}")
    n = len(images)
    if n == 0:
        raise ValueError("rewards needs at least one group")
    if len(captions) != n:
        raise ValueError(f"{n} images but {len(captions)} caption groups; give one group per image")
    for name, extra in (("references", references), ("greedy", greedy)):
        if extra is not None and len(extra) != n:
            raise ValueError(f"{n} images but {len(extra)} entries in {name}; give one per group (None to skip)")
    for i, caps in enumerate(captions):
        if isinstance(caps, str):
            raise TypeError(
                f"captions[{i}] is a string; captions takes one list of captions per image, e.g. [[\"a small green circle\", ...], ...]"
            )


def _decode(body: bytes, what: str) -> Any:
    try:
        return json.loads(body.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise ProtocolError(f"{what}: the answer is not JSON: {body[:200]!r}") from exc


def _encode(doc: Any) -> bytes:
    return json.dumps(doc, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


class Client:
    """A connection to one befit server.

    - ``url``: the server, e.g. ``http://127.0.0.1:7878``.
    - ``model``: the model id or name sent with every request (None: the
      server's default).
    - ``pin_digest``: a bundle digest (64 hex) every answer must carry, or
      ``"first"`` to pin whatever the first answer names; a different digest
      raises :class:`ModelMismatchError`. None: no pinning (the digests of
      the chunks of one call must still agree).
    - ``timeout``: seconds for each socket operation.
    - ``retry``: when to retry (default ``RetryPolicy()``: 503 and 429 answers,
      dropped connections and timeouts).
    - ``limits``: the server's limits, used to split requests (default: read
      once from the server's ``GET /v1/limits`` on first use; ``Limits()``, the
      server's defaults, for a server without that route).
    - ``key``: the API key of a server started with ``--keys`` (default:
      ``$BEFIT_API_KEY``; none for a server without keys).
    - ``max_workers``: chunks of one call sent at once (the server batches
      concurrent requests together, so 2-4 can help on a big call).

    Threads may share a Client; each thread gets its own connection.
    """

    def __init__(
        self,
        url: str = "http://127.0.0.1:7878",
        *,
        model: Optional[str] = None,
        pin_digest: Optional[str] = None,
        timeout: float = 150.0,
        retry: Optional[RetryPolicy] = None,
        limits: Optional[Limits] = None,
        max_workers: int = 1,
        transport: Optional[Transport] = None,
        key: Optional[str] = None,
    ) -> None:
        self.transport = transport or Transport(url, timeout=timeout, retry=retry or RetryPolicy(), key=key)
        self.model = model
        self._limits: Optional[Limits] = limits
        self.max_workers = max(1, int(max_workers))
        self._pin_first = pin_digest == "first"
        if pin_digest is not None and not self._pin_first:
            ImageId(pin_digest)  # same shape as a content id: 64 hex digits
            pin_digest = pin_digest.lower()
        self._pin: Optional[str] = None if self._pin_first else pin_digest
        self._lock = threading.Lock()
        self._known: set = set()
        self._server_paths: Dict[str, ImageId] = {}

    # -- plumbing -------------------------------------------------------

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def close(self) -> None:
        self.transport.close()

    def _get(self, path: str, retry: Optional[RetryPolicy] = None) -> Any:
        return _decode(self.transport.request("GET", path, retry=retry).body, path)

    def _post(self, path: str, doc: Any) -> Any:
        return _decode(self.transport.request("POST", path, _encode(doc)).body, path)

    def _map(self, fn: Callable[[Any], Any], items: Sequence[Any]) -> List[Any]:
        if self.max_workers == 1 or len(items) <= 1:
            return [fn(x) for x in items]
        with ThreadPoolExecutor(max_workers=min(self.max_workers, len(items))) as pool:
            return list(pool.map(fn, items))

    @property
    def limits(self) -> Limits:
        """The limits requests are split by: given, or the server's own."""
        if self._limits is None:
            try:
                doc = self._get("/v1/limits")
                fetched = Limits.from_json(doc)
            except NotFoundError:
                fetched = Limits()  # a server from before the route: its defaults
            with self._lock:
                self._limits = self._limits or fetched
        return self._limits

    @property
    def pinned_digest(self) -> Optional[str]:
        """The digest answers must carry (None until pinned)."""
        return self._pin

    def _check_model(self, doc: Mapping[str, Any]) -> ModelInfo:
        info = ModelInfo.from_json(doc)
        with self._lock:
            if self._pin is None and self._pin_first:
                self._pin = info.digest
            if self._pin is not None and info.digest != self._pin:
                raise ModelMismatchError(self._pin, info.digest, info.id)
        return info

    def _check_same_model(self, answers: Sequence[Mapping[str, Any]]) -> ModelInfo:
        infos = [self._check_model(a["model"]) for a in answers]
        for info in infos[1:]:
            if info.digest != infos[0].digest:
                # The server swapped bundles between two chunks of one call.
                raise ModelMismatchError(infos[0].digest, info.digest, info.id)
        return infos[0]

    # -- service state --------------------------------------------------

    def health(self) -> bool:
        """True when the process answers ``GET /healthz`` (no retries)."""
        try:
            self._get("/healthz", retry=RetryPolicy(max_attempts=1))
            return True
        except (TransportError, NotReadyError):
            return False

    def ready(self) -> bool:
        """True when every bundle is loaded (``GET /readyz``; no retries)."""
        try:
            self._get("/readyz", retry=RetryPolicy(max_attempts=1))
            return True
        except (TransportError, NotReadyError):
            return False

    def wait_ready(self, timeout: float = 60.0, interval: float = 0.1) -> List[str]:
        """Waits until ``/readyz`` says ready; returns the loaded model ids.
        Raises :class:`TransportError` when ``timeout`` seconds pass first."""
        deadline = time.monotonic() + timeout
        last: Optional[BaseException] = None
        while time.monotonic() < deadline:
            try:
                doc = self._get("/readyz", retry=RetryPolicy(max_attempts=1))
                return [str(m) for m in doc.get("models", [])]
            except (TransportError, NotReadyError) as exc:
                last = exc
            time.sleep(interval)
        raise TransportError(f"{self.transport.base_url} not ready after {timeout} s: {last}")

    def models(self) -> Tuple[str, List[ModelDetails]]:
        """``(default id, loaded models)`` from ``GET /v1/models``."""
        doc = self._get("/v1/models")
        out = [ModelDetails(ModelInfo.from_json(m), int(m.get("dimension", 0)), dict(m)) for m in doc.get("models", [])]
        return str(doc.get("default", "")), out

    def model_info(self) -> ModelInfo:
        """Identity of the model this client's requests use (checked
        against the pin, and pinning it when ``pin_digest="first"``)."""
        default, models = self.models()
        want = self.model or default
        for m in models:
            if want in (m.info.id, m.info.name):
                return self._check_model(m.raw)
        raise ProtocolError(f"model {want!r} is not among the loaded {[m.info.id for m in models]}")

    # -- images ---------------------------------------------------------

    def register_images(self, images: Sequence[Any], *, force: bool = False) -> List[ImageId]:
        """Content ids of ``images`` (any source of :mod:`befit_client.images`),
        registering with ``POST /v1/images`` those the server may not have.

        Ids are computed locally; an image this client registered or used
        before is not sent again unless ``force``. Duplicates in ``images``
        are sent once. Returns one id per input, in order.
        """
        ids: List[Optional[ImageId]] = [None] * len(images)
        pending: Dict[str, Tuple[Dict[str, Any], int, Optional[bytes], List[int]]] = {}
        for i, src in enumerate(images):
            if isinstance(src, ImageId):
                ids[i] = src
                continue
            if isinstance(src, ServerPath):
                known = self._server_paths.get(src.path)
                if known is not None and not force:
                    ids[i] = known
                    continue
                key = "path:" + src.path
                if key not in pending:
                    item = {"path": src.path}
                    pending[key] = (item, json_size(item), None, [])
                pending[key][3].append(i)
                continue
            data = source_bytes(src)
            assert data is not None
            cid = content_id(data)
            ids[i] = cid
            if cid in self._known and not force:
                continue
            if cid not in pending:
                pending[cid] = ({}, 4 * ((len(data) + 2) // 3) + 16, data, [])
            pending[cid][3].append(i)
        if pending:
            self._send_images(list(pending.values()), ids)
        if any(x is None for x in ids):
            raise ProtocolError("the server did not answer an id for every image")
        return [x for x in ids if x is not None]

    def _send_images(
        self,
        pending: List[Tuple[Dict[str, Any], int, Optional[bytes], List[int]]],
        ids: List[Optional[ImageId]],
    ) -> None:
        budget = self.limits.body_budget - 512
        json_items = [p for p in pending if p[1] <= budget]
        for item, size, data, where in pending:
            if size <= budget or data is None:
                continue
            # Too big as base64 in JSON: send the raw bytes as the whole body.
            if len(data) > self.limits.max_body_bytes:
                raise RequestTooLargeError(
                    f"image of {len(data)} bytes is over the body limit of {self.limits.max_body_bytes}",
                    f"images[{where[0]}]",
                    "max_body_bytes",
                )
            doc = _decode(
                self.transport.request("POST", "/v1/images", data, "application/octet-stream").body, "/v1/images"
            )
            self._note_images([(item, data, where)], doc, ids)
        if not json_items:
            return
        chunks = plan_image_chunks([p[1] for p in json_items], self.limits)

        def send(chunk: List[int]) -> None:
            batch = [json_items[j] for j in chunk]
            body_images = [
                item if item else {"base64": base64.b64encode(data or b"").decode("ascii")}
                for item, _, data, _ in batch
            ]
            doc: Dict[str, Any] = {"images": body_images}
            if self.model is not None:
                doc["model"] = self.model
            answer = self._post("/v1/images", doc)
            self._note_images([(item, data, where) for item, _, data, where in batch], answer, ids)

        self._map(send, chunks)

    def _note_images(
        self,
        sent: List[Tuple[Dict[str, Any], Optional[bytes], List[int]]],
        answer: Mapping[str, Any],
        ids: List[Optional[ImageId]],
    ) -> None:
        got = answer.get("images") or []
        if len(got) != len(sent):
            raise ProtocolError(f"registered {len(sent)} images, the server answered {len(got)}")
        for (item, data, where), g in zip(sent, got):
            cid = ImageId(g["id"])
            if data is not None and cid != content_id(data):
                raise ProtocolError(f"the server gave id {cid} to bytes whose sha256 is {content_id(data)}")
            with self._lock:
                self._known.add(cid)
                if "path" in item:
                    self._server_paths[item["path"]] = cid
            for i in where:
                ids[i] = cid

    def forget_images(self) -> None:
        """Forgets which images the server holds (after pointing the client
        at a server with another ``--data-dir``), so they are sent again."""
        with self._lock:
            self._known.clear()
            self._server_paths.clear()

    # -- rewards --------------------------------------------------------

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
        guard: Optional[Mapping[str, Any]] = None,
        run: Optional[str] = None,
        step: Optional[int] = None,
        run_thresholds: Optional[Mapping[str, Any]] = None,
    ) -> Rewards:
        """Rewards for sampled captions, one group per image.

        ``images[i]`` is group i's image (any image source; registered first
        when needed) and ``captions[i]`` its sampled captions. ``scale`` is a
        kind name or a dict (see :func:`clip_s`, :func:`ref_clip_s`,
        :func:`affine`); ``baseline`` is ``"none"``, ``"mean-of-others"``
        (needs 2+ captions per group) or ``"greedy"`` (needs ``greedy[i]``);
        ``references[i]`` feeds ``ref-clip-s``; ``remap`` names a reward
        continuity map. ``guard`` (the ``guard`` object of the API:
        ``fluency_weight``, penalties, ``nearest_bank``) adds per-sample
        signals (``Rewards.signals``) and guarded rewards. ``run`` and ``step`` count the samples in the run
        watch; ``run_thresholds`` sets the run's warning thresholds, and
        ``Rewards.warnings`` carries what the step crosses. (A retried chunk
        may be counted twice in the watch.) Requests over the limits are split
        between groups and joined back in order.
        """
        check_reward_args(images, captions, baseline, references, greedy)
        if (run is None) != (step is None):
            raise ValueError("give run and step together")
        if step is not None and (isinstance(step, bool) or not isinstance(step, int) or step < 0):
            raise ValueError(f"step is a whole number from 0, got {step!r}")
        n = len(images)
        ids = self.register_images(images)
        groups: List[Dict[str, Any]] = []
        for i in range(n):
            g: Dict[str, Any] = {"image": {"id": ids[i]}, "captions": [str(c) for c in captions[i]]}
            if references is not None and references[i] is not None:
                g["references"] = [str(r) for r in references[i]]  # type: ignore[union-attr]
            if greedy is not None and greedy[i] is not None:
                g["greedy"] = str(greedy[i])
            groups.append(g)
        envelope: Dict[str, Any] = {"scale": scale_json(scale), "baseline": baseline}
        if remap is not None:
            envelope["remap"] = remap
        if guard is not None:
            envelope["guard"] = dict(guard)
        if run is not None:
            envelope["run"] = run
            envelope["step"] = step
        if run_thresholds is not None:
            envelope["run_thresholds"] = dict(run_thresholds)
        use_model = model or self.model
        if use_model is not None:
            envelope["model"] = use_model
        chunks = plan_reward_chunks(groups, self.limits, envelope_bytes=json_size(envelope) + 32)

        def send(chunk: List[int]) -> Any:
            doc = dict(envelope, groups=[groups[j] for j in chunk])
            try:
                return self._post("/v1/rewards", doc)
            except UnknownImageError:
                # The server lost images we registered (new data dir, restart):
                # register this chunk's images again, then resend once.
                with self._lock:
                    for j in chunk:
                        self._known.discard(ids[j])
                self.register_images([images[j] for j in chunk], force=True)
                return self._post("/v1/rewards", doc)

        answers = self._map(send, chunks)
        self._check_same_model(answers)
        return assemble_rewards(answers, [len(g["captions"]) for g in groups], ["greedy" in g for g in groups])

    # -- run watch ------------------------------------------------------

    def runs(self) -> List[Dict[str, Any]]:
        """The runs the server watches, the most recently updated first."""
        return list(self._get("/v1/runs")["runs"])

    def run(self, name: str, from_step: Optional[int] = None, to_step: Optional[int] = None) -> Dict[str, Any]:
        """One run and its steps' aggregates (``series``), optionally a step range."""
        query = {k: v for k, v in (("from", from_step), ("to", to_step)) if v is not None}
        path = f"/v1/runs/{quote(name, safe='')}" + (f"?{urlencode(query)}" if query else "")
        return dict(self._get(path))

    # -- vectors --------------------------------------------------------

    def vectors(
        self,
        images: Sequence[Any] = (),
        texts: Sequence[str] = (),
        *,
        model: Optional[str] = None,
    ) -> Vectors:
        """Embeddings of ``images`` and ``texts`` (``POST /v1/vectors``),
        split under ``max_images`` and ``max_captions`` per request."""
        if isinstance(texts, str):
            raise TypeError("texts is a list of strings, not one string")
        ids = self.register_images(images) if len(images) else []
        use_model = model or self.model
        budget = self.limits.body_budget - 512
        image_runs = split(ids, self.limits.max_images, lambda _: 0, 1, lambda x: 80, budget, "image")
        text_runs = split(
            list(texts),
            self.limits.max_captions,
            lambda _: 1,
            self.limits.max_captions,
            lambda t: json_size(t) + 1,
            budget,
            "text",
        )
        jobs = [("images", r) for r in image_runs] + [("texts", r) for r in text_runs]

        def send(job: Tuple[str, List[int]]) -> Any:
            kind, run = job
            doc: Dict[str, Any] = {"images": [], "texts": []}
            if kind == "images":
                doc["images"] = [{"id": ids[j]} for j in run]
            else:
                doc["texts"] = [texts[j] for j in run]
            if use_model is not None:
                doc["model"] = use_model
            return self._post("/v1/vectors", doc)

        answers = self._map(send, jobs)
        if not answers:
            raise ValueError("vectors needs at least one image or text")
        info = self._check_same_model(answers)
        dim = int(answers[0].get("dimension", 0))
        img_rows: List[List[float]] = []
        txt_rows: List[List[float]] = []
        tokens: List[int] = []
        truncated: List[bool] = []
        for (kind, run), a in zip(jobs, answers):
            if kind == "images":
                got = a.get("images") or []
                if len(got) != len(run):
                    raise ProtocolError(f"asked {len(run)} image vectors, got {len(got)}")
                img_rows.extend(x["vector"] for x in got)
            else:
                got = a.get("texts") or []
                if len(got) != len(run):
                    raise ProtocolError(f"asked {len(run)} text vectors, got {len(got)}")
                txt_rows.extend(x["vector"] for x in got)
                tokens.extend(int(x.get("tokens", 0)) for x in got)
                truncated.extend(bool(x.get("truncated", False)) for x in got)
        return Vectors(
            model=info,
            dimension=dim,
            image_ids=list(ids),
            images=np.asarray(img_rows, dtype=np.float32).reshape(len(img_rows), dim),
            texts=np.asarray(txt_rows, dtype=np.float32).reshape(len(txt_rows), dim),
            tokens=np.asarray(tokens, dtype=np.int64),
            truncated=np.asarray(truncated, dtype=bool),
        )
