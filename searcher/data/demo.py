"""Built-in demo data: embossed symbols on metal parts, seen by an inspection camera.

A production line stamps one of eight symbols into each metal part; the camera must
say which. The images are drawn here from distance functions with numpy alone, so
they never depend on installed fonts, and the same seed always gives the same bytes.
Some symbols are deliberately alike (arrow / chevron / triangle, ring / square /
dot pair, bar / cross), and contrast, blur and noise vary widely, so small nets do
not all reach 100 %.
"""

from __future__ import annotations

import numpy as np

# Name of each class, in label order.
CLASS_NAMES: tuple[str, ...] = (
    "arrow",  # shaft with an open head, pointing along +u
    "ring",  # circle outline
    "cross",  # plus sign
    "triangle",  # filled triangle pointing along +u
    "bar",  # one thick straight stroke
    "chevron",  # open '>' head without a shaft
    "dot_pair",  # two filled discs side by side
    "square",  # square outline
)


def _segment(u: np.ndarray, v: np.ndarray, a: tuple[float, float], b: tuple[float, float]) -> np.ndarray:
    """Distance from each point to the segment a-b (the spine of a stroke)."""
    bu, bv = b[0] - a[0], b[1] - a[1]
    pu, pv = u - a[0], v - a[1]
    h = np.clip((pu * bu + pv * bv) / (bu * bu + bv * bv), 0.0, 1.0)
    return np.hypot(pu - bu * h, pv - bv * h)


def _strokes(u: np.ndarray, v: np.ndarray, t: np.ndarray, *segments) -> np.ndarray:
    """Signed distance of a union of strokes of half-width t."""
    return np.minimum.reduce([_segment(u, v, a, b) for a, b in segments]) - t


