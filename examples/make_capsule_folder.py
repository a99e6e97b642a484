"""Write an imbalanced RGB class folder to try searcher on: capsules in blister pockets, seen from above.

A packing line photographs each pocket of a blister strip before it is sealed. Most pockets hold a good
two-tone capsule; a few hold a capsule whose cap has the wrong colour, a cracked one, or none at all.
The rare classes are the ones that matter, so accuracy alone would flatter a model that ignores them.

    python examples/make_capsule_folder.py runs/capsules-data     # 1,320 images of 96×96
    searcher search --space edge_rgb --data runs/capsules-data --name capsules --trials 30 --minutes 60

The shipped space `edge_rgb` offers 64×64 and 96×96 input; data is decoded at the larger size once
and shrunk for 64×64 candidates, so the folder is written at 96×96 by default.

Every image is drawn here with numpy from a seed (no downloads, no fonts); the same arguments always
give the same files. About one file in twenty is saved as JPEG, as cameras often deliver.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
from PIL import Image

# Images per class: the good class dominates, as on a real line.
COUNTS = {"ok": 1000, "discoloured": 160, "cracked": 100, "empty": 60}
CAP = np.array([200.0, 60.0, 40.0])  # red-orange cap half, RGB 0-255
BODY = np.array([235.0, 225.0, 200.0])  # ivory body half
WRONG_CAP = np.array([170.0, 95.0, 45.0])  # a browner cap: the discoloured batch


def _capsule(u: np.ndarray, v: np.ndarray, length: float, radius: float) -> np.ndarray:
    """Signed distance to a capsule (a segment of half-length `length` along u, thickened by `radius`)."""
    return np.hypot(u - np.clip(u, -length, length), v) - radius


def draw(kind: str, size: int, rng: np.random.Generator) -> np.ndarray:
    """One pocket photographed from above, uint8 size×size×3."""
    y, x = (np.mgrid[:size, :size] + 0.5) / size * 2 - 1  # -1..1 across the image
    light = rng.uniform(0.75, 1.15)  # lamp brightness varies along the line
    tint = rng.uniform(-12, 12, 3)  # white balance drift
    # The blister pocket: a pale round dome with a soft rim highlight, on the foil.
    pocket = np.hypot(x, y)
    image = np.where(pocket[..., None] < 0.9, np.array([205.0, 210.0, 215.0]), np.array([160.0, 163.0, 168.0]))
    image = image + 25 * np.exp(-((pocket - 0.85) / 0.05) ** 2)[..., None]
    if kind != "empty":
        turn = rng.uniform(-0.35, 0.35) + (np.pi if rng.random() < 0.5 else 0.0)  # either end first
        cx, cy = rng.normal(0, 0.06, 2)
        u = np.cos(turn) * (x - cx) + np.sin(turn) * (y - cy)
        v = -np.sin(turn) * (x - cx) + np.cos(turn) * (y - cy)
        inside = np.clip(0.5 - _capsule(u, v, 0.42, 0.24) * size / 2, 0, 1)[..., None]  # anti-aliased mask
        cap = WRONG_CAP + rng.normal(0, 8, 3) if kind == "discoloured" else CAP + rng.normal(0, 8, 3)
        colour = np.where((u > 0)[..., None], cap, BODY)
        shade = 0.75 + 0.25 * np.clip(1 - (v / 0.24) ** 2, 0, 1)[..., None]  # a cylinder is darker at its sides
        colour = colour * shade + 60 * np.exp(-(((v + 0.1) / 0.05) ** 2))[..., None]  # specular streak
        if kind == "cracked":
            # A jagged dark crack across the capsule, somewhere along its length.
            at = rng.uniform(-0.45, 0.45)
            wobble = at + 0.05 * np.sin(v * rng.uniform(15, 30) + rng.uniform(0, 6))
            crack = np.exp(-((u - wobble) / rng.uniform(0.015, 0.03)) ** 2)[..., None]
            colour = colour * (1 - 0.8 * crack)
        image = image * (1 - inside) + colour * inside
    elif rng.random() < 0.5:
        crumbs = rng.uniform(-0.5, 0.5, (3, 2))  # powder left in an empty pocket
        for cx, cy in crumbs:
            image = image - 40 * np.exp(-((x - cx) ** 2 + (y - cy) ** 2) / 0.002)[..., None]
    image = image * light + tint + rng.normal(0, 5, image.shape)  # lighting, colour drift, sensor noise
    return np.clip(np.round(image), 0, 255).astype(np.uint8)


def write_folder(root: Path, size: int = 96, seed: int = 0, counts: dict[str, int] | None = None) -> dict[str, int]:
    """Write `counts` (default COUNTS) images into root/<class>/; returns them. Refuses a non-empty root."""
    counts = dict(COUNTS if counts is None else counts)
    if root.exists() and any(root.iterdir()):
        raise SystemExit(f"{root} is not empty; give a new folder")
    rng = np.random.default_rng(seed)
    for kind, count in counts.items():
        (root / kind).mkdir(parents=True, exist_ok=True)
        for i in range(count):
            pixels = draw(kind, size, rng)
            if rng.random() < 0.05:
                Image.fromarray(pixels).save(root / kind / f"{kind}_{i:04d}.jpg", quality=92)
            else:
                Image.fromarray(pixels).save(root / kind / f"{kind}_{i:04d}.png")
    return counts


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("folder", type=Path, help="new folder to write the class sub-folders into")
    parser.add_argument("--size", type=int, default=96, help="image side in pixels (96 serves both of the space's sizes)")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    counts = write_folder(args.folder, args.size, args.seed)
    print(f"wrote {sum(counts.values())} images to {args.folder}: "
          + ", ".join(f"{k} {v}" for k, v in counts.items()))


if __name__ == "__main__":
    main()
