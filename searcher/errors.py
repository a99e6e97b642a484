"""One error type for user mistakes; the CLI turns it into a message and exit status 2.

Also the few helpers every check uses, so that all messages read alike: ``shown`` (a value cut to
a readable length), ``spelled`` (a key as the user wrote it: ``--max-params`` on the command line,
``budget.max_params`` in a file) and ``check_int`` / ``check_number`` (one template for bounds).
"""

from __future__ import annotations

import difflib
import math
import re
import reprlib

SHOWN = 60  # characters of a value a message shows
_LONGEST_RUN = 120  # characters without a space before a message cuts them
_LONGEST_MESSAGE = 1200  # characters of a whole message


class _Short(reprlib.Repr):
    """reprlib's cut-down repr, safe for integers too long for ``repr`` (Python refuses > 4300 digits)."""

    def __init__(self) -> None:
        super().__init__()
        self.maxstring = self.maxother = self.maxlong = SHOWN
        self.maxlist = self.maxtuple = self.maxset = 8
        self.maxdict, self.maxlevel = 4, 3

    def repr_int(self, x: int, level: int) -> str:
        if x.bit_length() > 200:
            return f"<a {x.bit_length():,}-bit integer>"
        return super().repr_int(x, level)


_SHORT = _Short()


def shown(value: object) -> str:
    """``repr(value)`` cut to a readable length, saying how long a long text was.

    >>> shown("x" * 100_000)
    "'xxxxxxxxxxxxxxxxxxxxxxxxxx...xxxxxxxxxxxxxxxxxxxxxxxxxxxx' (100,000 characters)"
    >>> shown(2**70)
    '1180591620717411303424'
    """
    text = _SHORT.repr(value)
    if isinstance(value, str) and len(value) > SHOWN:
        text += f" ({len(value):,} characters)"
    elif isinstance(value, (list, tuple)) and len(value) > 8:
        text += f" ({len(value):,} items)"
    return text


def readable(message: str) -> str:
    """A message fit for one line: no line breaks, no run of characters too long to read.

    Values should reach messages through :func:`shown`; this catches the ones that did not.
    """
    message = " ".join(message.splitlines())

    def cut(found: re.Match) -> str:
        run = found.group(0)
        return f"{run[:SHOWN]}…({len(run):,} characters)"

    message = re.sub(rf"\S{{{_LONGEST_RUN + 1},}}", cut, message)
    if len(message) > _LONGEST_MESSAGE:
        message = f"{message[:_LONGEST_MESSAGE - 300]} … {message[-280:]}"
    return message


class SearcherError(ValueError):
    """A mistake in the user's input: a space file, a budget, a data set, an option.

    ``file`` and ``key`` say where the mistake is, so the message can point at it.
    Real bugs raise other exceptions and keep their tracebacks.
    """

    def __init__(self, message: str, *, file: str | None = None, key: str | None = None) -> None:
        self.message = message
        self.file = None if file is None else str(file)
        self.key = key
        super().__init__(str(self))

    def __str__(self) -> str:
        return readable(f"{self.message} ({self.file})" if self.file else self.message)


def closest(word: str, options: list[str] | tuple[str, ...]) -> str | None:
    """The option nearest to a misspelt word, for 'did you mean' hints."""
    if len(word) > 200:
        return None
    found = difflib.get_close_matches(word, list(options), n=1, cutoff=0.5)
    return found[0] if found else None


def one_of(value: object, options: list[str] | tuple[str, ...]) -> str:
    """Text listing valid options, with the closest one suggested."""
    listed = ", ".join(repr(o) for o in options)
    hint = closest(str(value), options) if isinstance(value, str) else None
    return f"one of {listed}" + (f" (did you mean {hint!r}?)" if hint else "")


def spelled(prefix: str, key: str) -> str:
    """A key as the user wrote it: ``--max-params`` for a flag (prefix "--"), ``budget.max_params`` in a file."""
    return prefix + key.replace("_", "-") if prefix.startswith("-") else prefix + key


def is_int(value: object) -> bool:
    """A whole number, and not a bool (which Python counts as an int)."""
    return isinstance(value, int) and not isinstance(value, bool)


def check_int(value: object, key: str, low: int, high: int, *, why: str = "", file: str | None = None) -> int:
    """``value`` when it is a whole number in [low, high]; else an error naming ``key``.

    ``why`` says what the ceiling protects, e.g. "the census draws that many candidates".

    >>> check_int(0, "--samples", 1, 10**6)
    Traceback (most recent call last):
    ...
    searcher.errors.SearcherError: `--samples` must be a whole number from 1 to 1,000,000, got 0
    """
    if not is_int(value) or not low <= value <= high:
        rule = f"a whole number from {low:,} to {high:,}"
        if is_int(value) and value > high and why:
            rule += f" ({why})"
        raise SearcherError(f"`{key}` must be {rule}, got {shown(value)}", file=file, key=key)
    return value


def check_number(value: object, key: str, low: float, high: float, *, low_open: bool = False,
                 high_open: bool = False, file: str | None = None) -> float:
    """``value`` as a float when it is a finite number in the interval; else an error naming ``key``."""
    inside = (isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
              and (low < value if low_open else low <= value) and (value < high if high_open else value <= high))
    if not inside:
        interval = f"{'(' if low_open else '['}{low:g}, {high:g}{')' if high_open else ']'}"
        raise SearcherError(f"`{key}` must be a number in {interval}, got {shown(value)}", file=file, key=key)
    return float(value)