def _glyph_distance(label: int, u: np.ndarray, v: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Signed distance (negative inside) of symbol `label` in its own frame (half-size ~0.8)."""
    name = CLASS_NAMES[label]
    if name == "arrow":
        return _strokes(u, v, t, ((-0.8, 0.0), (0.75, 0.0)), ((0.8, 0.0), (0.3, -0.5)), ((0.8, 0.0), (0.3, 0.5)))
    if name == "chevron":
        return _strokes(u, v, t, ((0.45, 0.0), (-0.2, -0.65)), ((0.45, 0.0), (-0.2, 0.65)))
    if name == "cross":
        return _strokes(u, v, t, ((-0.75, 0.0), (0.75, 0.0)), ((0.0, -0.75), (0.0, 0.75)))
    if name == "bar":
        return _strokes(u, v, 1.7 * t, ((-0.75, 0.0), (0.75, 0.0)))
    if name == "ring":
        return np.abs(np.hypot(u, v) - 0.6) - t
    if name == "square":
        return np.abs(np.maximum(np.abs(u), np.abs(v)) - 0.55) - t
    if name == "dot_pair":
        return np.minimum(np.hypot(u - 0.45, v), np.hypot(u + 0.45, v)) - (0.18 + t)
    if name == "triangle":
        # Convex polygon: the largest signed distance to its three edge lines.
        corners = np.array([(0.8, 0.0), (-0.55, -0.72), (-0.55, 0.72)])
        edges = []
        for i in range(3):
            (au, av), (bu, bv) = corners[i], corners[(i + 1) % 3]
            nu, nv = -(bv - av), bu - au  # outward normal for this winding
            norm = np.hypot(nu, nv)
            edges.append(((u - au) * nu + (v - av) * nv) / norm)
        return np.maximum.reduce(edges)
    raise AssertionError(f"no drawing for class {name!r}")


def _blur(images: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Separable 5-tap Gaussian blur with a per-image width (sigma in pixels, 0 = none)."""
    offsets = np.arange(-2, 3, dtype=np.float32)
    weights = np.exp(-0.5 * (offsets[None, :] / np.maximum(sigma[:, None], 1e-3)) ** 2)
    weights = (weights / weights.sum(axis=1, keepdims=True)).astype(np.float32)
    out = images
    for axis in (1, 2):
        pad = [(0, 0)] * 3
        pad[axis] = (2, 2)
        padded = np.pad(out, pad, mode="edge")
        acc = np.zeros_like(out)
        for k in range(len(offsets)):
            window = [slice(None)] * 3
            window[axis] = slice(k, k + out.shape[axis])
            acc += weights[:, k, None, None] * padded[tuple(window)]
        out = acc
    return out


def _draw(rng: np.random.Generator, low: float, high: float, n: int) -> np.ndarray:
    """One uniform value per image, shaped to broadcast over its pixels."""
    return rng.uniform(low, high, (n, 1, 1)).astype(np.float32)


def _background(rng: np.random.Generator, n: int, py: np.ndarray, px: np.ndarray) -> np.ndarray:
    """Brushed metal under uneven light: level, gradient, a soft highlight and streaks."""
    level, slope, angle = _draw(rng, 0.4, 0.6, n), _draw(rng, 0.0, 0.2, n), _draw(rng, 0.0, 2 * np.pi, n)
    spot_y, spot_x, spot = _draw(rng, -1.0, 1.0, n), _draw(rng, -1.0, 1.0, n), _draw(rng, 0.0, 0.12, n)
    streak = _draw(rng, 0.0, 0.03, n)
    vertical = rng.random((n, 1, 1)) < 0.5
    h, w = py.shape[1:]
    # Streaks: noise that changes across the brushing direction and hardly along it.
    along_x, along_y = rng.standard_normal((n, 1, w), np.float32), rng.standard_normal((n, h, 1), np.float32)
    brushed = 0.3 * rng.standard_normal((n, h, w), np.float32) + np.where(vertical, along_x, along_y)
    light = slope * (px * np.cos(angle) + py * np.sin(angle)) / 2
    light += spot * np.exp(-((px - spot_x) ** 2 + (py - spot_y) ** 2) / 0.6)
    return level + light + streak * brushed


def make_demo(n: int = 3000, size: tuple[int, int] = (32, 32),
              seed: int = 0) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
    """Draw `n` balanced, labelled grayscale images of embossed symbols.

    Returns (images uint8 N×H×W, labels int64 N, class names). The same arguments
    always give the same bytes: every random number comes from one generator seeded here.
    """
    h, w = int(size[0]), int(size[1])
    if n < 1 or h < 4 or w < 4:
        raise ValueError(f"make_demo needs n >= 1 and a size of at least 4x4, got n={n}, size={size}")
    rng = np.random.default_rng(seed)
    k = len(CLASS_NAMES)
    labels = rng.permutation(np.arange(n) % k).astype(np.int64)

    # Pixel centres in units of half the shorter side, so symbols scale with the image.
    half = min(h, w) / 2
    py = np.broadcast_to(((np.arange(h, dtype=np.float32) + 0.5 - h / 2) / half)[None, :, None], (1, h, w))
    px = np.broadcast_to(((np.arange(w, dtype=np.float32) + 0.5 - w / 2) / half)[None, None, :], (1, h, w))

    # Pose and look of each part, drawn up front in a fixed order.
    scale = _draw(rng, 0.55, 0.85, n)
    shift_x, shift_y = _draw(rng, -0.2, 0.2, n), _draw(rng, -0.2, 0.2, n)  # the part sits in a fixture
    turn = _draw(rng, -0.6, 0.6, n)  # parts arrive roughly aligned, within ±35°
    thickness = _draw(rng, 0.11, 0.18, n)
    stretch = _draw(rng, 0.85, 1.15, n)  # slight aspect change of the stamp
    light_dir = _draw(rng, 0.4, 1.2, n)  # fixed lamp at the upper left, some jitter (radians)
    relief = _draw(rng, 0.4, 0.9, n)  # height of the raised stamp times light strength
    tint = _draw(rng, 0.05, 0.15, n) * rng.choice(np.float32([-1, 1]), (n, 1, 1))  # face brighter or darker
    worn = np.where(rng.random((n, 1, 1)) < 0.12, np.float32(0.15), np.float32(1.0))  # a worn die leaves a faint stamp
    blur = rng.uniform(0.0, 1.2, n)  # focus, in pixels
    noise = _draw(rng, 0.02, 0.06, n)  # sensor noise, as a fraction of full scale
    background = _background(rng, n, py, px)

    # Each pixel in the symbol's own frame, then the symbol's signed distance there.
    dx, dy = px - shift_x, py - shift_y
    u = (np.cos(turn) * dx + np.sin(turn) * dy) / (scale * stretch)
    v = (np.cos(turn) * dy - np.sin(turn) * dx) / scale
    pixel = (1.0 / half) / scale  # one pixel in the symbol's frame, for anti-aliasing
    mask = np.empty((n, h, w), np.float32)
    for label in range(k):
        rows = labels == label
        dist = _glyph_distance(label, u[rows], v[rows], thickness[rows])
        mask[rows] = np.clip(0.5 - dist / pixel[rows], 0.0, 1.0)

    # Emboss: light falling on the relief gives a bright edge on one side, dark on the other.
    height = _blur(mask, np.full(n, 0.8))
    grad_y, grad_x = np.gradient(height, axis=(1, 2))
    shade = -(np.cos(light_dir) * grad_x + np.sin(light_dir) * grad_y)
    image = background + worn * (2.0 * relief * shade + tint * mask)
    image = _blur(image, blur) + noise * rng.standard_normal((n, h, w), np.float32)
    images = np.round(np.clip(image, 0.0, 1.0) * 255).astype(np.uint8)
    return images, labels, CLASS_NAMES
