"""The blocks-world captioning policy of `blocks_rl.py`, and the judge that
checks captions against a scene's known facts.

Captions follow the blocks world's caption grammar (`tools/blocksworld/
captions.py`): the vocabulary below is that grammar's, first wording of each
word, and the policy writes four of its templates. A *list* caption names the
count and every piece:

- "one piece: a small red circle"                                  (count_colon)
- "three pieces: a small red circle, a large blue ring and a small green cross"

a *relation* caption (two pieces or more) puts a relation between the first
two pieces:

- "two pieces on the table, with a small red circle to the left of
   a large blue ring"                                              (with)
- "a small red circle to the left of a large blue ring, and a small
   green cross"                                                    (and_third)

so every caption it writes states a count (by number or by listing) and every
piece it mentions in full; which form to use is one more choice of the
policy.

The judge (`parse`, `judge`) reads any caption of that grammar, paraphrases
included, and compares what it claims with the scene facts of `probe.jsonl`;
it never asks befit. A caption is *correct* when every fact it states is true
and it mentions exactly the pieces on the table.

The policy is a per-image factorised distribution: independent softmax
logits per image for each slot (count; form; size, colour, shape of pieces
1..3; relation), trained with REINFORCE.
"""

from __future__ import annotations

import itertools
import re
from dataclasses import dataclass
from typing import Dict, Optional, Sequence, Tuple

import numpy as np

# The grammar's facts and words (tools/blocksworld/world.py, captions.py).
COLOURS = ("red", "orange", "yellow", "green", "blue", "purple")
SHAPES = ("circle", "square", "triangle", "cross", "ring")
SIZES = ("small", "large")
RELATIONS = ("left of", "right of", "above", "below")
OPPOSITE = {"left of": "right of", "right of": "left of", "above": "below", "below": "above"}
SIZE_WORDS = {"small": ("small", "little"), "large": ("large", "big")}
COLOUR_WORDS = {c: (c,) for c in COLOURS} | {"purple": ("purple", "violet")}
SHAPE_WORDS = {
    "circle": ("circle", "disc"),
    "square": ("square",),
    "triangle": ("triangle",),
    "cross": ("cross",),
    "ring": ("ring", "hoop"),
}
RELATION_WORDS = {
    "left of": ("to the left of", "left of", "on the left of"),
    "right of": ("to the right of", "right of", "on the right of"),
    "above": ("above", "over"),
    "below": ("below", "under", "beneath"),
}
COUNT_WORDS = {1: ("one", "a single"), 2: ("two",), 3: ("three",)}
NOUNS = ("piece", "pieces", "shape", "shapes", "object", "objects")

# When a relation counts as clear (world.py: MIN_OFFSET, DOMINANCE), as
# fractions of the image side.
MIN_OFFSET = 0.12
DOMINANCE = 1.5

Kind = Tuple[str, str, str]  # (size, colour, shape)


# -- judging ----------------------------------------------------------------


def _invert(words: Dict[str, Tuple[str, ...]]) -> Dict[str, str]:
    return {w: fact for fact, ws in words.items() for w in ws}


_SIZE_OF = _invert(SIZE_WORDS)
_COLOUR_OF = _invert(COLOUR_WORDS)
_SHAPE_OF = _invert(SHAPE_WORDS)
_RELATION_OF = _invert(RELATION_WORDS)
_COUNT_OF = {w: n for n, ws in COUNT_WORDS.items() for w in ws}


def _alternation(words: Sequence[str]) -> str:
    return "|".join(re.escape(w) for w in sorted(words, key=len, reverse=True))


_PIECE = re.compile(
    rf"\b(?:a|the) ({_alternation(list(_SIZE_OF))}) ({_alternation(list(_COLOUR_OF))}) ({_alternation(list(_SHAPE_OF))})\b"
)
_COUNT = re.compile(rf"\b({_alternation(list(_COUNT_OF))}) (?:{_alternation(NOUNS)})\b")


