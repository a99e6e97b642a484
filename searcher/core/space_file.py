"""Reading a space file: every key checked once, errors naming the file and the key path."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

from searcher.core.arch import ACTIVATIONS, FEATURES, PADDINGS
from searcher.core.budget import Budget
from searcher.core.cost import conv_output_size
from searcher.errors import SearcherError, one_of
from searcher.core.space import POOL_CHOICES, SECTIONS, Space
from searcher.core.train_settings import TrainSettings


class _Reader:
    """Typed getters over one parsed file; each raises with file and key path."""

    def __init__(self, data: dict, file: str) -> None:
        self.data, self.file = data, file

    def fail(self, key: str, why: str) -> SearcherError:
        return SearcherError(f"`{key}` {why}", file=self.file, key=key)

    def get(self, key: str, default: Any = None) -> Any:
        section, _, name = key.partition(".")
        return self.data.get(section, {}).get(name, default) if name else self.data.get(section, default)

    def positive_int(self, key: str, default: int | None) -> int | None:
        value = self.get(key, default)
        if value is None:
            return None
        if not isinstance(value, int) or isinstance(value, bool) or value < 1:
            raise self.fail(key, f"must be a positive integer, got {value!r}")
        return value

    def int_choices(self, key: str, default: tuple, minimum: int = 1) -> tuple[int, ...]:
        value = self.get(key, default)
        values = list(value) if isinstance(value, (list, tuple)) else [value]
        if not values:
            raise self.fail(key, "must list at least one choice, got []")
        for v in values:
            if not isinstance(v, int) or isinstance(v, bool) or v < minimum:
                raise self.fail(key, f"must hold integers ≥ {minimum}, got {v!r} in {value!r}")
        return tuple(dict.fromkeys(values))

    def range_(self, key: str, value: Any, minimum: int) -> tuple[int, int]:
        if isinstance(value, int) and not isinstance(value, bool):
            value = [value, value]
        if not (isinstance(value, list) and len(value) == 2 and all(isinstance(v, int) and not isinstance(v, bool) for v in value)):
            raise self.fail(key, f"must be an integer or a range [min, max], got {value!r}")
        lo, hi = value
        if lo > hi:
            raise self.fail(key, f"must be a range [min, max] with min ≤ max, got {value!r}")
        if lo < minimum:
            raise self.fail(key, f"must not go below {minimum}, got {value!r}")
        return lo, hi

    def word_choices(self, key: str, default: tuple, valid: tuple) -> tuple:
        value = self.get(key, default)
        values = list(value) if isinstance(value, list) else [value]
        if not values:
            raise self.fail(key, f"must list at least one choice of {', '.join(map(repr, valid))}, got []")
        for v in values:
            if v not in valid:
                raise self.fail(key, f"has {v!r}; each choice must be {one_of(str(v), tuple(map(str, valid)))}")
        return tuple(dict.fromkeys(values))


def read_space(path: Path) -> Space:
    if not path.exists():
        raise SearcherError(f"space file not found: {path}", file=None)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise SearcherError(f"space file cannot be read as UTF-8 text: {exc}", file=str(path)) from None
    return read_space_text(text, str(path), default_name=path.stem)


def read_space_text(text: str, file: str, default_name: str = "space") -> Space:
    """Parse and check a space from its TOML text; ``file`` names it in messages."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SearcherError(f"space file is not valid TOML: {exc}", file=file) from None
    r = _Reader(data, file)
    _check_keys(r)

    sizes = r.get("input.sizes")
    if sizes is None:
        sizes = [r.get("input.size", [32, 32])]
    if not isinstance(sizes, list) or not sizes:
        raise r.fail("input.sizes", f"must list [height, width] pairs, got {sizes!r}")
    resolutions = []
    for pair in sizes:
        key = "input.sizes" if r.get("input.sizes") is not None else "input.size"
        if isinstance(pair, int) and not isinstance(pair, bool):
            pair = [pair, pair]
        if not (isinstance(pair, list) and len(pair) == 2 and all(isinstance(v, int) and not isinstance(v, bool) and v >= 1 for v in pair)):
            raise r.fail(key, f"must be [height, width] with positive integers, got {pair!r}")
        resolutions.append(tuple(pair))

    stage_count = r.range_("stages.count", r.get("stages.count", [2, 3]), 1)
    convs_raw = r.get("stages.convs", [1, 2])
    if isinstance(convs_raw, list) and convs_raw and all(isinstance(v, list) for v in convs_raw):
        convs = tuple(r.range_(f"stages.convs[{i}]", v, 1) for i, v in enumerate(convs_raw))
        if len(convs) < stage_count[1]:
            raise r.fail("stages.convs", f"lists {len(convs)} stages but `stages.count` allows up to {stage_count[1]}")
    else:
        convs = (r.range_("stages.convs", convs_raw, 1),)

    growth = r.get("stages.growth", 2.0)
    if isinstance(growth, bool) or not isinstance(growth, (int, float)) or growth <= 0:
        raise r.fail("stages.growth", f"must be a number > 0, got {growth!r}")
    kernels = r.int_choices("conv.kernel", (3,))
    padding = r.word_choices("conv.padding", "same", PADDINGS)
    if len(padding) != 1:
        raise r.fail("conv.padding", f"must be one value, 'same' or 'valid', got {padding!r}")
    padding = padding[0]
    if padding == "same" and any(k % 2 == 0 for k in kernels):
        raise r.fail("conv.kernel", f"with padding 'same' needs odd kernels, got {list(kernels)}")
    window = r.positive_int("pool.window", 2)
    dropouts = r.get("head.dropout", [0.0])
    dropouts = dropouts if isinstance(dropouts, list) else [dropouts]
    if not dropouts or any(isinstance(d, bool) or not isinstance(d, (int, float)) or not 0 <= d < 1 for d in dropouts):
        raise r.fail("head.dropout", f"must list numbers in [0, 1), got {r.get('head.dropout')!r}")
    batch_norm = r.get("conv.batch_norm", [True])
    batch_norm = batch_norm if isinstance(batch_norm, list) else [batch_norm]
    if not batch_norm or any(not isinstance(b, bool) for b in batch_norm):
        raise r.fail("conv.batch_norm", f"must be true, false or a list of them, got {r.get('conv.batch_norm')!r}")
    hidden_count = r.range_("head.hidden", r.get("head.hidden", [0, 1]), 0)
    if hidden_count[1] > 2:
        raise r.fail("head.hidden", f"allows at most 2 hidden dense layers, got {list(hidden_count)}")
    train = r.get("train", {})
    TrainSettings.from_dict(train, file=file)  # checked now, used later

    space = Space(
        name=str(r.get("name", default_name)),
        resolutions=tuple(dict.fromkeys(resolutions)),
        channels=r.positive_int("input.channels", 1),
        classes=r.positive_int("input.classes", 10),
        stage_count=stage_count,
        convs=convs,
        first_width=r.int_choices("stages.first_width", (8, 16)),
        growth=float(growth),
        max_width=r.positive_int("stages.max_width", None),
        round_to=r.positive_int("stages.round_to", 1),
        kernels=kernels,
        padding=padding,
        stride=r.positive_int("conv.stride", 1),
        activations=r.word_choices("conv.activation", ["relu"], ACTIVATIONS),
        batch_norm=tuple(dict.fromkeys(batch_norm)),
        pools=r.word_choices("pool.kind", ["max"], POOL_CHOICES),
        pool_window=window,
        pool_stride=r.positive_int("pool.stride", window),
        features=r.word_choices("head.features", ["gap"], FEATURES),
        hidden_count=hidden_count,
        hidden_widths=r.int_choices("head.hidden_width", (32,)) if hidden_count[1] else (32,),
        dropouts=tuple(dict.fromkeys(float(d) for d in dropouts)),
        budget=Budget.from_table(r.get("budget", {}), file=file),
        train=dict(train),
        file=file,
    )
    _check_shrink(space)
    _check_distinct_widths(space)
    return space


