"""Reading a space file: every key checked once, errors naming the file and the key path."""

from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path
from typing import Any, Callable

from searcher.core.arch import ACTIVATIONS, FEATURES, PADDINGS
from searcher.core.budget import Budget
from searcher.core.latency import target_from_table
from searcher.core.plan import padding_of, window_output
from searcher.core.space import POOL_CHOICES, SECTIONS, Space
from searcher.core.train_settings import TrainSettings
from searcher.errors import SearcherError, check_int, check_number, is_int, one_of, shown
from searcher.files import read_regular
from searcher.limits import (CHANNELS, MAX_CHOICES, MAX_CLASSES, MAX_CONVS, MAX_DESCRIPTION, MAX_HIDDEN, MAX_KERNEL,
                             MAX_NAME, MAX_SIDE, MAX_SPACE_FILE_BYTES, MAX_STAGES, MAX_WIDTH)

MAX_GROWTH = 16.0  # width factor from stage to stage
MAX_NESTING = 2  # lists within lists a space file needs at most (stages.convs: a list of [min, max] ranges)
_SHIPPED = Path(__file__).parent.parent / "spaces"  # links to the repository's spaces/ (a wheel holds copies)


class _Reader:
    """Typed getters over one parsed file; each raises with file and key path."""

    def __init__(self, data: dict, file: str) -> None:
        self.data, self.file = data, file

    def fail(self, key: str, why: str) -> SearcherError:
        return SearcherError(f"`{key}` {why}", file=self.file, key=key)

    def get(self, key: str, default: Any = None) -> Any:
        section, _, name = key.partition(".")
        return self.data.get(section, {}).get(name, default) if name else self.data.get(section, default)

    def whole(self, key: str, default: int | None, low: int, high: int) -> int | None:
        """A single whole number in [low, high] (None stays None: the key is optional)."""
        value = self.get(key, default)
        return None if value is None else check_int(value, key, low, high, file=self.file)

    def choices(self, key: str, default: Any, test: Callable[[Any], bool], rule: str) -> tuple:
        """One value or a list of choices, each passing ``test``; duplicates dropped, order kept."""
        value = self.get(key, default)
        values = list(value) if isinstance(value, (list, tuple)) else [value]
        if not values:
            raise self.fail(key, f"must list at least one choice ({rule}), got []")
        if len(values) > MAX_CHOICES:
            raise self.fail(key, f"lists {len(values):,} choices; at most {MAX_CHOICES} are allowed")
        for v in values:
            if not test(v):
                raise self.fail(key, f"must be {rule} or a list of such choices, got {shown(v)}"
                                     + (f" in {shown(value)}" if value is not v else ""))
        return tuple(dict.fromkeys(values))

    def int_choices(self, key: str, default: tuple, low: int, high: int) -> tuple[int, ...]:
        return self.choices(key, default, lambda v: is_int(v) and low <= v <= high,
                            f"a whole number from {low:,} to {high:,}")

    def word_choices(self, key: str, default: Any, valid: tuple) -> tuple:
        value = self.get(key, default)
        for v in value if isinstance(value, list) else [value]:
            if not isinstance(v, str) or v not in valid:
                raise self.fail(key, f"has {shown(v)}; each choice must be {one_of(v, tuple(map(str, valid)))}")
        return self.choices(key, default, lambda v: v in valid, one_of("", valid))

    def range_(self, key: str, value: Any, low: int, high: int) -> tuple[int, int]:
        pair = [value, value] if is_int(value) else value
        if not (isinstance(pair, list) and len(pair) == 2 and all(map(is_int, pair))):
            raise self.fail(key, f"must be a whole number or a range [min, max], got {shown(value)}")
        lo, hi = pair
        if lo > hi:
            raise self.fail(key, f"must be a range [min, max] with min ≤ max, got {shown(value)}")
        if lo < low or hi > high:
            raise self.fail(key, f"must stay within {low} to {high}, got {shown(value)}")
        return lo, hi

    def text(self, key: str, default: str, longest: int, printable: bool) -> str:
        value = self.get(key, default)
        if not isinstance(value, str) or (key == "name" and not value):
            raise self.fail(key, f"must be a text in quotes, got {shown(value)}")
        if len(value) > longest:
            raise self.fail(key, f"must be at most {longest:,} characters long, got {len(value):,}")
        if printable and not value.isprintable():
            raise self.fail(key, f"must be printable text on one line, got {shown(value)}")
        return value