@dataclass(frozen=True)
class Claims:
    """What a caption states: a count (or None), its pieces in order, and
    relations as (subject index, relation, object index) into `pieces`."""

    count: Optional[int]
    pieces: Tuple[Kind, ...]
    relations: Tuple[Tuple[int, str, int], ...]


def parse(caption: str) -> Claims:
    """The claims of a caption of the blocks grammar."""
    text = caption.lower()
    count_match = _COUNT.search(text)
    count = _COUNT_OF[count_match.group(1)] if count_match else None
    matches = list(_PIECE.finditer(text))
    pieces = tuple((_SIZE_OF[m.group(1)], _COLOUR_OF[m.group(2)], _SHAPE_OF[m.group(3)]) for m in matches)
    relations = []
    for i in range(len(matches) - 1):
        gap = text[matches[i].end() : matches[i + 1].start()].strip(" ,;")
        if gap.startswith("is "):
            gap = gap[3:]
        if gap in _RELATION_OF:
            relations.append((i, _RELATION_OF[gap], i + 1))
    return Claims(count, pieces, tuple(relations))


def relation_between(a: dict, b: dict, width: float, height: float) -> Optional[str]:
    """The clear relation of piece `a` to piece `b` (world.py's rule), or None."""
    dx, dy = (a["x"] - b["x"]) / width, (a["y"] - b["y"]) / height
    if abs(dx) >= MIN_OFFSET and abs(dx) >= DOMINANCE * abs(dy):
        return "left of" if dx < 0 else "right of"
    if abs(dy) >= MIN_OFFSET and abs(dy) >= DOMINANCE * abs(dx):
        return "above" if dy < 0 else "below"
    return None


@dataclass(frozen=True)
class Verdict:
    """Each kind of claim checked: None when the caption does not make it."""

    count_ok: Optional[bool]
    pieces_ok: int  # mentioned pieces that lie on the table
    pieces_stated: int
    relation_ok: Optional[bool]
    complete: bool  # mentions each piece on the table exactly once, and no other

    @property
    def true(self) -> bool:
        """Every stated fact holds."""
        return self.count_ok is not False and self.pieces_ok == self.pieces_stated and self.relation_ok is not False

    @property
    def correct(self) -> bool:
        """True and complete: the caption describes this table."""
        return self.true and self.complete


def judge(caption: str, scene: dict) -> Verdict:
    """Checks a caption's claims against a probe row's `scene` facts."""
    claims = parse(caption)
    by_kind = {(p["size"], p["colour"], p["shape"]): p for p in scene["pieces"]}
    present = [k in by_kind for k in claims.pieces]
    count_ok = None if claims.count is None else claims.count == scene["count"]
    relation_ok: Optional[bool] = None
    for s, rel, o in claims.relations:
        a, b = claims.pieces[s], claims.pieces[o]
        ok = a in by_kind and b in by_kind and a != b
        ok = ok and relation_between(by_kind[a], by_kind[b], scene["width"], scene["height"]) == rel
        relation_ok = ok if relation_ok is None else relation_ok and ok
    complete = sorted(claims.pieces) == sorted(by_kind)
    return Verdict(count_ok, sum(present), len(claims.pieces), relation_ok, complete)


# -- captions from slots -------------------------------------------------------

FORMS = ("list", "relation")

# Slot layout of one caption: count, form, size/colour/shape of pieces 1..3, relation.
SLOTS: Tuple[Tuple[str, Tuple[str, ...]], ...] = (
    ("count", ("1", "2", "3")),
    ("form", FORMS),
    *(
        (f"{attr}{k}", values)
        for k in range(3)
        for attr, values in (("size", SIZES), ("colour", COLOURS), ("shape", SHAPES))
    ),
    ("relation", RELATIONS),
)
SLOT_SIZES = np.array([len(v) for _, v in SLOTS])
SLOT_OFFSETS = np.concatenate([[0], np.cumsum(SLOT_SIZES)[:-1]])
N_LOGITS = int(SLOT_SIZES.sum())
COUNT_SLOT, FORM_SLOT, RELATION_SLOT = 0, 1, len(SLOTS) - 1


