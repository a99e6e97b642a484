"""One error type for user mistakes; the CLI turns it into a message and exit status 2."""

from __future__ import annotations

import difflib


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
        return f"{self.message} ({self.file})" if self.file else self.message


def closest(word: str, options: list[str] | tuple[str, ...]) -> str | None:
    """The option nearest to a misspelt word, for 'did you mean' hints."""
    found = difflib.get_close_matches(word, list(options), n=1, cutoff=0.5)
    return found[0] if found else None


def one_of(value: object, options: list[str] | tuple[str, ...]) -> str:
    """Text listing valid options, with the closest one suggested."""
    listed = ", ".join(repr(o) for o in options)
    hint = closest(str(value), options)
    return f"one of {listed}" + (f" (did you mean {hint!r}?)" if hint else "")


def shorten(text: str, most: int = 80) -> str:
    """A value cut to a readable length for a message: its start, '…', and how long it was."""
    text = str(text)
    return text if len(text) <= most else f"{text[: most - 20]}… ({len(text):,} characters)"