def read_space(path: Path) -> Space:
    try:
        if not path.exists():
            raise SearcherError(f"space file not found: {shown(str(path))}", file=None)
        data = read_regular(path, MAX_SPACE_FILE_BYTES, "space file")
        text = data.decode("utf-8-sig")  # a byte-order mark some editors write is not part of the TOML
    except UnicodeDecodeError as exc:
        raise SearcherError(f"space file cannot be read as UTF-8 text ({exc.reason} at byte {exc.start})",
                            file=str(path)) from None
    except OSError as exc:
        raise SearcherError(f"space file {shown(str(path))} cannot be read: {exc.strerror or exc}", file=None) from None
    return read_space_text(text, str(path), default_name=path.stem[:MAX_NAME])


def read_space_text(text: str, file: str, default_name: str = "space") -> Space:
    """Parse and check a space from its TOML text; ``file`` names it in messages."""
    try:
        data = tomllib.loads(text.removeprefix("\ufeff"))
    except tomllib.TOMLDecodeError as exc:
        raise SearcherError(f"space file is not valid TOML: {_toml_problem(exc, text)}", file=file) from None
    except RecursionError:  # tomllib reads nested lists and tables by recursion
        key = _deepest_key(text)
        raise SearcherError(f"{f'`{key}`' if key else 'a value'} nests lists or tables within one another hundreds "
                            f"deep; no key takes lists nested more than {MAX_NESTING} deep (`input.sizes`: a list of "
                            "[height, width] pairs)", file=file, key=key) from None
    r = _Reader(data, file)
    _check_keys(r)

    if r.get("input.sizes") is not None and r.get("input.size") is not None:
        raise r.fail("input.sizes", "and `input.size` are both set; give one: `input.size` for one [height, width], "
                                    "`input.sizes` for a list of choices")
    sizes_key = "input.sizes" if r.get("input.sizes") is not None else "input.size"
    sizes = r.get("input.sizes")
    if sizes is None:
        sizes = [r.get("input.size", [32, 32])]
    if not isinstance(sizes, list) or not sizes or len(sizes) > MAX_CHOICES:
        raise r.fail(sizes_key, f"must list 1 to {MAX_CHOICES} [height, width] pairs, got {shown(sizes)}")
    resolutions = []
    for pair in sizes:
        if is_int(pair):
            pair = [pair, pair]
        if not (isinstance(pair, list) and len(pair) == 2 and all(is_int(v) and 1 <= v <= MAX_SIDE for v in pair)):
            raise r.fail(sizes_key, f"must be [height, width] with whole numbers from 1 to {MAX_SIDE:,}, got {shown(pair)}")
        resolutions.append(tuple(pair))

    stage_count = r.range_("stages.count", r.get("stages.count", [2, 3]), 1, MAX_STAGES)
    convs_raw = r.get("stages.convs", [1, 2])
    if isinstance(convs_raw, list) and convs_raw and all(isinstance(v, list) for v in convs_raw):
        if len(convs_raw) > MAX_STAGES:
            raise r.fail("stages.convs", f"lists {len(convs_raw):,} stages; there are at most {MAX_STAGES}")
        convs = tuple(r.range_(f"stages.convs[{i}]", v, 1, MAX_CONVS) for i, v in enumerate(convs_raw))
        if len(convs) < stage_count[1]:
            raise r.fail("stages.convs", f"lists {len(convs)} stages but `stages.count` allows up to {stage_count[1]}")
    else:
        convs = (r.range_("stages.convs", convs_raw, 1, MAX_CONVS),)

    growth = check_number(r.get("stages.growth", 2.0), "stages.growth", 0, MAX_GROWTH, low_open=True, file=file)
    kernels = r.int_choices("conv.kernel", (3,), 1, MAX_KERNEL)
    padding = r.word_choices("conv.padding", "same", PADDINGS)
    if len(padding) != 1:
        raise r.fail("conv.padding", f"must be one value, 'same' or 'valid', got {shown(list(padding))}")
    padding = padding[0]
    if padding == "same" and any(k % 2 == 0 for k in kernels):
        raise r.fail("conv.kernel", f"with padding 'same' needs odd kernels, got {shown(list(kernels))}")
    window = r.whole("pool.window", 2, 1, MAX_SIDE)
    dropouts = r.choices("head.dropout", [0.0], lambda d: _number_in(d, 0, 1), "a number in [0, 1)")
    batch_norm = r.choices("conv.batch_norm", [True], lambda b: isinstance(b, bool), "true or false")
    hidden_count = r.range_("head.hidden", r.get("head.hidden", [0, 1]), 0, MAX_HIDDEN)
    hidden_widths = r.int_choices("head.hidden_width", (32,), 1, MAX_WIDTH)  # checked even where unused
    train = r.get("train", {})
    TrainSettings.from_dict(train, file=file)  # checked now, used later

    space = Space(
        name=r.text("name", default_name, MAX_NAME, printable=True),
        resolutions=tuple(dict.fromkeys(resolutions)),
        channels=_channels(r),
        classes=r.whole("input.classes", 10, 2, MAX_CLASSES),
        stage_count=stage_count,
        convs=convs,
        first_width=r.int_choices("stages.first_width", (8, 16), 1, MAX_WIDTH),
        growth=growth,
        max_width=r.whole("stages.max_width", None, 1, MAX_WIDTH),
        round_to=r.whole("stages.round_to", 1, 1, MAX_WIDTH),
        kernels=kernels,
        padding=padding,
        stride=r.whole("conv.stride", 1, 1, MAX_SIDE),
        activations=r.word_choices("conv.activation", ["relu"], ACTIVATIONS),
        batch_norm=batch_norm,
        pools=r.word_choices("pool.kind", ["max"], POOL_CHOICES),
        pool_window=window,
        pool_stride=r.whole("pool.stride", window, 1, MAX_SIDE),
        features=r.word_choices("head.features", ["gap"], FEATURES),
        hidden_count=hidden_count,
        hidden_widths=hidden_widths if hidden_count[1] else (32,),
        dropouts=tuple(dict.fromkeys(float(d) for d in dropouts)),
        budget=_budget(r),
        train=dict(train),
        file=file,
    )
    r.text("description", "", MAX_DESCRIPTION, printable=False)
    _check_rounding(space)
    _check_shrink(space)
    _check_widths(space)
    return space


