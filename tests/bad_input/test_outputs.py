"""What reaches the outputs, and faults in the middle of a run, generated for every place they apply (issue 17).

* names the user chose (class names from an .npz or from folder names, a space's name, a data path) with
  characters that mean something in HTML, Markdown, Python, JSON or C: in every output they stay data;
* a store damaged on disk (2 KB overwritten): every command names the file and says it is damaged;
* signals during export (SIGINT, SIGTERM at each stage in this process; SIGKILL in a child), and during
  the set-up of a search: the export folder is the old one or the new one, whole, and nothing is left over;
* training that diverges (a step past float32, weights turned NaN) in every training path: the proxy
  search and the confirmation fail that candidate and go on; export says so in a sentence, exit status 2.
"""

from __future__ import annotations

import ast
import html
import json
import os
import random
import re
import shutil
import signal
import sqlite3
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from searcher.cli.main import main

from checks import ARCH, export_here, made  # noqa: F401  (made is a fixture)

# -- names -------------------------------------------------------------------------------------------------
HOSTILE = (
    'say "hi"', "a/*b*/c", "line\nbreak", "tri??/graph", "back\\slash", "<script>alert(1)</script>", "| cell |",
    "`tick`", "[x](javascript:alert(1))", "\u202eRTL", "tab\tbed", "=SUM(A1:A9)", "\x07bell", "é ü 漢 🚀", "  ",
)
FOLDER_SAFE = tuple(n for n in HOSTILE if "/" not in n)  # a folder name cannot hold '/'
SPACE_NAME = "<img src=x onerror=alert(1)> | `x` *y*"  # printable, as a space's name must be
DATA_NAME = "d<i>|`x`.npz"


def hostile_space(folder: Path, classes: int) -> Path:
    from searchkit import FAST_SPACE

    text = FAST_SPACE.replace('name = "tiny"', f"name = {json.dumps(SPACE_NAME)}").replace("classes = 4",
                                                                                          f"classes = {classes}")
    (folder / "space.toml").write_text(text, encoding="utf-8")
    return folder / "space.toml"


@pytest.fixture(scope="module")
def named_run(tmp_path_factory: pytest.TempPathFactory):
    """One trained candidate and its export, over an .npz whose class names are HOSTILE; its run folder."""
    from searchkit import in_process, search_here

    from searcher.ship.export import ExportSettings, export

    folder = tmp_path_factory.mktemp("named")
    count = 6 * len(HOSTILE)
    images = np.random.default_rng(2).integers(0, 256, size=(count, 12, 12), dtype=np.uint8)
    np.savez(folder / DATA_NAME, images=images, labels=np.arange(count) % len(HOSTILE), class_names=np.array(HOSTILE))
    search_here(folder, hostile_space(folder, len(HOSTILE)), "named", data=str(folder / DATA_NAME), trials=1)
    with in_process():
        export(ExportSettings(name="named", root=folder / "runs", epochs=1,
                              arch=f"1x16x16_c2k3-m2_gap-o{len(HOSTILE)}_relu"))
    return folder / "runs" / "named"


def test_names_reach_the_run_as_given(named_run):
    from searcher.study.studies import open_run

    assert open_run("named", root=named_run.parent)[2].class_names == HOSTILE


@pytest.mark.parametrize("name", HOSTILE, ids=range(len(HOSTILE)))
def test_a_name_in_the_report_is_html_text(named_run, name):
    page = (named_run / "report.html").read_text(encoding="utf-8")
    assert f"<td>{html.escape(name)}</td>" in page or f">{html.escape(name)}<" in page
    if set(name) & set("<>&"):
        assert name not in page


def card_rows(card: str, heading: str) -> list[list[str]]:
    """The rows of the Markdown table after ``heading``, split at the pipes that are not escaped."""
    section = card.split(heading, 1)[1]
    rows = []
    for line in section.splitlines()[1:]:
        if not line.startswith("|"):
            if rows:
                break
            continue
        rows.append(re.split(r"(?<!\\)\|", line)[1:-1])
    return rows