def _check_distinct_widths(space: Space) -> None:
    """Two first widths that round to the same stage widths would count one network twice."""
    seen: dict[tuple[int, ...], int] = {}
    for first in space.first_width:
        widths = tuple(space.stage_width(i, first) for i in range(space.stage_count[1]))
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
        if keys is None:
            continue
        if not isinstance(value, dict):
            raise r.fail(section, f"must be a table [{section}], got {value!r}")
        for key in value:
            if key not in keys:
                raise r.fail(f"{section}.{key}", f"is not a known key; use {one_of(key, keys)}")


def _check_shrink(space: Space) -> None:
    """Refuse a space in which some choices shrink the feature map below 1x1.

    Every conv and pool shrinks monotonically in its kernel, count and window, so the worst
    case (smallest input, most convs, largest kernel, pooling wherever it may be chosen) decides.
    """
    h = min(r[0] for r in space.resolutions)
    w = min(r[1] for r in space.resolutions)
    kernel = max(space.kernels)
    pad = kernel // 2 if space.padding == "same" else 0
    pools = any(p != "none" for p in space.pools)
    for i in range(space.stage_count[1]):
        n = space.stage_convs(i)[1]
        start = (h, w)
        for _ in range(n):
            h, w = (conv_output_size(v, kernel, space.stride, pad) for v in (h, w))
        if pools and min(h, w) >= 1:
            h, w = (conv_output_size(v, space.pool_window, space.pool_stride, 0) for v in (h, w))
        if min(h, w) < 1:
            what = f"{n} {space.padding} {kernel}x{kernel} conv(s) at stride {space.stride}"
            if pools:
                what += f" and {space.pool_window}x{space.pool_window} pooling"
            raise SearcherError(
                f"stage {i + 1} with {what} shrinks a {start[0]}x{start[1]} map below 1x1 "
                f"(smallest input {min(r[0] for r in space.resolutions)}x{min(r[1] for r in space.resolutions)}); "
                f"lower `stages.count` to at most {i}, or use smaller kernels, 'same' padding or 'none' pooling",
                file=space.file, key="stages.count",
            )


def builtin_space(name: str) -> Path:
    """Path of a space shipped with the package (``mcu``, ``workstation``, ``classic``).

    ``searcher/spaces`` links to the repository's ``spaces/`` folder; a wheel holds copies.
    """
    here = Path(__file__).parent.parent / "spaces"
    path = here / f"{name}.toml"
    if not path.exists():
        names = sorted(p.stem for p in here.glob("*.toml"))
        raise SearcherError(f"no built-in space {name!r}; use {one_of(name, names)}")
    return path


def load_space(path: str | Path) -> Space:
    """Read and check a space file; raises :class:`SearcherError` naming the file and key.

    >>> load_space(builtin_space("classic")).padding
    'valid'
    """
    return read_space(Path(path))
