"""What the client returns: model identities, rewards as numpy arrays,
vectors.

Rewards come as arrays shaped ``(groups, samples)``. When every group has
the same number of captions they are plain ``numpy.ndarray``; when groups
are ragged they are ``numpy.ma.MaskedArray`` of shape ``(groups,
max_samples)`` whose padding is masked (and holds NaN, or False for
``truncated``), so ``.mean(axis=1)`` still means "mean over each group's own
samples". ``Rewards.group(i)`` gives one group's unpadded arrays either way.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, List, Mapping, Optional, Sequence, Union

import numpy as np

from .errors import ProtocolError

Array = Union[np.ndarray, "np.ma.MaskedArray"]


@dataclass(frozen=True)
class ModelInfo:
    """Which reward model answered: ``id`` is ``NAME@VERSION`` and ``digest``
    the bundle's sha256 digest (64 hex), the thing to log and to pin."""

    id: str
    name: str
    version: str
    digest: str

    @classmethod
    def from_json(cls, doc: Mapping[str, Any]) -> "ModelInfo":
        try:
            return cls(str(doc["id"]), str(doc["name"]), str(doc["version"]), str(doc["digest"]))
        except (KeyError, TypeError) as exc:
            raise ProtocolError(f"model identity lacks a field: {doc!r}") from exc


@dataclass(frozen=True)
class ModelDetails:
    """One entry of ``GET /v1/models``: identity, dimension and the raw
    description (``image``, ``text``, ``card``) as the server sent it."""

    info: ModelInfo
    dimension: int
    raw: Dict[str, Any]


@dataclass(frozen=True)
class GroupRewards:
    """One group's samples, unpadded (length = that group's caption count)."""

    image: str
    cosine: np.ndarray
    reward: np.ndarray
    advantage: np.ndarray
    truncated: np.ndarray
    greedy_cosine: Optional[float]
    greedy_reward: Optional[float]


@dataclass
class Rewards:
    """Answer of :meth:`Client.rewards`, all groups in request order.

    ``cosine``, ``reward``, ``advantage`` (float64) and ``truncated`` (bool)
    are ``(groups, samples)``, masked when ``ragged``. ``greedy_cosine`` and
    ``greedy_reward`` are ``(groups,)`` with NaN for groups sent without a
    greedy caption. ``lengths[i]`` is group i's caption count. ``image_ids``
    are the content ids of the groups' images.
    """

    model: ModelInfo
    image_ids: List[str]
    cosine: Array
    reward: Array
    advantage: Array
    truncated: Array
    greedy_cosine: np.ndarray
    greedy_reward: np.ndarray
    lengths: np.ndarray
    scale: Dict[str, Any] = field(default_factory=dict)
    baseline: str = "none"
    remap: Optional[str] = None
    #: With a guard: the guard as the server applied it, and ``signals[i][j]``
    #: the ``guard`` object of group i's sample j (signals, penalty, flags).
    guard: Optional[Dict[str, Any]] = None
    signals: Optional[List[List[Dict[str, Any]]]] = None
    #: With a run: the last chunk's run report, and every chunk's warnings.
    run: Optional[Dict[str, Any]] = None
    warnings: List[Dict[str, Any]] = field(default_factory=list)

    @property
    def ragged(self) -> bool:
        return isinstance(self.cosine, np.ma.MaskedArray)

    def __len__(self) -> int:
        return len(self.image_ids)

    def group(self, i: int) -> GroupRewards:
        n = int(self.lengths[i])

        def row(a: Array) -> np.ndarray:
            return np.asarray(np.ma.getdata(a)[i, :n])

        gc, gr = self.greedy_cosine[i], self.greedy_reward[i]
        return GroupRewards(
            self.image_ids[i],
            row(self.cosine),
            row(self.reward),
            row(self.advantage),
            row(self.truncated),
            None if np.isnan(gc) else float(gc),
            None if np.isnan(gr) else float(gr),
        )


def _pad(rows: Sequence[Sequence[Any]], width: int, fill: Any, dtype: Any, ragged: bool) -> Array:
    out = np.full((len(rows), width), fill, dtype=dtype)
    mask = np.ones((len(rows), width), dtype=bool)
    for i, r in enumerate(rows):
        out[i, : len(r)] = r
        mask[i, : len(r)] = False
    return np.ma.MaskedArray(out, mask=mask) if ragged else out


def assemble_rewards(
    answers: Sequence[Mapping[str, Any]],
    expected_lengths: Sequence[int],
    expected_greedy: Sequence[bool],
) -> Rewards:
    """Joins the answers of one call's chunks (in order) into :class:`Rewards`,
    checking that the server answered every group and sample that was sent."""
    if not answers:
        raise ProtocolError("no answer to assemble")
    model = ModelInfo.from_json(answers[0]["model"])
    groups: List[Mapping[str, Any]] = []
    for a in answers:
        groups.extend(a.get("groups") or [])
    if len(groups) != len(expected_lengths):
        raise ProtocolError(f"sent {len(expected_lengths)} groups, the server answered {len(groups)}")
    cos, rew, adv, trunc, ids = [], [], [], [], []
    g_cos = np.full(len(groups), np.nan)
    g_rew = np.full(len(groups), np.nan)
    for i, g in enumerate(groups):
        samples = g.get("samples") or []
        if len(samples) != expected_lengths[i]:
            raise ProtocolError(f"group {i}: sent {expected_lengths[i]} captions, got {len(samples)} samples")
        ids.append(str(g.get("image", "")))
        cos.append([float(s["cosine"]) for s in samples])
        rew.append([float(s["reward"]) for s in samples])
        # `advantage` equals reward when the baseline is none; tolerate its absence there.
        adv.append([float(s.get("advantage", s["reward"])) for s in samples])
        trunc.append([bool(s.get("truncated", False)) for s in samples])
        greedy = g.get("greedy")
        if greedy is not None:
            g_cos[i] = float(greedy["cosine"])
            g_rew[i] = float(greedy["reward"])
        elif expected_greedy[i]:
            raise ProtocolError(f"group {i}: sent a greedy caption, got no greedy score")
    lengths = np.asarray(expected_lengths, dtype=np.int64)
    ragged = bool(len(lengths)) and bool((lengths != lengths[0]).any())
    width = int(lengths.max()) if len(lengths) else 0
    first = answers[0]
    return Rewards(
        model=model,
        image_ids=ids,
        cosine=_pad(cos, width, np.nan, np.float64, ragged),
        reward=_pad(rew, width, np.nan, np.float64, ragged),
        advantage=_pad(adv, width, np.nan, np.float64, ragged),
        truncated=_pad(trunc, width, False, bool, ragged),
        greedy_cosine=g_cos,
        greedy_reward=g_rew,
        lengths=lengths,
        scale=dict(first.get("scale") or {}),
        baseline=str(first.get("baseline", "none")),
        remap=first.get("remap"),
        guard=first.get("guard"),
        signals=[[dict(s.get("guard") or {}) for s in g.get("samples") or []] for g in groups]
        if "guard" in first
        else None,
        run=answers[-1].get("run"),
        warnings=[w for a in answers for w in a.get("warnings") or []],
    )


@dataclass
class Vectors:
    """Answer of :meth:`Client.vectors`: L2-normalised rows, float32.
    ``images`` is ``(n_images, dimension)``, ``texts`` ``(n_texts,
    dimension)``; ``tokens`` and ``truncated`` are per text."""

    model: ModelInfo
    dimension: int
    image_ids: List[str]
    images: np.ndarray
    texts: np.ndarray
    tokens: np.ndarray
    truncated: np.ndarray