@pytest.mark.parametrize("name", HOSTILE, ids=range(len(HOSTILE)))
def test_a_name_in_the_model_card_is_markdown_text(named_run, name):
    from searcher.ship.model_card import md_text

    card = (named_run / "export" / "MODEL_CARD.md").read_text(encoding="utf-8")
    per_class = card_rows(card, "Per class, fp32:")[2:]  # after the head and the rule
    assert [cells[0].strip() for cells in per_class] == [md_text(n).strip() for n in HOSTILE]
    assert all(len(cells) == 2 for cells in per_class)  # no name added or ended a cell or a row
    confusion = card_rows(card, "Confusion matrix")
    assert all(len(cells) == len(HOSTILE) + 1 for cells in confusion)
    if set(name) & set("\n|`<[*"):
        assert name not in card


def test_names_in_model_py_json_and_the_c_header_read_back_exactly(named_run):
    source = (named_run / "export" / "model.py").read_text(encoding="utf-8")
    assigned = next(node for node in ast.parse(source).body if isinstance(node, ast.Assign)
                    and node.targets[0].id == "CLASS_NAMES")  # parsed by Python itself: the names stay a literal
    assert ast.literal_eval(assigned.value) == list(HOSTILE)
    metrics = json.loads((named_run / "export" / "metrics.json").read_text(encoding="utf-8"))
    assert list(metrics["per_class"]) == list(HOSTILE)
    header = (named_run / "export" / "model_int8.h").read_text(encoding="utf-8")
    assert "line\nbreak" not in header  # export compiled it (gcc -Werror); its names are read back in test_int8.py


def test_the_space_name_and_data_path_stay_text(named_run, tmp_path, monkeypatch):
    """They reach the report's notes, the card, and the census's title (which plotly reads as markup)."""
    from searcher.ship.model_card import md_text

    page = (named_run / "report.html").read_text(encoding="utf-8")
    assert html.escape(SPACE_NAME) in page and SPACE_NAME not in page
    card = (named_run / "export" / "MODEL_CARD.md").read_text(encoding="utf-8")
    assert md_text(SPACE_NAME) in card and SPACE_NAME not in card and DATA_NAME not in card
    monkeypatch.chdir(tmp_path)
    hostile_space(tmp_path, 4)
    assert main(["census", "--space", "space.toml", "--name", "c"]) == 0
    census = (tmp_path / "runs" / "c" / "census.html").read_text(encoding="utf-8")
    assert "<img src=x" not in census and html.escape(SPACE_NAME) in census


def test_folder_names_are_class_names_as_given(tmp_path):
    """A class folder may be named anything but '/': read back exactly, then treated as every name is."""
    from PIL import Image

    from searcher.data.load import load_dataset

    images = np.random.default_rng(3).integers(0, 256, size=(6, 12, 12), dtype=np.uint8)
    for name in FOLDER_SAFE:
        (tmp_path / "images" / name).mkdir(parents=True)
        for i, image in enumerate(images):
            Image.fromarray(image).save(tmp_path / "images" / name / f"{i}.png")
    data = load_dataset(str(tmp_path / "images"), (1, 12, 12))
    assert data.class_names == tuple(sorted(FOLDER_SAFE))


def test_a_folder_name_that_is_not_utf8_is_refused_by_name(tmp_path):
    from searcher.data.load import load_dataset
    from searcher.errors import SearcherError

    for name in (b"ok", b"caf\xe9"):  # Latin-1, as an old file system may hold it
        os.makedirs(os.path.join(bytes(tmp_path), b"images", name))
        Path(os.fsdecode(os.path.join(bytes(tmp_path), b"images", name, b"0.png"))).write_bytes(b"")
    with pytest.raises(SearcherError, match=r"class folder 'caf\\udce9' cannot name a class: it is not UTF-8 text"):
        load_dataset(str(tmp_path / "images"), (1, 12, 12))


