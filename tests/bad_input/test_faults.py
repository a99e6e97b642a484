"""One regression test per item of issue 17 (bad input and faults, second round).

Each asserts what the user now sees: exit status 2, one line that names what they wrote and what
would be valid, nothing written and nothing of theirs replaced. The generated suite
(test_bad_input.py, test_bad_data.py, test_special_files.py) covers the same kinds everywhere they
can enter; these pin the examples the issue names.
"""

from __future__ import annotations

import contextlib
import os
import subprocess
from pathlib import Path

import numpy as np
import pytest

from searcher.cli.main import main

from checks import (ARCH, digits_folder, export_here, here, made, npz_with_header, refused,  # noqa: F401  (fixtures)
                    run_copy)
from catalogue import ARCH_OK


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


# -- data files -------------------------------------------------------------------------------------
IMAGES = np.random.default_rng(0).integers(0, 256, size=(30, 12, 12), dtype=np.uint8)
LABELS = np.arange(30) % 3


def census_data(here: Path, capsys: pytest.CaptureFixture, name: str = "bad.npz") -> str:
    """The error line of `census --data`, which must leave no run folder behind (issue 17: it left an empty one)."""
    line = refused(["census", "--space", "space.toml", "--data", name], capsys)
    assert not (here / "runs").exists(), "a refused census left a folder behind"
    return line


@pytest.mark.parametrize(("arrays", "says"), [
    ({"images": IMAGES.astype(bool)}, "`images` holds bool values; pixels must be numbers: uint8 (0–255)"),
    ({"images": np.zeros((30, 0, 0), np.uint8)}, "`images` has shape (30, 0, 0): images of 0×0 pixels"),
    ({"labels": np.r_[LABELS[:-1].astype(np.uint64), np.uint64(2**64 - 1)]},
     "label 18446744073709551615 at position 29 in `labels` is far too large"),  # was reported as -1
    ({"class_names": np.array([b"a", b"\xff", b"c"])}, "`class_names` holds the name b'\\xff', which is not UTF-8"),
    ({"class_names": np.array(["a", "b" * 300, "c"])}, "a class name may have at most 255"),
])
def test_npz_contents_that_trained_on_black_images_or_were_misread(here, capsys, arrays, says):
    """Bool and N×0×0 images trained on black images; a uint64 label 2⁶⁴−1 was reported as -1."""
    np.savez(here / "bad.npz", **({"images": IMAGES, "labels": LABELS} | arrays))
    assert says in census_data(here, capsys)


def test_big_endian_16_bit_pixels_are_read_as_16_bit(tmp_path):
    """`>u2` images were refused as out of range; they are scaled like native uint16 (value / 257)."""
    from searcher.data.npz import read_npz

    wide = (IMAGES.astype(np.uint16) * 257).astype(">u2")  # 0..65535, byte order as big-endian machines save it
    np.savez(tmp_path / "be.npz", images=wide, labels=LABELS)
    images, _, _ = read_npz(tmp_path / "be.npz", 1)
    assert np.array_equal(images[:, 0], IMAGES)  # x·257 / 257 = x exactly (the 16-to-8-bit rule in README)


def test_an_npz_header_claiming_233_tib_is_refused_before_numpy_allocates(here, capsys):
    """'Unable to allocate 233 TiB': the shape a header claims is checked against the bytes the file holds."""
    data = npz_with_header({"images": IMAGES, "labels": LABELS}, "images", "(30, 12, 12)", "(1000000000000, 16, 16)")
    (here / "bad.npz").write_bytes(data)
    line = census_data(here, capsys)
    assert "`images` claims shape (1000000000000, 16, 16) of uint8" in line and "the file holds" in line


# -- stores ----------------------------------------------------------------------------------------
def test_a_text_file_given_as_journal_store_is_refused_untouched(here, capsys):
    """It was "repaired": 41 bytes cut, then the whole file replaced by a new store."""
    notes = "shopping: milk, eggs\nremember the dentist on Friday"  # the last line has no line end
    (here / "notes.journal").write_text(notes)
    line = refused(["search", "--space", "space.toml", "--name", "j", "--storage", "notes.journal"], capsys)
    assert "the store notes.journal is not a journal store" in line and "changes nothing in it" in line
    assert (here / "notes.journal").read_text() == notes
    assert sorted(p.name for p in here.iterdir()) == ["notes.journal", "space.toml"]  # no lock file, no run folder