def piece_slots(k: int) -> Tuple[int, int, int]:
    """Slot indices of the size, colour and shape of piece k (0-based)."""
    return (2 + 3 * k, 3 + 3 * k, 4 + 3 * k)


def used_slots(actions: np.ndarray) -> np.ndarray:
    """Mask (..., n_slots) of the slots a caption uses: the count, the
    pieces it lists, the form from two pieces on, and the relation when the
    form is "relation"."""
    n = actions[..., COUNT_SLOT] + 1
    mask = np.zeros(actions.shape, dtype=bool)
    mask[..., COUNT_SLOT] = True
    mask[..., FORM_SLOT] = n >= 2
    for k in range(3):
        for s in piece_slots(k):
            mask[..., s] = n > k
    mask[..., RELATION_SLOT] = (n >= 2) & (actions[..., FORM_SLOT] == FORMS.index("relation"))
    return mask


def _phrase(size: str, colour: str, shape: str, article: str = "a") -> str:
    return f"{article} {SIZE_WORDS[size][0]} {COLOUR_WORDS[colour][0]} {SHAPE_WORDS[shape][0]}"


def render(action: Sequence[int]) -> str:
    """The caption of one slot assignment (see the module's templates)."""
    n = int(action[COUNT_SLOT]) + 1
    pieces = [
        _phrase(SIZES[action[a]], COLOURS[action[b]], SHAPES[action[c]])
        for a, b, c in (piece_slots(k) for k in range(n))
    ]
    if n == 1 or FORMS[action[FORM_SLOT]] == "list":
        noun = "piece" if n == 1 else "pieces"
        listing = pieces[0] if n == 1 else ", ".join(pieces[:-1]) + " and " + pieces[-1]
        return f"{COUNT_WORDS[n][0]} {noun}: {listing}"
    rel = RELATION_WORDS[RELATIONS[action[RELATION_SLOT]]][0]
    if n == 2:
        return f"two pieces on the table, with {pieces[0]} {rel} {pieces[1]}"
    return f"{pieces[0]} {rel} {pieces[1]}, and {pieces[2]}"


def true_action(scene: dict) -> np.ndarray:
    """The list caption of a scene's own facts, as slot choices: what a
    perfect policy could write (pieces in the scene's order)."""
    action = np.zeros(len(SLOTS), dtype=np.int64)
    action[COUNT_SLOT] = scene["count"] - 1
    action[FORM_SLOT] = FORMS.index("list")
    for k, piece in enumerate(scene["pieces"]):
        a, b, c = piece_slots(k)
        action[a], action[b], action[c] = (
            SIZES.index(piece["size"]),
            COLOURS.index(piece["colour"]),
            SHAPES.index(piece["shape"]),
        )
    return action


# -- the policy ---------------------------------------------------------------


def _softmax_slots(logits: np.ndarray) -> np.ndarray:
    """Softmax within each slot's block of the last axis."""
    out = np.empty_like(logits)
    for off, size in zip(SLOT_OFFSETS, SLOT_SIZES):
        block = logits[..., off : off + size]
        e = np.exp(block - block.max(axis=-1, keepdims=True))
        out[..., off : off + size] = e / e.sum(axis=-1, keepdims=True)
    return out