# -- a store damaged on disk -------------------------------------------------------------------------------
@pytest.fixture
def run_here(made: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    shutil.copytree(made, tmp_path / "w", symlinks=True)
    monkeypatch.chdir(tmp_path / "w")
    from searcher.data import load as load_module

    monkeypatch.setattr(load_module, "_CACHE", {})
    return tmp_path / "w"


def root_page(db: Path, table: str) -> int:
    with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as connection:
        return connection.execute("SELECT rootpage FROM sqlite_master WHERE name = ?", (table,)).fetchone()[0]


DAMAGE = ("the header", "the trials table", "the user attributes table")
COMMANDS = {"status": ["status", "--name", "done"], "report": ["report", "--name", "done"],
            "search": ["search", "--space", "space.toml", "--name", "done", "--data", "digits", "--skip-unreadable"],
            "export": ["export", "--name", "done", "--epochs", "1"]}


@pytest.mark.parametrize("where", DAMAGE)
@pytest.mark.parametrize("command", COMMANDS)
def test_a_store_with_2_kb_overwritten(run_here, capsys, command, where):
    """status and search died with a storage traceback: the file is named and said to be damaged."""
    db = run_here / "runs" / "done" / "study.db"
    with sqlite3.connect(db) as connection:  # as a search leaves its store when it ends: the log folded in
        connection.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    page = {"the header": 1, "the trials table": root_page(db, "trials"),
            "the user attributes table": root_page(db, "trial_user_attributes")}[where]
    with open(db, "r+b") as handle:
        handle.seek((page - 1) * 4096)  # Optuna's stores use SQLite's default page of 4 KiB
        handle.write(random.Random(page).randbytes(2048))
    damaged = db.read_bytes()
    try:
        status = main(COMMANDS[command])
    except SystemExit as exc:
        status = exc.code
    line = capsys.readouterr().err.strip().splitlines()[-1]
    assert status == 2 and "runs/done/study.db" in line, line
    assert "is damaged" in line or "is not a SQLite database" in line, line
    assert db.read_bytes() == damaged and not (run_here / "runs" / "done" / "export").exists()


@pytest.mark.parametrize("command", COMMANDS)
def test_a_journal_store_with_2_kb_overwritten(tmp_path, monkeypatch, capsys, command):
    import optuna

    from searcher.study.stores import open_storage

    from searchkit import write_space

    monkeypatch.chdir(tmp_path)
    write_space(tmp_path)
    study = optuna.create_study(storage=open_storage("s.journal"), study_name="done")
    for value in range(30):
        study.tell(study.ask({"width": optuna.distributions.IntDistribution(1, 64)}), value / 30)
    data = bytearray((tmp_path / "s.journal").read_bytes())
    data[len(data) // 3: len(data) // 3 + 2048] = random.Random(0).randbytes(2048)
    (tmp_path / "s.journal").write_bytes(bytes(data))
    try:
        status = main([a.replace("digits", "demo") for a in COMMANDS[command]] + ["--storage", "s.journal"])
    except SystemExit as exc:
        status = exc.code
    line = capsys.readouterr().err.strip().splitlines()[-1]
    assert status == 2 and re.search(r"the journal store s\.journal is damaged at line \d+", line), line
    assert (tmp_path / "s.journal").read_bytes() == bytes(data)


# -- signals during export ------------------------------------------------------------------------------------
@pytest.fixture
def exported(run_here: Path) -> Path:
    """The run copy with a first export of ARCH in place; its export folder."""
    export_here(run_here, arch=ARCH)
    return run_here / "runs" / "done" / "export"


def listing(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


# a function export calls at each stage, and whether the signal comes before or after it runs
STAGES = {
    "after the first files": ("searcher.ship.export.standalone_source", "before"),
    "as the ONNX and C files are written": ("searcher.ship.export.write_deploy_files", "before"),
    "after the last file": ("searcher.ship.export.model_card", "after"),
    "between the two renames of the swap": ("searcher.run.folders._foreign_entries", "after"),
}
OTHER = "1x16x16_c3k3-m2_gap-o3_relu"  # the second export's candidate, so old and new tell apart


@pytest.mark.parametrize("stage", STAGES)
@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_a_signal_during_export_leaves_the_old_export_or_the_new_whole(exported, capsys, monkeypatch, stage, signum):
    """SIGTERM at 2 of 12 moments left a half-written runs/NAME/.export-<ms>/ for ever."""
    import importlib

    from searchkit import in_process

    where, when = STAGES[stage]
    module_name, function = where.rsplit(".", 1)
    module = importlib.import_module(module_name)
    real = getattr(module, function)

    def interrupted(*args, **kwargs):
        if when == "before":
            os.kill(os.getpid(), signum)
        result = real(*args, **kwargs)
        if when == "after":
            os.kill(os.getpid(), signum)
        return result

    monkeypatch.setattr(module, function, interrupted)
    old = listing(exported)
    with in_process():
        try:
            status = main(["export", "--name", "done", "--epochs", "1", "--arch", OTHER])
        except SystemExit as exc:
            status = exc.code
    assert status == 128 + signum, capsys.readouterr().err[-500:]
    run = exported.parent
    assert [p.name for p in run.iterdir() if p.name.startswith(".export")] == []
    new = listing(exported)
    if stage.startswith("between"):  # the signal waits for the swap: the new export is in place, whole
        assert json.loads(new["metrics.json"])["arch"] == OTHER and set(new) == set(old)
    else:
        assert new == old


KILL_SCRIPT = """
import os, signal, sys
import searcher.run.folders as runs
import searcher.ship.export as export
from searcher.cli.main import main
stage = sys.argv[1]
def kill(*args, **kwargs):
    os.kill(os.getpid(), signal.SIGKILL)
if stage == "writing":
    export.write_deploy_files = kill
else:  # after the old export was moved aside, before the new one took its place
    real = runs.Path.rename
    def rename(self, target):
        result = real(self, target)
        if self.name == "export":
            kill()
        return result
    runs.Path.rename = rename
sys.exit(main(["export", "--name", "done", "--epochs", "1", "--arch", sys.argv[2]]))
"""


@pytest.mark.slow
@pytest.mark.parametrize("stage", ["writing", "between the renames"])
def test_a_sigkill_during_export_is_cleaned_up_by_the_next(exported, stage):
    """A kill can run no clean-up: the next export removes what it left, and puts back an export it had moved."""
    from searchkit import child_env

    old = listing(exported)
    run = exported.parent
    child = subprocess.run([sys.executable, "-c", KILL_SCRIPT, stage, OTHER], cwd=run.parent.parent,
                           env=child_env(), capture_output=True, text=True, timeout=240)
    assert child.returncode == -signal.SIGKILL, child.stderr[-800:]
    left = [p.name for p in run.iterdir() if p.name.startswith(".export")]
    assert left, "the kill left nothing to clean up: the stage was not reached"
    assert (stage == "writing") == exported.exists()  # between the renames, export/ is moved aside
    from searcher.run.folders import clean_stale_swaps

    clean_stale_swaps(exported)  # what the next export does first
    assert [p.name for p in run.iterdir() if p.name.startswith(".export")] == []
    assert listing(exported) == old  # the previous export, whole, in its place
    export_here(run.parent.parent, arch=OTHER)
    assert json.loads((exported / "metrics.json").read_text())["arch"] == OTHER


def test_two_exports_at_once_keep_each_others_folders(tmp_path):
    """A swap folder whose owner lives is left alone; one of a process that is gone is removed."""
    from searcher.run.folders import clean_stale_swaps, plain_name

    import socket

    host = plain_name(socket.gethostname(), "host")
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    try:
        live = tmp_path / f".export-new-{host}-{sleeper.pid}-1"
        dead = tmp_path / f".export-new-{host}-{int(gone.stdout)}-2"
        elsewhere = tmp_path / f".export-new-another-machine-{int(gone.stdout)}-3"
        for folder in (live, dead, elsewhere):
            folder.mkdir()
        assert clean_stale_swaps(tmp_path / "export") == [dead]
        assert live.exists() and elsewhere.exists() and not dead.exists()
    finally:
        sleeper.kill()
        sleeper.wait()


# -- signals while a search is set up ----------------------------------------------------------------------
SETUP_STEPS = ("searcher.study.search_run.open_study", "searcher.study.search_run.save_split",
               "searcher.study.search_run.save_decoded", "searcher.study.search_run.write_atomic")


@pytest.mark.parametrize("step", SETUP_STEPS, ids=lambda s: s.rsplit(".", 1)[1])
def test_ctrl_c_while_a_new_search_is_set_up_leaves_nothing(tmp_path, monkeypatch, capsys, step):
    """Ctrl-C 3 s into a search left a lone empty store."""
    import importlib

    from searchkit import in_process, write_space

    monkeypatch.chdir(tmp_path)
    write_space(tmp_path)
    np.savez(tmp_path / "d.npz", images=np.random.default_rng(4).integers(0, 256, (30, 12, 12), dtype=np.uint8),
             labels=np.arange(30) % 3)
    module_name, function = step.rsplit(".", 1)
    module = importlib.import_module(module_name)
    real = getattr(module, function)

    def interrupted(*args, **kwargs):
        real(*args, **kwargs)
        raise KeyboardInterrupt

    monkeypatch.setattr(module, function, interrupted)
    with in_process():
        status = main(["search", "--space", "space.toml", "--name", "x", "--data", "d.npz", "--trials", "1"])
    assert status == 130
    assert not (tmp_path / "runs" / "x").exists()


# -- divergence in every training path ---------------------------------------------------------------------
DIVERGE = {"a step past float32": {"optimizer": "sgd", "learning_rate": 1e300},
           "a weight decay past float32": {"optimizer": "sgd", "weight_decay": 1e300},
           "weights turned NaN": {"learning_rate": 1e30}}


def diverging(real, kind: str):
    return lambda settings: replace(real(settings), **DIVERGE[kind])


@pytest.mark.parametrize("kind", DIVERGE)
def test_divergence_in_the_proxy_search_fails_the_candidate(tmp_path, kind):
    """'value cannot be converted to type float without overflow' ended the search, with no trials.csv."""
    import pandas as pd
    from searchkit import search_here, write_space

    from searcher.run.records import FAILED

    outcome = search_here(tmp_path, write_space(tmp_path), "wild", train=DIVERGE[kind], trials=2)
    assert outcome.exit_status == 0
    trials = pd.read_csv(outcome.folder / "trials.csv")
    assert (trials["state"] == FAILED).all() and trials["reason"].str.startswith("diverged: ").all()


@pytest.mark.parametrize("kind", DIVERGE)
def test_divergence_in_the_confirmation_fails_that_job(tmp_path, monkeypatch, kind):
    from searchkit import search_here, write_space

    import searcher.study.launch as launch
    from searcher.run.config import ConfirmSettings
    from searcher.run.records import FAILED
    from searcher.study.confirm import read_jobs

    monkeypatch.setattr(launch, "full_schedule", diverging(launch.full_schedule, kind))  # the proxy trains well
    outcome = search_here(tmp_path, write_space(tmp_path), "wild", trials=2,
                          confirm=ConfirmSettings(seeds=1, most=1, extra=0))
    assert outcome.exit_status == 0
    jobs = read_jobs("wild", f"sqlite:///{outcome.folder / 'study.db'}")
    assert len(jobs) >= 1 and (jobs["state"] == FAILED).all()


@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning", "ignore:invalid value:RuntimeWarning")
@pytest.mark.parametrize("kind", DIVERGE)
@pytest.mark.parametrize("chosen", [["--arch", ARCH], ["--trial", "0"], []], ids=["--arch", "--trial", "default"])
def test_divergence_in_export_is_said_in_a_sentence(run_here, monkeypatch, capsys, kind, chosen):
    """`export --arch` of a net whose training diverges: a Diverged traceback."""
    import searcher.ship.export as export_module
    from searchkit import in_process

    monkeypatch.setattr(export_module, "full_schedule", diverging(export_module.full_schedule, kind))
    with in_process():
        status = main(["export", "--name", "done", "--epochs", "1", *chosen])
    line = capsys.readouterr().err.strip().splitlines()[-1]
    assert status == 2 and "with the export's schedule" in line and "diverged" in line and "nothing was written" in line
    assert not [p for p in (run_here / "runs" / "done").iterdir() if p.name.startswith((".export", "export"))]
