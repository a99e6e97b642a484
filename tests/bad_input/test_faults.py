"""One regression test per item of issue 17 (bad input and faults, second round).

Each asserts what the user now sees: exit status 2, one line that names what they wrote and what
would be valid, nothing written and nothing of theirs replaced. The generated suite
(test_bad_input.py, test_bad_data.py, test_special_files.py) covers the same kinds everywhere they
can enter; these pin the examples the issue names.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest


from checks import here, refused  # noqa: F401  (here is a fixture)
from catalogue import space_text


def census_of(text: str, here: Path, capsys: pytest.CaptureFixture) -> str:
    (here / "bad.toml").write_text(text, encoding="utf-8")
    return refused(["census", "--space", "bad.toml"], capsys)


# -- the space file -------------------------------------------------------------------------------
@pytest.mark.parametrize(("text", "says"), [
    ('name = "a"\nname = "b"\n', "`name` is set twice (lines 1 and 2); keep one"),  # was "Cannot overwrite a value"
    ("[input]\nchannels = 1\nsize = [8, 8]\n\n[stages]\ncount = 1\n\n[input]\nclasses = 3\n",
     "the table [input] is declared twice"),
    ("[input]\nsize = [16, 16]\nsizes = [[12, 12]]\n", "`input.sizes` and `input.size` are both set; give one"),
    ('[head]\nhidden = [0, 0]\nhidden_width = "abc"\n', "`head.hidden_width` must be a whole number"),  # was ignored
    ("[stages]\nround_to = 64\nmax_width = 32\n", "`stages.round_to` 64 does not divide `stages.max_width` 32"),
    ("[stages]\ncount = -3\n", "`stages.count` must stay within 1 to 10, got -3 "),  # was "got [-3, -3]"
    ("[budget]\nmax_params = nan\n", "`budget.max_params` must be a count from 1 to 10^15 such as 250k or 5M, got nan "
                                     "(not a number)"),
    ("a = " + "[" * 5000 + "]" * 5000 + "\n", "nests lists or tables within one another hundreds deep"),  # RecursionError
])
def test_space_file_mistakes_are_named(here, capsys, text, says):
    line = census_of(text, here, capsys)
    assert says in line and "bad.toml" in line
    assert not (here / "runs").exists()


def test_round_to_above_max_width_made_every_stage_wider_than_the_cap(here, capsys):
    """Rounding after the cap gave 64-wide stages under max_width 32; a divisor is still accepted."""
    assert "use a `stages.round_to` that divides 32" in census_of("[stages]\nround_to = 64\nmax_width = 32\n", here,
                                                                   capsys)
    assert "use a `stages.max_width` of 32 or 40" in census_of("[stages]\nround_to = 8\nmax_width = 36\n", here, capsys)


def test_an_empty_space_option_is_not_called_a_folder(here, capsys):
    line = refused(["census", "--space", ""], capsys)
    assert "`--space` '' is empty" in line and "is a folder" not in line and "mcu" in line


@pytest.mark.parametrize("special", ["fifo", "/dev/zero", "/dev/urandom", "big"])
def test_a_space_file_that_is_no_regular_file_is_refused_at_once(here, capsys, special):
    """A FIFO waited for ever; /dev/zero and /dev/urandom ended in a MemoryError after half a minute."""
    if special == "fifo":
        os.mkfifo(here / "fifo.toml")
        special, kind = "fifo.toml", "is a named pipe (FIFO), not a regular file"
    elif special == "big":
        (here / "big.toml").write_bytes(b"#" * (2**20 + 1))
        special, kind = "big.toml", "holds more than 1 MiB, the most searcher reads of a space file"
    else:
        kind = "is a character device, not a regular file"
    line = refused(["census", "--space", special], capsys)
    assert f"space file '{special}' {kind}" in line