class FactorisedPolicy:
    """Independent categorical distributions per image and slot.

    `logits` is (images, N_LOGITS); slot s of image i is the block
    `logits[i, SLOT_OFFSETS[s] : SLOT_OFFSETS[s] + SLOT_SIZES[s]]`. Updates
    use Adam (Kingma and Ba 2015) on the REINFORCE gradient.
    """

    def __init__(self, n_images: int, rng: np.random.Generator, lr: float = 0.1, init_scale: float = 0.01) -> None:
        self.logits = rng.normal(0.0, init_scale, size=(n_images, N_LOGITS))
        self.lr = lr
        self._m = np.zeros_like(self.logits)
        self._v = np.zeros_like(self.logits)
        self._t = 0

    @property
    def n_images(self) -> int:
        return self.logits.shape[0]

    def probabilities(self) -> np.ndarray:
        return _softmax_slots(self.logits)

    def sample(self, k: int, rng: np.random.Generator) -> np.ndarray:
        """(images, k, n_slots) slot choices drawn by Gumbel-max."""
        g = rng.gumbel(size=(self.n_images, k, N_LOGITS))
        z = self.logits[:, None, :] + g
        return np.stack([z[..., off : off + size].argmax(-1) for off, size in zip(SLOT_OFFSETS, SLOT_SIZES)], axis=-1)

    def greedy(self) -> np.ndarray:
        """(images, n_slots): the most likely choice of every slot."""
        return np.stack(
            [self.logits[:, off : off + size].argmax(-1) for off, size in zip(SLOT_OFFSETS, SLOT_SIZES)], axis=-1
        )

    def gradient(self, actions: np.ndarray, advantages: np.ndarray) -> np.ndarray:
        """REINFORCE gradient of mean advantage-weighted log-likelihood:
        for each used slot, advantage * (onehot(choice) - softmax), averaged
        over the k samples of each image. `actions` (images, k, n_slots),
        `advantages` (images, k)."""
        probs = self.probabilities()
        mask = used_slots(actions)
        grad = np.zeros_like(self.logits)
        k = actions.shape[1]
        for s, (off, size) in enumerate(zip(SLOT_OFFSETS, SLOT_SIZES)):
            w = advantages * mask[..., s]  # (images, k)
            onehot = np.zeros((self.n_images, k, size))
            np.put_along_axis(onehot, actions[..., s, None], 1.0, axis=-1)
            grad[:, off : off + size] = (w[..., None] * (onehot - probs[:, None, off : off + size])).sum(1) / k
        return grad

    def entropy_gradient(self) -> np.ndarray:
        """Gradient of the summed slot entropies of every image:
        ``-p * (log p + H)`` within each slot."""
        probs = self.probabilities()
        grad = np.zeros_like(self.logits)
        for off, size in zip(SLOT_OFFSETS, SLOT_SIZES):
            p = probs[:, off : off + size]
            logp = np.log(np.maximum(p, 1e-12))
            h = -(p * logp).sum(-1, keepdims=True)
            grad[:, off : off + size] = -p * (logp + h)
        return grad

    def step(self, grad: np.ndarray, beta1: float = 0.9, beta2: float = 0.999, eps: float = 1e-8) -> None:
        """One Adam ascent step along `grad`."""
        self._t += 1
        self._m = beta1 * self._m + (1 - beta1) * grad
        self._v = beta2 * self._v + (1 - beta2) * grad**2
        m_hat = self._m / (1 - beta1**self._t)
        v_hat = self._v / (1 - beta2**self._t)
        self.logits += self.lr * m_hat / (np.sqrt(v_hat) + eps)


def chance_correctness(scenes: Sequence[dict]) -> float:
    """Expected share of correct captions when every slot is drawn
    uniformly, exactly: the count slot must name the scene's count (1/3),
    the piece slots must list its pieces in some order (each of the n!
    orders has probability 60**-n), and from two pieces on either the form
    is "list" (1/2) or it is "relation" (1/2) and the relation slot names the
    clear relation of the first two listed (1/4, or 0 when that pair has
    none)."""
    kinds = len(SIZES) * len(COLOURS) * len(SHAPES)
    total = 0.0
    for scene in scenes:
        pieces = scene["pieces"]
        n = len(pieces)
        p = 0.0
        for order in itertools.permutations(range(n)):
            if n == 1:
                p += 1.0
            else:
                clear = relation_between(pieces[order[0]], pieces[order[1]], scene["width"], scene["height"])
                p += 0.5 + (0.5 / len(RELATIONS) if clear is not None else 0.0)
        total += p / len(SLOTS[COUNT_SLOT][1]) / kinds**n
    return total / max(1, len(scenes))
