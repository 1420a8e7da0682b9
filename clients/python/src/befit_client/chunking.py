"""Splitting large requests into pieces the server accepts.

:class:`Limits` mirrors the limit table of befit's HTTP API (each limit is a
``befit serve`` flag; the defaults here are the server's defaults, used only
for a server that does not answer ``GET /v1/limits``). A reward
request is cut between groups, never inside one, because a group's baseline
(``mean-of-others``, ``greedy``) depends on all of its captions.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any, Callable, List, Sequence, TypeVar

from .errors import RequestTooLargeError

T = TypeVar("T")


@dataclass(frozen=True)
class Limits:
    """The server's limits, as given to ``befit serve`` (defaults: the
    server's). ``body_fraction`` keeps chunks below that share of
    ``max_body_bytes``, leaving room for the envelope and estimate errors."""

    max_body_bytes: int = 33554432  # --max-body-bytes
    max_groups: int = 1024  # --max-groups
    max_captions: int = 16384  # --max-captions (samples + references + greedy)
    max_caption_bytes: int = 2048  # --max-caption-bytes
    max_images: int = 256  # --max-images (per /v1/images or /v1/vectors)
    body_fraction: float = 0.9

    @classmethod
    def from_json(cls, doc: Any) -> "Limits":
        """The limits of a ``GET /v1/limits`` answer (unknown keys ignored)."""
        names = ("max_body_bytes", "max_groups", "max_captions", "max_caption_bytes", "max_images")
        try:
            return cls(**{name: int(doc[name]) for name in names})
        except (KeyError, TypeError, ValueError) as exc:
            raise ValueError(f"GET /v1/limits answered without a usable {exc}: {doc!r}") from exc

    @property
    def body_budget(self) -> int:
        return int(self.max_body_bytes * self.body_fraction)


def json_size(value: Any) -> int:
    """Bytes of ``value`` as the client serialises it."""
    return len(json.dumps(value, separators=(",", ":"), ensure_ascii=False).encode("utf-8"))


def group_captions(group: dict) -> int:
    """Captions a reward group counts against ``max_captions``."""
    return len(group["captions"]) + len(group.get("references") or ()) + (1 if group.get("greedy") is not None else 0)


def check_group(group: dict, index: int, limits: Limits) -> None:
    """Raises :class:`RequestTooLargeError` for a group no chunking can send."""
    for key in ("captions", "references"):
        for j, caption in enumerate(group.get(key) or ()):
            if len(caption.encode("utf-8")) > limits.max_caption_bytes:
                raise RequestTooLargeError(
                    f"caption of {len(caption.encode('utf-8'))} bytes is over the limit of {limits.max_caption_bytes}",
                    f"groups[{index}].{key}[{j}]",
                    "max_caption_bytes",
                )
    greedy = group.get("greedy")
    if greedy is not None and len(greedy.encode("utf-8")) > limits.max_caption_bytes:
        raise RequestTooLargeError(
            f"greedy caption of {len(greedy.encode('utf-8'))} bytes is over the limit of {limits.max_caption_bytes}",
            f"groups[{index}].greedy",
            "max_caption_bytes",
        )
    if group_captions(group) > limits.max_captions:
        raise RequestTooLargeError(
            f"one group holds {group_captions(group)} captions, over the limit of {limits.max_captions}",
            f"groups[{index}].captions",
            "max_captions",
        )


def split(
    items: Sequence[T],
    max_items: int,
    cost: Callable[[T], int],
    max_cost: int,
    size: Callable[[T], int],
    max_size: int,
    what: str = "item",
) -> List[List[int]]:
    """Cuts ``items`` into consecutive runs, in order, each with at most
    ``max_items`` items, a total ``cost`` of at most ``max_cost`` and a total
    ``size`` of at most ``max_size``. Returns the runs as index lists.
    An item over ``max_cost`` or ``max_size`` alone raises ValueError (callers
    check those before with a better message)."""
    if max_items < 1:
        raise ValueError("max_items must be at least 1")
    runs: List[List[int]] = []
    run: List[int] = []
    run_cost = run_size = 0
    for i, item in enumerate(items):
        c, s = cost(item), size(item)
        if c > max_cost or s > max_size:
            raise ValueError(f"{what} {i} alone is over the limit (cost {c} > {max_cost} or size {s} > {max_size})")
        if run and (len(run) >= max_items or run_cost + c > max_cost or run_size + s > max_size):
            runs.append(run)
            run, run_cost, run_size = [], 0, 0
        run.append(i)
        run_cost += c
        run_size += s
    if run:
        runs.append(run)
    return runs


def plan_reward_chunks(groups: Sequence[dict], limits: Limits, envelope_bytes: int = 512) -> List[List[int]]:
    """Indices of the groups sent in each ``/v1/rewards`` request."""
    for i, group in enumerate(groups):
        check_group(group, i, limits)
    budget = limits.body_budget - envelope_bytes
    for i, group in enumerate(groups):
        if json_size(group) + 1 > budget:
            raise RequestTooLargeError(
                f"one group serialises to {json_size(group)} bytes, over the body budget of {budget}",
                f"groups[{i}]",
                "max_body_bytes",
            )
    return split(
        groups,
        limits.max_groups,
        group_captions,
        limits.max_captions,
        lambda g: json_size(g) + 1,  # +1 for the comma between groups
        budget,
        "group",
    )


def plan_image_chunks(sizes: Sequence[int], limits: Limits, envelope_bytes: int = 512) -> List[List[int]]:
    """Indices of the images sent in each ``/v1/images`` request, given each
    image's size in the JSON body (base64 bytes plus its object's keys)."""
    budget = limits.body_budget - envelope_bytes
    for i, s in enumerate(sizes):
        if s > budget:
            raise RequestTooLargeError(
                f"image {i} takes {s} bytes of body, over the budget of {budget}", f"images[{i}]", "max_body_bytes"
            )
    return split(sizes, limits.max_images, lambda _: 0, 1, lambda s: s, budget, "image")
