"""Write an .npz of inkjet dot-matrix characters to search on: a data set where a bigger network really is better.

A continuous inkjet printer marks each carton with a lot code in hexadecimal (0-9, A-F), in a 5×7 dot
font, on corrugated board. A camera reads the code one character at a time; each image is one
character cut out of the line, with parts of its neighbours at the edges.

    python examples/make_lot_codes.py runs/lot_codes.npz            # 6,400 images of 24×24, 16 classes
    searcher census --space examples/lot_codes.toml
    searcher search --space examples/lot_codes.toml --data runs/lot_codes.npz --name lot-codes --minutes 16

Why it has a cost trade-off (the built-in demo has little: small nets reach its ceiling):

* the classes differ by a few dots: 8 and B by the left column's corners, 0 and D by two corners and
  the slash, E and F by the bottom row, 5 and 6 by one stroke; the reader must find those
  few dots, wherever the character sits and however it leans;
* every dot is unreliable: clogged nozzles drop dots (up to a fifth of them on a bad carton), drops
  land off their place, ink splatters stray dots, and the drop size, smear and contrast vary, so a
  net has to weigh many dots together rather than look for one;
* the flutes of the board and the neighbouring characters give edges that look like strokes.

More filters and more layers keep paying on such evidence, so over the range the example space's
budget allows (a few hundred to tens of thousands of parameters) accuracy rises with size; the
measured figures are in ``examples/lot_codes.toml``. Every image is drawn here with numpy from a
seed (no fonts, no downloads): the same arguments always give the same bytes.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

# Our own 5×7 font, rows top to bottom, in the style of common dot-matrix printers ("1" = a drop).
FONT = {
    "0": ("01110", "10001", "10011", "10101", "11001", "10001", "01110"),
    "1": ("00100", "01100", "00100", "00100", "00100", "00100", "01110"),
    "2": ("01110", "10001", "00001", "00010", "00100", "01000", "11111"),
    "3": ("11111", "00010", "00100", "00010", "00001", "10001", "01110"),
    "4": ("00010", "00110", "01010", "10010", "11111", "00010", "00010"),
    "5": ("11111", "10000", "11110", "00001", "00001", "10001", "01110"),
    "6": ("00110", "01000", "10000", "11110", "10001", "10001", "01110"),
    "7": ("11111", "00001", "00010", "00100", "01000", "01000", "01000"),
    "8": ("01110", "10001", "10001", "01110", "10001", "10001", "01110"),
    "9": ("01110", "10001", "10001", "01111", "00001", "00010", "01100"),
    "A": ("01110", "10001", "10001", "10001", "11111", "10001", "10001"),
    "B": ("11110", "10001", "10001", "11110", "10001", "10001", "11110"),
    "C": ("01110", "10001", "10000", "10000", "10000", "10001", "01110"),
    "D": ("11100", "10010", "10001", "10001", "10001", "10010", "11100"),
    "E": ("11111", "10000", "10000", "11110", "10000", "10000", "11111"),
    "F": ("11111", "10000", "10000", "11110", "10000", "10000", "10000"),
}
CLASS_NAMES = tuple(FONT)
DOTS = np.array([[[c == "1" for c in row] for row in FONT[name]] for name in CLASS_NAMES])  # (16, 7, 5)
ADVANCE = 6  # columns from one character to the next: 5 dots and a gap


def _glyph_ink(rng: np.random.Generator, labels: np.ndarray, x: np.ndarray, y: np.ndarray, centre: tuple,
               pitch: np.ndarray, slant: np.ndarray, radius: np.ndarray, dropout: np.ndarray,
               jitter: np.ndarray) -> np.ndarray:
    """Ink coverage (0..1) of one character per image, drawn dot by dot at its place on the pixel grid.

    ``centre`` is the character's centre in pixels (each an array over the images); ``x``, ``y`` the
    pixel centres (1×H×W); the other arguments are one value per image, shaped (n, 1, 1).
    """
    n = len(labels)
    ink = np.zeros((n, *x.shape[1:]), np.float32)
    cx, cy = centre
    for row in range(7):
        for col in range(5):
            on = DOTS[labels, row, col][:, None, None] & (rng.random((n, 1, 1)) >= dropout)
            # the dot's place: the font grid, leaned by the slant, each drop landing a little off
            gy = (row - 3) * pitch + jitter * rng.standard_normal((n, 1, 1)).astype(np.float32)
            gx = (col - 2) * pitch - slant * (row - 3) * pitch + jitter * rng.standard_normal((n, 1, 1)).astype(np.float32)
            distance = np.hypot(x - (cx + gx), y - (cy + gy))
            ink = np.maximum(ink, on * np.clip(radius + 0.5 - distance, 0.0, 1.0))  # anti-aliased disc
    return ink


def _draw(rng: np.random.Generator, low: float, high: float, n: int) -> np.ndarray:
    return rng.uniform(low, high, (n, 1, 1)).astype(np.float32)


def make_lot_codes(n: int = 6400, size: int = 24, seed: int = 0) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
    """``n`` balanced images (uint8 N×size×size), their labels (int64) and the class names."""
    if n < 1 or size < 12:
        raise ValueError(f"make_lot_codes needs n >= 1 and a size of at least 12, got n={n}, size={size}")
    rng = np.random.default_rng(seed)
    k = len(CLASS_NAMES)
    labels = rng.permutation(np.arange(n) % k).astype(np.int64)
    y, x = (np.mgrid[:size, :size].astype(np.float32) + 0.5)[:, None]  # pixel centres, 1×H×W
    unit = size / 24  # the look below was tuned at 24×24; other sizes scale with it
    pitch = _draw(rng, 2.2, 2.7, n) * unit  # dot pitch: the print head's distance from the board varies
    slant = _draw(rng, -0.12, 0.25, n)  # the carton passes at a varying speed: the code leans, mostly forward
    radius = _draw(rng, 0.55, 1.05, n) * unit  # drop size
    dropout = _draw(rng, 0.0, 0.2, n)  # share of missing drops: clogged nozzles
    jitter = _draw(rng, 0.1, 0.45, n) * unit  # drop placement error
    cx = size / 2 + _draw(rng, -2.0, 2.0, n) * unit  # the cut is not centred exactly
    cy = size / 2 + _draw(rng, -1.5, 1.5, n) * unit
    ink = _glyph_ink(rng, labels, x, y, (cx, cy), pitch, slant, radius, dropout, jitter)
    for side in (-1, 1):  # the neighbours in the line, whose edges show at the sides of the cut
        neighbours = rng.integers(0, k, n)
        ink = np.maximum(ink, _glyph_ink(rng, neighbours, x, y, (cx + side * ADVANCE * pitch, cy), pitch, slant,
                                         radius, dropout, jitter))
    for _ in range(3):  # splatter: stray small drops anywhere, on some cartons
        sx, sy = _draw(rng, 0, size, n), _draw(rng, 0, size, n)
        stray = (rng.random((n, 1, 1)) < 0.4) * np.clip(0.5 * radius + 0.5 - np.hypot(x - sx, y - sy), 0.0, 1.0)
        ink = np.maximum(ink, stray)
    smear = _draw(rng, 0.0, 1.0, n)  # wet ink dragged along the line
    ink = np.maximum(ink, smear * 0.5 * (np.roll(ink, 1, axis=2) + np.roll(ink, -1, axis=2)))
    # corrugated board: a level, flutes (soft stripes) across the line, fibre noise
    board = _draw(rng, 0.55, 0.8, n)
    flute_period, flute_phase = _draw(rng, 4.0, 7.0, n) * unit, _draw(rng, 0.0, 2 * np.pi, n)
    flutes = _draw(rng, 0.0, 0.08, n) * np.sin(2 * np.pi * x / flute_period + flute_phase)
    fibre = 0.03 * rng.standard_normal((n, size, size)).astype(np.float32)
    darkness = _draw(rng, 0.25, 0.6, n)  # ink density against the board
    image = board + flutes + fibre - darkness * ink + _draw(rng, 0.02, 0.06, n) * rng.standard_normal(
        (n, size, size)).astype(np.float32)
    return np.round(np.clip(image, 0.0, 1.0) * 255).astype(np.uint8), labels, CLASS_NAMES


# A small, a middle and a large network of the example space, one family: what --check trains.
SIZES = ("1x24x24_c4k3-m2_c8k3-m2_c16k3-m2_gap-o16_relu_bn",
         "1x24x24_c8k3-m2_c16k3-m2_c32k3-m2_gap-o16_relu_bn",
         "1x24x24_c12k3-m2_c24k3-c24k3-m2_c48k3-c48k3-m2_gap-o16_relu_bn")
SPACE = Path(__file__).resolve().parent / "lot_codes.toml"


def check_trade_off(path: Path, seeds: int) -> None:
    """Train SIZES with the space's proxy schedule on the search's own split and print their validation
    accuracy: the trade-off claimed above, measured (about a minute per training on one thread)."""
    import searcher
    from searcher.core.train_settings import TrainSettings
    from searcher.data.load import load_dataset
    from searcher.model.train import train_candidate

    space = searcher.load_space(SPACE)
    data = load_dataset(str(path), space.data_shape, seed=0)  # the split a search with --seed 0 makes
    settings = TrainSettings.from_dict(space.train, file=space.file)
    for text in SIZES:
        arch = searcher.parse_arch(text)
        scores = [train_candidate(searcher.build(arch), data.train.images, data.train.labels, data.val.images,
                                  data.val.labels, settings, seed=seed, threads=1).val_accuracy for seed in range(seeds)]
        print(f"{searcher.cost(arch).params:>7,} parameters  validation accuracy "
              f"{' '.join(f'{s:.4f}' for s in scores)} (mean {np.mean(scores):.4f}, {len(data.val.labels)} images, "
              f"{settings.epochs} epochs)  {text}", flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("path", type=Path, help="the .npz file to write (refused if it exists)")
    parser.add_argument("--count", type=int, default=6400, help="images, spread evenly over the 16 classes")
    parser.add_argument("--size", type=int, default=24, help="image side in pixels")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--check", type=int, metavar="SEEDS", default=0,
                        help="then train a small, a middle and a large network of examples/lot_codes.toml "
                             "with this many seeds each and print their validation accuracy")
    args = parser.parse_args()
    if args.path.exists():
        raise SystemExit(f"{args.path} exists; give a new file name")
    images, labels, names = make_lot_codes(args.count, args.size, args.seed)
    args.path.parent.mkdir(parents=True, exist_ok=True)
    np.savez_compressed(args.path, images=images, labels=labels, class_names=np.array(names))
    print(f"wrote {len(labels)} images of {args.size}×{args.size} in {len(names)} classes to {args.path}")
    if args.check:
        check_trade_off(args.path, args.check)


if __name__ == "__main__":
    main()
