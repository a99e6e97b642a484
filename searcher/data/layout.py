"""How images lie in memory: N×C×H×W in shape, each pixel's channels side by side (N×H×W×C) in memory.

That is the order a decoder delivers and the channels-last order CPU convolutions run fastest in, so
the trainer cuts a batch by copying whole rows of bytes and never transposes (which costs several
milliseconds a batch). Numpy and torch both read such an array by its strides; code that needs plain
N×C×H×W order asks numpy for it (numpy.ascontiguousarray).
"""

from __future__ import annotations

import numpy as np


def empty(count: int, channels: int, h: int, w: int) -> np.ndarray:
    """An uninitialised uint8 N×C×H×W array laid out pixel-major."""
    return np.moveaxis(np.empty((count, h, w, channels), np.uint8), 3, 1)


def pixel_major(images: np.ndarray) -> np.ndarray:
    """`images` (N×C×H×W) laid out pixel-major: itself if already so, else a copy."""
    nhwc = np.moveaxis(images, 1, 3)
    return images if nhwc.flags.c_contiguous else np.moveaxis(np.ascontiguousarray(nhwc), 3, 1)


def take(images: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Images `rows` (N×C×H×W), laid out pixel-major: a copy of whole pixel-major rows."""
    return np.moveaxis(np.moveaxis(images, 1, 3)[rows], 3, 1)


def concatenate(parts: list[np.ndarray]) -> np.ndarray:
    """Images of several arrays (N×C×H×W) in one, laid out pixel-major; no transposing if they already are."""
    return np.moveaxis(np.concatenate([np.moveaxis(p, 1, 3) for p in parts]), 3, 1)
