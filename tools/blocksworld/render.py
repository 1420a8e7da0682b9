"""Pictures of blocks-world scenes, drawn with Pillow.

The table is a textured surface (a base tone, soft wood-like grain, a lighting
gradient and luminance noise) so that images are not separable by a few pixel
values; pieces get a little colour jitter and a soft shadow. Shapes are drawn
on a canvas `SUPERSAMPLE` times larger and box-reduced, which gives smooth
edges at 64x64 without depending on Pillow's antialiasing.

Everything random here comes from the scene's `texture_seed`, so a scene
renders to the same bytes every time, at any size.
"""

from __future__ import annotations

import math

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

from world import Scene, to_pixels

SUPERSAMPLE = 4

# Base colours of the pieces (sRGB); each piece is jittered around its base.
RGB = {
    "red": (214, 38, 40),
    "orange": (245, 136, 20),
    "yellow": (240, 218, 40),
    "green": (40, 170, 60),
    "blue": (36, 84, 222),
    "purple": (140, 50, 176),
}
JITTER = 14
# Sensor noise is luminance only: colour noise would triple the size of the
# committed probe PNGs for no gain in difficulty.
NOISE_SIGMA = 3.0


def _polygon(shape: str, cx: float, cy: float, r: float, angle: float) -> list[tuple[float, float]]:
    a = math.radians(angle)

    def rot(px: float, py: float) -> tuple[float, float]:
        return (cx + px * math.cos(a) - py * math.sin(a), cy + px * math.sin(a) + py * math.cos(a))

    if shape == "square":
        h = r / math.sqrt(2)
        pts = [(-h, -h), (h, -h), (h, h), (-h, h)]
    elif shape == "triangle":
        # Equilateral, point up, centred on its bounding circle.
        pts = [(r * math.cos(math.radians(t)), r * math.sin(math.radians(t))) for t in (-90, 30, 150)]
    elif shape == "cross":
        w = r * 0.36
        pts = [(-w, -r), (w, -r), (w, -w), (r, -w), (r, w), (w, w), (w, r), (-w, r), (-w, w), (-r, w), (-r, -w), (-w, -w)]
        pts = [(x * 0.92, y * 0.92) for x, y in pts]
    else:
        raise ValueError(shape)
    return [rot(x, y) for x, y in pts]


def _table(scene: Scene, width: int, height: int, rng: np.random.Generator) -> np.ndarray:
    side = min(width, height)
    yy, xx = np.mgrid[0:height, 0:width].astype(np.float32) / side
    base = np.array(scene.table_rgb, dtype=np.float32)
    # Grain: a few sinusoids along a random direction with a slow wobble.
    theta = rng.uniform(0, math.pi)
    u = xx * math.cos(theta) + yy * math.sin(theta)
    v = -xx * math.sin(theta) + yy * math.cos(theta)
    grain = np.zeros_like(u)
    for _ in range(3):
        freq = rng.uniform(6, 18)
        grain += np.sin(2 * math.pi * (freq * u + 0.6 * np.sin(2 * math.pi * rng.uniform(0.5, 2) * v + rng.uniform(0, 6.3))))
    grain *= rng.uniform(2.0, 5.0) / 3
    # Light falls from a random side.
    phi = rng.uniform(0, 2 * math.pi)
    light = rng.uniform(4, 14) * ((xx - 0.5) * math.cos(phi) + (yy - 0.5) * math.sin(phi))
    img = base[None, None, :] + (grain + light)[..., None]
    return img


def render_scene(scene: Scene, width: int = 64, height: int = 64) -> Image.Image:
    """The scene as an RGB image of width x height pixels."""
    rng = np.random.default_rng(scene.texture_seed)
    table = _table(scene, width, height, rng)
    S = SUPERSAMPLE
    W, H = width * S, height * S
    shapes = Image.new("RGBA", (W, H), (0, 0, 0, 0))
    shadow = Image.new("L", (W, H), 0)
    draw = ImageDraw.Draw(shapes)
    sdraw = ImageDraw.Draw(shadow)
    side = min(W, H)
    offset = 0.012 * side
    for p in scene.pieces:
        cx, cy, r = to_pixels(p.x, p.y, p.radius, W, H)
        colour = tuple(int(np.clip(c + rng.integers(-JITTER, JITTER + 1), 0, 255)) for c in RGB[p.colour]) + (255,)
        for d, fill, dx in ((sdraw, 110, offset), (draw, colour, 0.0)):
            x, y = cx + dx, cy + dx
            if p.shape == "circle":
                d.ellipse([x - r * 0.88, y - r * 0.88, x + r * 0.88, y + r * 0.88], fill=fill)
            elif p.shape == "ring":
                d.ellipse([x - r * 0.92, y - r * 0.92, x + r * 0.92, y + r * 0.92], fill=fill)
                hole = r * 0.48
                d.ellipse([x - hole, y - hole, x + hole, y + hole], fill=0 if d is sdraw else (0, 0, 0, 0))
            else:
                d.polygon(_polygon(p.shape, x, y, r, p.angle), fill=fill)
    shapes = shapes.reduce(S)
    shadow = shadow.reduce(S).filter(ImageFilter.GaussianBlur(max(0.6, width / 90)))
    shade = 1.0 - np.asarray(shadow, dtype=np.float32)[..., None] / 255.0 * 0.55
    img = table * shade
    rgba = np.asarray(shapes, dtype=np.float32)
    alpha = rgba[..., 3:4] / 255.0
    img = img * (1 - alpha) + rgba[..., :3] * alpha
    img += rng.normal(0, NOISE_SIGMA, size=(height, width, 1))
    return Image.fromarray(np.clip(np.round(img), 0, 255).astype(np.uint8), "RGB")