_TABLE_LINE = re.compile(r"^\s*\[\s*([^\[\]]+?)\s*\]\s*(#.*)?$")
_KEY_LINE = re.compile(r"^\s*((?:[A-Za-z0-9_-]+|\"[^\"]*\"|'[^']*')(?:\s*\.\s*(?:[A-Za-z0-9_-]+|\"[^\"]*\"|'[^']*'))*)\s*=")


def _deepest_key(text: str) -> str | None:
    """The key whose line opens the most brackets: what a parse too deep for tomllib was reading."""
    table, found, most = "", None, 0
    for line in text.splitlines():
        if heading := _TABLE_LINE.match(line):
            table = heading.group(1).strip()
        elif key := _KEY_LINE.match(line):
            run = line.count("[", key.end()) + line.count("{", key.end())
            if run > most:
                name = ".".join(p.strip().strip("'\"") for p in key.group(1).split("."))
                found, most = f"{table}.{name}" if table else name, run
    return found


def _toml_problem(exc: tomllib.TOMLDecodeError, text: str) -> str:
    """tomllib's complaint, with the key named when it is one written twice.

    tomllib says "Cannot overwrite a value (at line 36, column 30)" (or "at end of document"), which
    leaves the user to find the key; a scan of the assignments finds the first one set twice.
    """
    said = str(exc)
    if "Cannot overwrite a value" not in said:
        declared = re.match(r"Cannot declare \((.*?),?\) twice", said)
        if declared:
            table = ".".join(part.strip().strip("'\"") for part in declared.group(1).split(","))
            return f"the table [{table}] is declared twice; put all its keys under one [{table}]"
        return said
    table, seen = "", {}
    for number, line in enumerate(text.splitlines(), 1):
        if found := _TABLE_LINE.match(line):
            table = found.group(1).strip()
            continue
        if found := _KEY_LINE.match(line):
            parts = [p.strip().strip("'\"") for p in re.split(r"\s*\.\s*(?=(?:[^\"']|\"[^\"]*\"|'[^']*')*$)",
                                                                   found.group(1))]
            key = ".".join([table, *parts] if table else parts)
            if key in seen:
                return f"`{key}` is set twice (lines {seen[key]} and {number}); keep one"
            seen[key] = number
    return said + " (a key is set twice)"