@pytest.mark.parametrize(("content", "says"), [
    (b"just some words\n", "is not a journal store: its first line is not one of Optuna's journal records"),
    (b'{"a":1}\n', "is not a journal store"),  # was "'op_code'"
    (b"", None),  # empty: no run in it yet, said as such
])
def test_status_of_a_journal_that_is_not_one(here, capsys, content, says):
    """Was "Expecting value: line 1 column 1" and "'op_code'"."""
    (here / "x.journal").write_bytes(content)
    line = refused(["status", "--name", "r", "--storage", "x.journal"], capsys)
    assert (says or "no run 'r' in x.journal") in line
    assert (here / "x.journal").read_bytes() == content


def test_a_journal_damaged_in_the_middle_is_named_and_not_cut(tmp_path):
    """Only a torn last append is cut (tests/test_crash.py); damage further in is refused by line."""
    import optuna

    from searcher.errors import SearcherError
    from searcher.study.stores import open_storage

    path = tmp_path / "study.journal"
    study = optuna.create_study(storage=open_storage(str(path)), study_name="s")
    for value in (0.1, 0.2, 0.3):
        study.tell(study.ask(), value)
    data = bytearray(path.read_bytes())
    data[len(data) // 2: len(data) // 2 + 40] = b"x" * 40
    path.write_bytes(bytes(data))
    with pytest.raises(SearcherError, match=r"the journal store .* is damaged at line \d+ .*changes nothing"):
        open_storage(str(path))
    assert path.read_bytes() == bytes(data)


def test_a_sqlite_file_of_another_program_is_not_taken_over(here, capsys):
    """Optuna would have added its tables to the user's own database."""
    import sqlite3

    with sqlite3.connect(here / "mine.db") as connection:
        connection.execute("CREATE TABLE parts (id INTEGER, name TEXT)")
    before = (here / "mine.db").read_bytes()
    line = refused(["search", "--space", "space.toml", "--name", "x", "--storage", "sqlite:///mine.db"], capsys)
    assert "the store mine.db is a SQLite database of another program (tables ['parts'])" in line
    assert (here / "mine.db").read_bytes() == before


@pytest.mark.parametrize("url", [
    "postgresql://alice:Pa@ss7Word@127.0.0.1:9/db",  # the driver said "failed to resolve host 'ss7Word@127.0.0.1'"
    "postgresql://alice:A@B@C@Sec9@127.0.0.1:9/db",
    "postgresql://alice:pa/ss7Word@127.0.0.1:9/db",
])
@pytest.mark.parametrize("command", ["search", "status", "export"])
def test_a_password_with_an_unescaped_at_never_reaches_the_terminal(here, capsys, caplog, url, command):
    argv = [command, "--name", "x", "--storage", url] + (["--space", "space.toml"] if command == "search" else [])
    line = refused(argv, capsys)
    assert "must write percent-encoded" in line and "alice:***@127.0.0.1:9/db" in line
    for piece in ("ss7Word", "Sec9", "Pa@", "A@B"):
        assert piece not in line and piece not in caplog.text
    assert not (here / "runs").exists()


def test_what_a_driver_echoes_of_a_password_is_hidden():
    """The safety net behind the refusal: the driver's own message, as psycopg 3.3 gave it."""
    from searcher.redact import password_pieces, redact

    said = "(psycopg.OperationalError) failed to resolve host 'ss7Word@127.0.0.1': [Errno -2] Name or service not known"
    assert "ss7Word" not in redact(said, password_pieces("postgresql://alice:Pa@ss7Word@127.0.0.1:9/db"))
    said = "failed to resolve host 'B@C@Sec9@127.0.0.1'"
    shown = redact(said, password_pieces("postgresql://alice:A@B@C@Sec9@127.0.0.1:9/db"))
    assert "Sec9" not in shown and "C@" not in shown and "127.0.0.1" in shown


@pytest.mark.parametrize(("url", "says"), [
    ("postgresql://u:p@db:notaport/x", "the port 'notaport' must be a whole number from 1 to 65535"),  # int() said
    ("postgresql://u:p@::1/x", "write an IPv6 address in brackets, as in postgresql://user@[::1]:5432/db"),
    ("postgresql+psycopg2://u:p@127.0.0.1:9/x", "install the 'psycopg2' package the URL names, or write "
                                                "postgresql:// to use psycopg 3"),  # advised the psycopg 3 extra
])
def test_storage_urls_that_gave_a_python_error(here, capsys, url, says):
    assert says in refused(["status", "--name", "x", "--storage", url], capsys)


def test_an_ipv6_host_in_brackets_is_a_host():
    from searcher.study.stores import storage_kind

    assert storage_kind("postgresql://u:p%40ss@[::1]:5432/db") == "postgresql"  # RFC 3986: bracketed, '@' as %40


# -- runs: a finished search to read, resume and export -------------------------------------------------
def test_export_after_a_search_with_skip_unreadable_reads_the_run_as_it_was_read(made, run_copy):
    """Export re-decoded the folder without skipping ("the decoded copy ... is out of date") and failed on
    the broken file; export has no such option. The run's configuration carries it."""
    from searcher.study.studies import open_run

    assert open_run("done", root=run_copy / "runs")[2].skip_unreadable
    (run_copy / "runs" / "done" / "decoded.npz").unlink()  # so the folder itself must be decoded again, skipping
    outcome = export_here(run_copy, arch=ARCH)
    assert (outcome.folder / "MODEL_CARD.md").is_file()


def test_export_after_the_data_moved(made, run_copy, capsys):
    """The run's decoded copy is the same data (its fingerprint says so); without it, the advice fits export,
    which takes no --data."""
    import shutil

    from searcher.data import load as load_module
    from searcher.errors import SearcherError

    shutil.move(made / "digits", made / "digits-moved")
    try:
        assert export_here(run_copy, arch=ARCH).fits
        (run_copy / "runs" / "done" / "decoded.npz").unlink()
        load_module._CACHE.clear()  # as a new process would start
        with pytest.raises(SearcherError, match=r"searched the data at .*digits, which is no longer there.*"
                                                r"it takes no --data\): put it back there"):
            export_here(run_copy, arch=ARCH)
    finally:
        shutil.move(made / "digits-moved", made / "digits")


def test_resuming_with_another_space_says_what_changed_in_words(made, run_copy, capsys):
    text = (run_copy / "space.toml").read_text().replace("sizes = [[12, 12], [16, 16]]", "sizes = [[12, 12]]")
    (run_copy / "other.toml").write_text(text)
    line = refused(["search", "--space", "other.toml", "--name", "done", "--data", str(made / "digits")], capsys)
    assert "60 images in 3 classes at 1×16×16" in line and "(the same path) now gives 60 images in 3 classes at " \
           "1×12×12; the space file changed too" in line


def test_resuming_with_other_data_says_what_changed_in_words(made, run_copy, capsys):
    """Was "data fingerprint d04f... differs from the stored ede6..."."""
    digits_folder(run_copy / "more", per_class=25, broken=False)
    line = refused(["search", "--space", "space.toml", "--name", "done", "--data", "more"], capsys)
    assert f"run 'done' was started on '{made / 'digits'}': 60 images in 3 classes at 1×16×16" in line
    assert "--data 'more' now gives 75 images in 3 classes at 1×16×16" in line


# -- folders that cannot be written ------------------------------------------------------------------------
@contextlib.contextmanager
def read_only(folder: Path):
    """``folder`` made read-only: by its mode for an ordinary user, by a read-only bind mount for root (whom
    modes do not stop); skipped where neither can be had."""
    if os.geteuid() != 0:
        modes = {p: p.stat().st_mode for p in [folder, *folder.rglob("*")] if p.is_dir()}
        for path in modes:
            path.chmod(0o555)
        try:
            yield
        finally:
            for path, mode in modes.items():
                path.chmod(mode)
        return
    try:
        subprocess.run(["mount", "--bind", str(folder), str(folder)], check=True, capture_output=True)
    except (OSError, subprocess.CalledProcessError):
        pytest.skip("root ignores folder modes, and this machine allows no bind mount to make a folder read-only")
    try:
        subprocess.run(["mount", "-o", "remount,bind,ro", str(folder)], check=True, capture_output=True)
        yield
    finally:
        subprocess.run(["umount", "-l", str(folder)], check=False, capture_output=True)  # lazily: stores stay open


@pytest.mark.parametrize("log", ["left", "folded in"])
def test_a_read_only_run_folder_is_read_and_said_plainly(run_copy, capsys, log):
    """status, report and export said "attempt to write a readonly database" though status only reads.
    The store is read with its write-ahead log when a killed search left one, else as an immutable file."""
    import sqlite3

    if log == "folded in":  # as a search that ended leaves it
        with sqlite3.connect(run_copy / "runs" / "done" / "study.db") as connection:
            connection.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    with read_only(run_copy / "runs"):
        assert main(["status", "--name", "done"]) == 0
        assert "tried 3: rejected 0, trained 3" in capsys.readouterr().out
        for argv in (["report", "--name", "done"], ["export", "--name", "done", "--epochs", "1"],
                     ["search", "--space", "space.toml", "--name", "done", "--data", "digits"]):
            line = refused(argv, capsys)
            assert "cannot write into run folder runs/done: runs/done is read-only" in line, line
            assert "readonly database" not in line and "--storage" not in line


@pytest.mark.parametrize("argv", [["census", "--space", "space.toml"], ["search", "--space", "space.toml", "--name", "x"],
                                  ["status", "--name", "x"], ["report", "--name", "x"], ["export", "--name", "x"]])
def test_a_runs_path_that_is_a_file(here, capsys, argv):
    """Was reported as "cannot open `--storage` sqlite:///..." when no --storage was given."""
    (here / "runs").write_text("not a folder")
    line = refused(argv, capsys)
    assert "runs is a regular file, not a folder" in line and "--storage" not in line.split("(give")[0], line
    assert (here / "runs").read_text() == "not a folder"


# -- options -----------------------------------------------------------------------------------------------
def test_a_training_memory_guard_no_candidate_can_meet_is_refused_up_front(here, capsys):
    """`--max-train-memory 1B` ran 12 s of rejections, then said "the space looks exhausted"."""
    line = refused(["search", "--space", "space.toml", "--name", "x", "--max-train-memory", "1B"], capsys)
    assert "`--max-train-memory` 1 B is less than training any candidate takes: its batch of 128 input images " \
           "alone holds 72 KiB in fp32" in line  # 128 · 1·12·12 pixels · 4 bytes, the base space's smallest input


def test_a_cap_no_candidate_meets_names_the_option_that_set_it(here, capsys):
    """`--max-params 5` said no candidate fits "(.../tiny.toml)" without naming the flag."""
    line = refused(["search", "--space", "space.toml", "--name", "x", "--max-params", "5"], capsys)
    assert "(cap 5, from --max-params)" in line and "loosen the caps (--max-params)" in line


@pytest.mark.parametrize("argv", [["search", "--space", "space.toml", "--name", "x", "--max-params", "-5k"],
                                  ["census", "--space", "space.toml", "--max-weight", "-1KiB"],
                                  ["cost", ARCH_OK, "--max-macs", "-2M"]])
def test_a_value_starting_with_a_dash_reaches_the_options_check(here, capsys, argv):
    """`--max-params -5k` said "expected one argument"."""
    option, value = argv[-2], argv[-1]
    line = refused(argv, capsys)
    assert f"`{option}` must be" in line and repr(value) in line and "expected one argument" not in line


def test_export_refuses_trial_and_arch_together(here, capsys):
    """`export --trial 0 --arch X` dropped --trial silently."""
    line = refused(["export", "--name", "x", "--trial", "0", "--arch", ARCH_OK], capsys)
    assert "give `--trial` or `--arch`, not both" in line


def test_status_counts_a_reused_outcome_once(run_copy, capsys):
    """"trained 269" for one real training: proposals that reused an outcome are said apart."""
    import optuna

    from searcher.run.records import RECORD, record_of

    study = optuna.load_study(study_name="done", storage=f"sqlite:///{run_copy / 'runs/done/study.db'}")
    first = next(t for t in study.trials if record_of(t).get("state") == "trained")
    for _ in range(2):  # two proposals of the same candidate that took its outcome over, as the loop records them
        trial = study.ask()
        trial.set_user_attr(RECORD, record_of(first) | {"repeat_of": first.number})
        study.tell(trial, first.values)
    assert main(["status", "--name", "done"]) == 0
    out = capsys.readouterr().out
    assert "tried 5: rejected 0, trained 3," in out and "; 2 more reused a known outcome without training" in out


@pytest.mark.parametrize("form", ["missing", "unreadable", "cut", "pickled", "fifo"])
def test_a_census_whose_data_is_refused_leaves_no_folder(here, capsys, form):
    """It exited 2 but left an empty runs/NAME/."""
    path = here / "bad.npz"
    if form == "fifo":
        os.mkfifo(path)
    elif form == "unreadable":
        path.write_bytes(b"\x00" * 64)
    elif form == "cut":
        np.savez(path, images=IMAGES, labels=LABELS)
        path.write_bytes(path.read_bytes()[:200])
    elif form == "pickled":
        np.savez(path, images=IMAGES, labels=np.array([{"class": 0}] * 30, dtype=object))
    assert "bad.npz" in census_data(here, capsys)


def test_a_resumed_search_reads_the_data_as_its_start_did(made, run_copy):
    """--skip-unreadable given at the start carries into the next search of the run without being repeated."""
    from searchkit import StandIn, search_here

    (run_copy / "runs" / "done" / "decoded.npz").unlink()  # so the folder, broken file and all, is decoded again
    outcome = search_here(run_copy, run_copy / "space.toml", "done", trainer_for=lambda run, threads: StandIn(1),
                          data=str(made / "digits"), trials=4)
    assert outcome.exit_status == 0 and outcome.counts["tried"] >= 4
