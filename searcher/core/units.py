"""Human sizes in and out: `250k` parameters, `5M` MACs, `64KiB` of RAM.

Counts take SI suffixes (k = 1,000, M = 1,000,000, G = 10^9). Byte sizes take
SI (kB, MB, GB) and binary (KiB, MiB, GiB) units; a bare number is bytes.
"""

from __future__ import annotations

import math
import re

from searcher.errors import SearcherError, shown
from searcher.limits import MAX_CAP, MAX_LATENCY_MS

_COUNT = {"": 1, "k": 10**3, "K": 10**3, "M": 10**6, "G": 10**9}
_BYTES = {
    "": 1, "B": 1,
    "kB": 10**3, "KB": 10**3, "MB": 10**6, "GB": 10**9,
    "KiB": 2**10, "MiB": 2**20, "GiB": 2**30,
}
_PATTERN = re.compile(r"^\s*([0-9][0-9_]*(?:\.[0-9]+)?)\s*([A-Za-z]*)\s*$")


def _parse(text: object, table: dict[str, int], what: str, example: str, key: str | None) -> int:
    name = f"`{key or what}`"
    units = ", ".join(u for u in table if u)
    if isinstance(text, bool) or not isinstance(text, (int, float, str)):
        raise SearcherError(f"{name} must be {what} such as {example} (units: {units}), got {shown(text)}", key=key)
    if isinstance(text, int):
        number = value = text
    else:
        match = _PATTERN.match(text) if isinstance(text, str) and len(text) <= 40 else None
        if isinstance(text, float):
            number = text
            unit = ""
        elif not match or match.group(2) not in table:
            raise SearcherError(f"{name} must be {what} such as {example} (units: {units}), got {shown(text)}",
                                key=key)
        else:
            number, unit = float(match.group(1).replace("_", "")), match.group(2)
        if not math.isfinite(number * table[unit]):
            why = "not a number" if math.isnan(number) else "infinite"
            raise SearcherError(f"{name} must be {what} from 1 to 10^15 such as {example}, got {shown(text)} ({why})",
                                key=key)
        value = round(number * table[unit])
    if value < 1:
        why = "rounds to 0" if number > 0 else "is not positive"
        raise SearcherError(f"{name} {shown(text)} {why}; a cap must be at least 1", key=key)
    if value > MAX_CAP:
        raise SearcherError(f"{name} {shown(text)} is beyond the largest cap there is, 10^15", key=key)
    return value


def parse_count(text: object, key: str | None = None) -> int:
    """Parse a count such as `250k`, `5M` or `20000`.

    >>> parse_count("2.5k")
    2500
    """
    return _parse(text, _COUNT, "a count", "250k or 5M", key)


def parse_bytes(text: object, key: str | None = None) -> int:
    """Parse a byte size such as `64KiB`, `1MB` or `2048`.

    >>> parse_bytes("64KiB")
    65536
    """
    return _parse(text, _BYTES, "a byte size", "64KiB or 1MB", key)


_TIME_MS = {"us": 1e-3, "µs": 1e-3, "ms": 1.0, "s": 1e3}
_TIME = re.compile(r"^\s*([0-9][0-9_]*(?:\.[0-9]+)?)\s*(us|µs|ms|s)\s*$")


def parse_duration(text: object, key: str | None = None) -> float:
    """A time per inference such as `20ms`, `0.5s` or `800us`, in milliseconds (above 0, at most a day).

    >>> parse_duration("20ms"), parse_duration("0.5s"), parse_duration("800us")
    (20.0, 500.0, 0.8)
    """
    name = f"`{key or 'a time'}`"
    match = _TIME.match(text) if isinstance(text, str) and len(text) <= 40 else None
    if match is None:
        raise SearcherError(f"{name} must be a time such as 20ms or 0.5s (units: us, µs, ms, s), got {shown(text)}",
                            key=key)
    value = float(match.group(1).replace("_", "")) * _TIME_MS[match.group(2)]
    if not 0 < value <= MAX_LATENCY_MS:
        why = "is not above 0" if value <= 0 else "is longer than a day"
        raise SearcherError(f"{name} {shown(text)} {why}; a cap on time per inference must be above 0 and at most "
                            "a day (86400s)", key=key)
    return value


def format_duration(ms: float) -> str:
    """Short human form of a time in milliseconds: 12.345 -> '12.3 ms', 0.85 -> '850 us'."""
    if abs(ms) >= 1000:
        return f"{_mantissa(ms / 1000)} s"
    if abs(ms) >= 1 or ms == 0:
        return f"{_mantissa(ms)} ms"
    return f"{_mantissa(ms * 1000)} us"


def _mantissa(v: float) -> str:
    """Three significant digits, never in exponent form (which the parsers do not read)."""
    text = f"{v:.3g}"
    return f"{v:.0f}" if "e" in text else text


def format_count(n: float) -> str:
    """Short human form of a count: 61706 -> '61.7k'."""
    for size, suffix in ((10**9, "G"), (10**6, "M"), (10**3, "k")):
        if abs(n) >= size:
            return f"{_mantissa(n / size)}{suffix}"
    return f"{n:g}"


def format_bytes(n: float) -> str:
    """Short human form of a byte size in binary units: 65536 -> '64 KiB'."""
    for size, suffix in ((2**30, "GiB"), (2**20, "MiB"), (2**10, "KiB")):
        if abs(n) >= size:
            return f"{_mantissa(n / size)} {suffix}"
    return f"{n:g} B"