def _number_in(value: Any, low: float, high: float) -> bool:
    """A finite number in [low, high) (bools are not numbers here)."""
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value) and low <= value < high


def _budget(r: _Reader) -> Budget:
    """[budget], judged on the [target] when the file has one; a time cap needs it."""
    budget = Budget.from_table(r.get("budget", {}), file=r.file)
    if r.get("target") is not None:
        budget = budget.targeted(target_from_table(r.get("target"), r.file))
    return budget.check_target("budget.max_latency", r.file)


def _channels(r: _Reader) -> int:
    """Input channels: what images convert to (gray, RGB, RGBA)."""
    value = r.get("input.channels", 1)
    if not is_int(value) or value not in CHANNELS:
        raise r.fail("input.channels", f"must be 1 (gray), 3 (RGB) or 4 (RGBA), got {shown(value)}")
    return value


def _check_rounding(space: Space) -> None:
    """A width ceiling that rounding keeps: ``max_width`` a multiple of ``round_to``.

    Widths are capped first and rounded after, so a cap that is no multiple would be rounded past
    (max_width 32 with round_to 64 made every stage 64 wide).
    """
    cap, step = space.max_width, space.round_to
    if cap is None or cap % step == 0:
        return
    below = cap // step * step
    fix = (f"a `stages.max_width` of {below} or {below + step}" if below else
           f"a `stages.round_to` that divides {cap} (such as {cap})")
    raise SearcherError(f"`stages.round_to` {step} does not divide `stages.max_width` {cap}: widths are capped at "
                        f"{cap} and then rounded to a multiple of {step}, so a stage could pass the cap; use {fix}",
                        file=space.file, key="stages.round_to")


def _check_widths(space: Space) -> None:
    """Every stage width within the ceiling, and no two first widths giving the same network.

    Two first widths that round to the same stage widths would count one network twice.
    """
    seen: dict[tuple[int, ...], int] = {}
    for first in space.first_width:
        widths = tuple(space.stage_width(i, first) for i in range(space.stage_count[1]))
        if max(widths) > MAX_WIDTH:
            stage = widths.index(max(widths)) + 1
            key = "stages.growth" if space.growth > 1 else "stages.round_to"
            raise SearcherError(
                f"stage {stage} would be {max(widths):,} channels wide (first width {first}, growth {space.growth:g}, "
                f"rounded to a multiple of {space.round_to}); widths stop at {MAX_WIDTH:,}: set `stages.max_width` "
                f"or lower `{key}`", file=space.file, key=key)
        if widths in seen:
            raise SearcherError(
                f"`stages.first_width` choices {seen[widths]} and {first} give the same stage widths "
                f"{list(widths)} after rounding to a multiple of {space.round_to}; keep one of them",
                file=space.file, key="stages.first_width")
        seen[widths] = first


