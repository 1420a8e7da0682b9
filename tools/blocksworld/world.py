"""Scenes of the blocks world: what lies on the table, as plain facts.

A scene is 1 to 3 pieces on a table seen from above. Each piece has a colour,
a shape, a size and a centre; a scene with two or more pieces also names one
spatial relation between two of its pieces. Everything here is pure data, so
the same facts drive the renderer, the caption grammar and, later, any judge of
generated captions.

Coordinates are fractions (0..1, origin top left) of a square: the scene
square. An image of any size shows the scene square centred and as large as
fits (the table simply goes on beyond it in the longer direction), so shapes are
never distorted and one scene can be drawn at any resolution; `to_pixels` and
`Scene.to_facts` turn fractions into pixels of a given image.

A scene is a pure function of `(seed, index)`: `sample_scene(seed, index)`
draws from its own random stream, so scene 17 of seed 3 is the same whether or
not scenes 0..16 were made first.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

COLOURS = ("red", "orange", "yellow", "green", "blue", "purple")
SHAPES = ("circle", "square", "triangle", "cross", "ring")
SIZES = ("small", "large")
RELATIONS = ("left of", "right of", "above", "below")
OPPOSITE = {"left of": "right of", "right of": "left of", "above": "below", "below": "above"}

# Radius of a piece's bounding circle as a fraction of the table side. Small
# pieces stay around 10 px wide at 64x64, still large enough for a ring's hole.
RADIUS = {"small": (0.075, 0.09), "large": (0.14, 0.165)}

# How many pieces a scene holds; single pieces are rarer because they carry no
# relation and are easy.
COUNT_WEIGHTS = (0.2, 0.4, 0.4)

# Gap kept between bounding circles, as a fraction of the side, so pieces never
# touch and count stays unambiguous.
GAP = 0.03

# A relation is only stated when one axis clearly dominates: |main| must exceed
# both this fraction of the side and DOMINANCE times the other axis.
MIN_OFFSET = 0.12
DOMINANCE = 1.5


@dataclass(frozen=True)
class Piece:
    """One piece on the table. `x`, `y`, `radius` are fractions of the side."""

    colour: str
    shape: str
    size: str
    x: float
    y: float
    radius: float
    angle: float  # degrees; squares, triangles and crosses lie a little askew

    def kind(self) -> tuple[str, str, str]:
        """The facts a caption can state about this piece (no position)."""
        return (self.size, self.colour, self.shape)


@dataclass(frozen=True)
class Relation:
    """`pieces[subject]` is `relation` `pieces[object]`."""

    subject: int
    relation: str
    object: int


@dataclass(frozen=True)
class Scene:
    """A table with its pieces and, from two pieces on, one stated relation."""

    pieces: tuple[Piece, ...]
    relation: Relation | None
    # Table look: base colour and texture seed; not facts, but part of the image.
    table_rgb: tuple[int, int, int] = (128, 118, 104)
    texture_seed: int = 0
    seed: int = 0
    index: int = 0

    @property
    def count(self) -> int:
        return len(self.pieces)

    def signature(self) -> tuple:
        """Facts a caption could state, position-free; equal signatures mean
        every inventory caption of one scene is true of the other."""
        rel = None
        if self.relation is not None:
            r = self.relation
            rel = (self.pieces[r.subject].kind(), r.relation, self.pieces[r.object].kind())
        return (tuple(sorted(p.kind() for p in self.pieces)), rel)

    def to_facts(self, width: int = 64, height: int = 64) -> dict:
        """Machine-readable facts with centres in pixels of a width x height image.

        `x`, `y` are pixel coordinates of the piece's centre (origin top left,
        x to the right, y down) and `radius` that of its bounding circle.
        """
        pieces = []
        for p in self.pieces:
            x, y, radius = to_pixels(p.x, p.y, p.radius, width, height)
            pieces.append(
                {
                    "colour": p.colour,
                    "shape": p.shape,
                    "size": p.size,
                    "x": round(x, 2),
                    "y": round(y, 2),
                    "radius": round(radius, 2),
                }
            )
        relation = None
        if self.relation is not None:
            relation = {
                "subject": self.relation.subject,
                "relation": self.relation.relation,
                "object": self.relation.object,
            }
        return {
            "width": width,
            "height": height,
            "count": self.count,
            "pieces": pieces,
            "relation": relation,
        }


def mirrored(scene: Scene, horizontal: bool, vertical: bool) -> Scene:
    """The scene seen in a mirror (left-right and/or top-bottom), facts and all.

    Used for training only: the picture of a mirrored scene is the flipped
    picture of the original (a flipped triangle points down, which no rendered
    scene does, so the picture is flipped rather than re-rendered).
    """
    if not (horizontal or vertical):
        return scene
    swap = {}
    if horizontal:
        swap |= {"left of": "right of", "right of": "left of"}
    if vertical:
        swap |= {"above": "below", "below": "above"}
    pieces = tuple(
        Piece(p.colour, p.shape, p.size, 1 - p.x if horizontal else p.x, 1 - p.y if vertical else p.y, p.radius, p.angle)
        for p in scene.pieces
    )
    relation = scene.relation
    if relation is not None:
        relation = Relation(relation.subject, swap.get(relation.relation, relation.relation), relation.object)
    return Scene(pieces, relation, scene.table_rgb, scene.texture_seed, scene.seed, scene.index)


def to_pixels(x: float, y: float, radius: float, width: int, height: int) -> tuple[float, float, float]:
    """Scene-square fractions to pixels of a width x height image."""
    side = min(width, height)
    return ((width - side) / 2 + x * side, (height - side) / 2 + y * side, radius * side)


def relation_between(a: Piece, b: Piece) -> str | None:
    """The clear relation of `a` to `b`, or None when neither axis dominates."""
    dx, dy = a.x - b.x, a.y - b.y
    if abs(dx) >= MIN_OFFSET and abs(dx) >= DOMINANCE * abs(dy):
        return "left of" if dx < 0 else "right of"
    if abs(dy) >= MIN_OFFSET and abs(dy) >= DOMINANCE * abs(dx):
        return "above" if dy < 0 else "below"
    return None


def scene_rng(seed: int, index: int) -> np.random.Generator:
    """The random stream of one scene; distinct seeds give disjoint streams."""
    return np.random.default_rng([seed, index])


def _place(rng: np.random.Generator, radius: float, placed: list[Piece]) -> tuple[float, float] | None:
    for _ in range(200):
        x = rng.uniform(radius + 0.02, 1 - radius - 0.02)
        y = rng.uniform(radius + 0.02, 1 - radius - 0.02)
        if all(np.hypot(x - p.x, y - p.y) >= radius + p.radius + GAP for p in placed):
            return x, y
    return None


def sample_scene(seed: int, index: int) -> Scene:
    """Scene `index` of the stream `seed`."""
    rng = scene_rng(seed, index)
    count = int(rng.choice([1, 2, 3], p=COUNT_WEIGHTS))
    while True:
        pieces: list[Piece] = []
        kinds: set[tuple[str, str]] = set()
        for _ in range(count):
            # Colour and shape together identify a piece, so captions that name
            # "the red circle" are never ambiguous.
            while True:
                colour = str(rng.choice(COLOURS))
                shape = str(rng.choice(SHAPES))
                if (colour, shape) not in kinds:
                    kinds.add((colour, shape))
                    break
            size = str(rng.choice(SIZES))
            radius = float(rng.uniform(*RADIUS[size]))
            spot = _place(rng, radius, pieces)
            if spot is None:
                break
            angle = float(rng.uniform(-20, 20)) if shape in ("square", "triangle", "cross") else 0.0
            pieces.append(Piece(colour, shape, size, float(spot[0]), float(spot[1]), radius, angle))
        if len(pieces) < count:
            continue
        relation = None
        if count >= 2:
            pairs = [(i, j) for i in range(count) for j in range(count) if i != j]
            order = rng.permutation(len(pairs))
            for k in order:
                i, j = pairs[k]
                rel = relation_between(pieces[i], pieces[j])
                if rel is not None:
                    relation = Relation(i, rel, j)
                    break
            if relation is None:
                # No pair is clearly placed; draw the positions again.
                continue
        base = int(rng.integers(96, 150))
        table = (
            base + int(rng.integers(-8, 9)),
            base - 8 + int(rng.integers(-8, 9)),
            base - 22 + int(rng.integers(-8, 9)),
        )
        return Scene(
            pieces=tuple(pieces),
            relation=relation,
            table_rgb=table,
            texture_seed=int(rng.integers(0, 2**31 - 1)),
            seed=seed,
            index=index,
        )
