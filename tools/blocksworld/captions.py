"""Captions of blocks-world scenes: a small grammar, paraphrases and contrasts.

A caption is first a `CaptionSpec`: which template, which facts it states
(count, the pieces it mentions, a relation between two of them) and which
wording it picked for each word slot. `render` turns a spec into text. Because
the wording choices are stored in the spec, a contrast is made by changing one
fact of a true spec and rendering it again: the sentence keeps its words and
changes exactly that fact ("a large red ring" -> "a large blue ring").

Every caption states each piece it mentions in full (size, colour, shape), so
every contrast of colour, shape or size can be built from any caption.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from world import COLOURS, OPPOSITE, SHAPES, SIZES, Scene

# Paraphrase vocabulary; every entry of a list means the same fact.
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
NOUNS = (("piece", "pieces"), ("shape", "shapes"), ("object", "objects"))

# Templates by the facts they need. `inventory` lists every piece; `relation`
# states the scene's relation (possibly from the other piece's side).
INVENTORY = ("count_colon", "table_with", "list_on_table", "there_are", "just")
RELATION = ("plain", "the_is", "count_then", "with", "and_third")

CHANGES = ("colour", "shape", "size", "relation", "count")


@dataclass(frozen=True)
class Mention:
    """A piece as a caption states it, with the wording picked for it."""

    size: str
    colour: str
    shape: str
    words: tuple[int, int, int]  # index into SIZE_WORDS / COLOUR_WORDS / SHAPE_WORDS lists


@dataclass(frozen=True)
class CaptionSpec:
    """The facts a caption states and how it words them.

    `relation` is `(subject mention, relation, object mention)`; `count` is the
    stated number of pieces or None when the template states no number.
    """

    template: str
    mentions: tuple[Mention, ...]
    count: int | None
    relation: tuple[int, str, int] | None
    words: tuple[int, int, int]  # count word, noun, relation word

    def facts(self) -> dict:
        """What this caption claims, machine-readable."""
        return {
            "template": self.template,
            "count": self.count,
            "pieces": [{"size": m.size, "colour": m.colour, "shape": m.shape} for m in self.mentions],
            "relation": None
            if self.relation is None
            else {"subject": self.relation[0], "relation": self.relation[1], "object": self.relation[2]},
        }


def _pick(options: tuple[str, ...], k: int) -> str:
    return options[k % len(options)]


def _piece(m: Mention, article: str = "a") -> str:
    size = _pick(SIZE_WORDS[m.size], m.words[0])
    colour = _pick(COLOUR_WORDS[m.colour], m.words[1])
    shape = _pick(SHAPE_WORDS[m.shape], m.words[2])
    return f"{article} {size} {colour} {shape}"


def _listing(mentions: tuple[Mention, ...]) -> str:
    parts = [_piece(m) for m in mentions]
    if len(parts) == 1:
        return parts[0]
    return ", ".join(parts[:-1]) + " and " + parts[-1]


def _count(n: int, words: tuple[int, int, int]) -> str:
    noun = NOUNS[words[1] % len(NOUNS)]
    return f"{_pick(COUNT_WORDS[n], words[0])} {noun[0] if n == 1 else noun[1]}"


def render(spec: CaptionSpec) -> str:
    """The caption text of a spec (lower case, words and punctuation)."""
    t, ms, w = spec.template, spec.mentions, spec.words
    if spec.relation is None:
        listing = _listing(ms)
        if t == "count_colon":
            return f"{_count(spec.count, w)}: {listing}"
        if t == "table_with":
            return f"a table with {_count(spec.count, w)}, {listing}"
        if t == "there_are":
            verb = "is" if spec.count == 1 else "are"
            return f"there {verb} {_count(spec.count, w)} on the table: {listing}"
        if t == "list_on_table":
            return f"{listing} on the table"
        if t == "just":
            return f"just {listing}, nothing else"
        raise ValueError(f"unknown inventory template {t}")
    s, rel, o = spec.relation
    rel_text = _pick(RELATION_WORDS[rel], w[2])
    a, b = ms[s], ms[o]
    if t == "plain":
        return f"{_piece(a)} {rel_text} {_piece(b)}"
    if t == "the_is":
        return f"{_piece(a, 'the')} is {rel_text} {_piece(b, 'the')}"
    if t == "count_then":
        return f"{_count(spec.count, w)}; {_piece(a, 'the')} is {rel_text} {_piece(b, 'the')}"
    if t == "with":
        return f"{_count(spec.count, w)} on the table, with {_piece(a)} {rel_text} {_piece(b)}"
    if t == "and_third":
        third = [m for i, m in enumerate(ms) if i not in (s, o)]
        return f"{_piece(a)} {rel_text} {_piece(b)}, and {_listing(tuple(third))}"
    raise ValueError(f"unknown relation template {t}")


def _mention(piece, rng: np.random.Generator) -> Mention:
    return Mention(piece.size, piece.colour, piece.shape, tuple(int(k) for k in rng.integers(0, 6, size=3)))


def sample_spec(scene: Scene, rng: np.random.Generator, family: str | None = None) -> CaptionSpec:
    """One true caption spec of `scene`; `family` forces "inventory" or "relation"."""
    n = scene.count
    if family is None:
        family = "relation" if scene.relation is not None and rng.random() < 0.55 else "inventory"
    words = tuple(int(k) for k in rng.integers(0, 6, size=3))
    if family == "inventory":
        template = str(rng.choice(INVENTORY if n == 1 else INVENTORY[:4]))
        order = rng.permutation(n)
        mentions = tuple(_mention(scene.pieces[i], rng) for i in order)
        count = n if template in ("count_colon", "table_with", "there_are") else None
        return CaptionSpec(template, mentions, count, None, words)
    r = scene.relation
    templates = RELATION if n == 3 else RELATION[:4]
    template = str(rng.choice(templates))
    # Half the time the relation is stated from the object's side
    # ("B is right of A" for "A is left of B"): the same fact, other words.
    if rng.random() < 0.5:
        subject, relation, obj = r.subject, r.relation, r.object
    else:
        subject, relation, obj = r.object, OPPOSITE[r.relation], r.subject
    if template == "and_third":
        order = [subject, obj] + [i for i in range(n) if i not in (subject, obj)]
        mentions = tuple(_mention(scene.pieces[i], rng) for i in order)
    else:
        mentions = (_mention(scene.pieces[subject], rng), _mention(scene.pieces[obj], rng))
    count = n if template in ("count_then", "with") else None
    return CaptionSpec(template, mentions, count, (0, relation, 1), words)


def true_captions(scene: Scene, rng: np.random.Generator, k: int = 5) -> list[CaptionSpec]:
    """`k` true captions with distinct texts, covering the scene's facts.

    The first states the count; with two or more pieces the second states the
    relation, so every fact has a caption that a contrast can change.
    """
    specs: list[CaptionSpec] = []
    texts: set[str] = set()

    def add(spec: CaptionSpec) -> bool:
        text = render(spec)
        if text in texts:
            return False
        texts.add(text)
        specs.append(spec)
        return True

    while True:
        spec = sample_spec(scene, rng, "inventory")
        if spec.count is not None and add(spec):
            break
    if scene.relation is not None:
        while not add(sample_spec(scene, rng, "relation")):
            pass
    while len(specs) < k:
        add(sample_spec(scene, rng))
    return specs


def _kinds(scene: Scene) -> set[tuple[str, str, str]]:
    return {p.kind() for p in scene.pieces}


def contrast(spec: CaptionSpec, scene: Scene, change: str, rng: np.random.Generator) -> CaptionSpec | None:
    """`spec` with exactly one fact changed so that it is false of `scene`.

    A changed piece never becomes a piece the scene has (a red circle recoloured
    blue when a blue circle lies there too would still be true). None when the
    caption does not state that kind of fact.
    """
    if change in ("colour", "shape", "size"):
        present = _kinds(scene)
        values = {"colour": COLOURS, "shape": SHAPES, "size": SIZES}[change]
        options = []
        for m_index, m in enumerate(spec.mentions):
            for v in values:
                new = dataclasses.replace(m, **{change: v})
                if v != getattr(m, change) and (new.size, new.colour, new.shape) not in present:
                    options.append((m_index, new))
        if not options:
            return None
        m_index, new = options[int(rng.integers(len(options)))]
        mentions = spec.mentions[:m_index] + (new,) + spec.mentions[m_index + 1 :]
        return dataclasses.replace(spec, mentions=mentions)
    if change == "relation":
        if spec.relation is None:
            return None
        s, rel, o = spec.relation
        return dataclasses.replace(spec, relation=(s, OPPOSITE[rel], o))
    if change == "count":
        if spec.count is None:
            return None
        options = [n for n in (1, 2, 3) if n != spec.count]
        return dataclasses.replace(spec, count=int(options[int(rng.integers(len(options)))]))
    raise ValueError(f"unknown change {change}")


def contrasts(specs: list[CaptionSpec], scene: Scene, rng: np.random.Generator) -> list[tuple[CaptionSpec, str, int]]:
    """One contrast per kind of fact the captions state: `(spec, changed, from)`."""
    out = []
    for change in CHANGES:
        candidates = [i for i, s in enumerate(specs) if contrast(s, scene, change, np.random.default_rng(0)) is not None]
        if not candidates:
            continue
        source = candidates[int(rng.integers(len(candidates)))]
        changed = contrast(specs[source], scene, change, rng)
        if changed is not None:
            out.append((changed, change, source))
    return out