def _check_keys(r: _Reader) -> None:
    for section, value in r.data.items():
        if section not in SECTIONS:
            raise r.fail(section, f"is not a known section or key; use {one_of(section, tuple(SECTIONS))}")
        keys = SECTIONS[section]
        if keys is None and section not in ("budget", "train"):
            continue  # name, description: read as text
        if not isinstance(value, dict):
            raise r.fail(section, f"must be a table [{section}], got {shown(value)}")
        for key in value if keys is not None else ():
            if key not in keys:
                raise r.fail(f"{section}.{key}", f"is not a known key; use {one_of(key, keys)}")


def _check_shrink(space: Space) -> None:
    """Refuse a space in which some choices shrink the feature map below 1x1.

    Every conv and pool shrinks monotonically in its kernel, count and window, so the worst
    case (smallest input, most convs, largest kernel, pooling wherever it may be chosen) decides.
    """
    smallest = (min(r[0] for r in space.resolutions), min(r[1] for r in space.resolutions))
    h, w = smallest
    kernel = max(space.kernels)
    pad = padding_of(kernel, space.padding)
    pools = any(p != "none" for p in space.pools)
    for i in range(space.stage_count[1]):
        n = space.stage_convs(i)[1]
        start = (h, w)
        for _ in range(n):
            h, w = (window_output(v, kernel, space.stride, pad) for v in (h, w))
        convs_end = (h, w)
        if pools and min(h, w) >= 1:
            h, w = (window_output(v, space.pool_window, space.pool_stride, 0) for v in (h, w))
        if min(h, w) >= 1:
            continue
        convs = f"{n} {space.padding} {kernel}x{kernel} conv(s) at stride {space.stride}"
        if i:  # the stages before fit: fewer stages is the plain fix
            what = convs + (f" and {space.pool_window}x{space.pool_window} pooling" if pools else "")
            raise SearcherError(
                f"stage {i + 1} with {what} shrinks a {start[0]}x{start[1]} map below 1x1 "
                f"(smallest input {smallest[0]}x{smallest[1]}); lower `stages.count` to at most {i}, "
                f"or use smaller kernels, 'same' padding or 'none' pooling", file=space.file, key="stages.count")
        if min(convs_end) < 1:
            raise SearcherError(
                f"the first stage's {convs} shrink the smallest input {smallest[0]}x{smallest[1]} below 1x1; "
                f"use smaller `conv.kernel` choices, fewer `stages.convs`, 'same' padding or larger inputs",
                file=space.file, key="conv.kernel")
        key = "conv.stride" if space.stride > 1 and min(start) >= space.pool_window else "pool.window"
        raise SearcherError(
            f"the first stage's {convs} take the smallest input {smallest[0]}x{smallest[1]} to "
            f"{convs_end[0]}x{convs_end[1]}, smaller than the {space.pool_window}x{space.pool_window} pooling "
            f"window; use a `pool.window` of at most {min(convs_end)}"
            + (", a smaller `conv.stride`" if space.stride > 1 else "") + ", or 'none' in `pool.kind`",
            file=space.file, key=key)


def shipped_spaces() -> list[str]:
    """Names of the spaces shipped with the package: ``classic``, ``mcu``, ``workstation``."""
    return sorted(p.stem for p in _SHIPPED.glob("*.toml"))


def builtin_space(name: str) -> Path:
    """Path of a space shipped with the package (``mcu``, ``workstation``, ``classic``).

    ``searcher/spaces`` links to the repository's ``spaces/`` folder; a wheel holds copies.
    """
    if name not in shipped_spaces():
        raise SearcherError(f"no built-in space {shown(name)}; use {one_of(name, shipped_spaces())}")
    return _SHIPPED / f"{name}.toml"


def load_space(path: str | Path) -> Space:
    """Read and check a space file; raises :class:`SearcherError` naming the file and key.

    >>> load_space(builtin_space("classic")).padding
    'valid'
    """
    return read_space(Path(path))
