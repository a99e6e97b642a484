"""Ceilings on every value that sets how much work a command does; README's key table states them.

Each one is far beyond what a small image classifier needs, and low enough that no count can
overflow the census's 64-bit arithmetic or ask for memory the machine does not have: with
every bound at its ceiling a conv does at most 1024²·4096²·31² ≈ 1.6·10¹⁶ MACs, and
100 of them stay below 2⁶³ ≈ 9.2·10¹⁸.
"""

from __future__ import annotations

import os

# -- architectures (space files, the text form, --arch) ----------------------------------------
MAX_SIDE = 1024  # input height or width in pixels; also the ceiling on a stride or pool window
MAX_WIDTH = 4096  # channels of a conv, width of a hidden dense layer
MAX_KERNEL = 31  # side of a square conv kernel
MAX_STAGES = 10  # conv-pool stages; plain nets this deep already train worse (He et al., CVPR 2016, Fig. 1; recalled)
MAX_CONVS = 10  # convs in one stage
MAX_HIDDEN = 2  # hidden dense layers of the head
MAX_CLASSES = 100_000  # outputs
CHANNELS = (1, 3, 4)  # input channels a space offers: gray, RGB, RGBA (what images convert to)
MAX_CHOICES = 64  # entries in any list of choices of a space file

# -- budgets ------------------------------------------------------------------------------------
MAX_CAP = 10**15  # any cap: parameters, MACs, bytes
MAX_LATENCY_MS = 86_400_000.0  # a cap on time per inference: one day
CLOCK_HZ = (1e3, 1e10)  # a target's clock: 1 kHz to 10 GHz

# -- runs -----------------------------------------------------------------------------------------
MAX_SEED = 2**31 - 1  # seeds; a worker's sampler seed (seed + worker) stays below numpy's 2³²
MAX_SAMPLES = 1_000_000  # census draws (about 5 s on the workstation space)
MAX_TRIALS = 1_000_000  # candidates a search trains
MAX_WORKERS = 64  # worker processes on one machine
MAX_MINUTES = 10_080  # one week: --minutes and --candidate-minutes
MAX_EPOCHS = 1000  # proxy-training and export epochs
MAX_BATCH = 65_536  # training and evaluation batch sizes
MAX_TRIAL = 2**31 - 1  # a trial number (export --trial)
MAX_CONFIRM_SEEDS = 20  # full-schedule trainings per confirmed candidate (--confirm)
MAX_CONFIRM_CANDIDATES = 100  # candidates confirmed from near the fronts, and drawn at random, each
MAX_NAME = 80  # characters of a space's name
MAX_DESCRIPTION = 2000  # characters of a space's description

# -- files read (see searcher/files.py) ----------------------------------------------------------
MAX_SPACE_FILE_BYTES = 2**20  # a space file: a few kB in practice
MAX_ARCH_FILE_BYTES = 2**20  # an architecture JSON file (`searcher cost FILE.json`): a few kB in practice
MAX_CLASS_NAME = 255  # characters of a class name: the longest folder name most file systems allow


def available_memory() -> int:
    """Bytes of memory this machine can give now (Linux's MemAvailable; all of it elsewhere)."""
    try:
        with open("/proc/meminfo") as handle:
            info = {line.split(":")[0]: int(line.split()[1]) * 1024 for line in handle}
        return info.get("MemAvailable", info["MemTotal"])
    except (OSError, KeyError, ValueError, IndexError):
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
