"""examples/make_lot_codes.py: the benchmark's data set with a cost trade-off is reproducible and reads
back through the loader a search uses."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np

from searcher.data.load import load_dataset

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "examples"))

from make_lot_codes import CLASS_NAMES, DOTS, make_lot_codes  # noqa: E402


def test_same_seed_same_bytes_and_balanced_classes() -> None:
    images, labels, names = make_lot_codes(160, 24, seed=5)
    again, _, _ = make_lot_codes(160, 24, seed=5)
    other, _, _ = make_lot_codes(160, 24, seed=6)
    assert images.dtype == np.uint8 and images.shape == (160, 24, 24)
    assert np.array_equal(images, again) and not np.array_equal(images, other)
    assert np.bincount(labels).tolist() == [10] * 16 and names == CLASS_NAMES
    assert images.std() > 10  # ink, board and noise, not a flat field


def test_every_glyph_is_its_own_pattern() -> None:
    # the classes differ by a few dots, but no two share every dot of the 5×7 grid
    flat = DOTS.reshape(len(CLASS_NAMES), -1)
    assert len({row.tobytes() for row in flat}) == len(CLASS_NAMES)
    assert DOTS.shape == (16, 7, 5)


def test_the_written_file_is_what_a_search_reads(tmp_path: Path) -> None:
    path = tmp_path / "codes.npz"
    done = subprocess.run([sys.executable, str(ROOT / "examples" / "make_lot_codes.py"), str(path), "--count", "320"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    data = load_dataset(str(path), (1, 24, 24), seed=0)
    assert data.class_names == CLASS_NAMES and data.num_classes == 16
    assert len(data.train.labels) + len(data.val.labels) + len(data.test.labels) == 320
    refused = subprocess.run([sys.executable, str(ROOT / "examples" / "make_lot_codes.py"), str(path)],
                             capture_output=True, text=True, timeout=120)
    assert refused.returncode != 0 and "exists" in refused.stderr  # an existing file is never overwritten
