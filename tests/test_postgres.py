"""One study on PostgreSQL shared by three searches, as three machines would run them.

The server comes from the ``postgres_database`` fixture (a database of its own on
$SEARCHER_TEST_POSTGRES or a throw-away cluster); each search runs in a folder of its own.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path
from urllib.parse import urlsplit

import pytest

from test_workers import check_study, finish, search_command, start, stored

from searcher.redact import redact
from searcher.core.space_file import load_space
from searcher.run.config import ConfirmSettings
from searcher.study.confirm import open_confirm_study, plan, read_jobs

MACHINES = 3


def status(url: str, name: str, cwd: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "searcher", "status", "--name", name, "--storage", url],
                          cwd=cwd, capture_output=True, text=True, timeout=120)


def files_holding(folder: Path, secret: str) -> list[str]:
    """Every file below ``folder`` whose bytes contain ``secret``."""
    return [str(p) for p in folder.rglob("*") if p.is_file() and secret.encode() in p.read_bytes()]


@pytest.mark.slow
def test_three_searches_share_one_postgres_study(postgres_database: str, tmp_path: Path, write_space) -> None:
    password = urlsplit(postgres_database).password
    assert password, "the test URL must carry a password for the leak checks"
    space = write_space()
    homes = [tmp_path / f"machine{i}" for i in range(MACHINES)]
    for home in homes:
        home.mkdir()
    name = "shared"
    confirm = ("--confirm", "2", "--confirm-candidates", "2", "--confirm-random", "0")  # shared after the search
    processes = [start(search_command(space, name, "--storage", postgres_database, *confirm), home) for home in homes]

    reader = tmp_path / "reader"
    reader.mkdir()
    during = None
    while during is None and any(p.poll() is None for p in processes):
        answer = status(postgres_database, name, reader)
        if answer.returncode == 0 and any(p.poll() is None for p in processes):
            during = answer  # read while at least one search was still going
        elif answer.returncode != 0:
            assert "no run" in answer.stderr or "being created" in answer.stderr, answer.stderr
            time.sleep(0.5)
    outputs = finish(processes)
    after = status(postgres_database, name, reader)
    assert after.returncode == 0, after.stderr
    assert during is not None, "every search ended before status could read the study"
    for answer in (during, after):
        assert answer.stdout.startswith(f"run {name}: space tiny") and "tried " in answer.stdout
    assert "running 0" in after.stdout

    study = stored(name, postgres_database)
    frame = None
    for home in homes:
        frame = check_study(study, home / "runs" / name / "trials.csv", workers=MACHINES, last_writer=False)
    pids = {int(w.rsplit(":", 1)[1]) for w in frame["worker"]}
    assert pids == {p.pid for p in processes}, "some search's host:pid is missing from the trials"

    jobs = read_jobs(name, postgres_database)
    done = jobs[jobs["state"] == "trained"]
    assert not done.duplicated(["trial", "seed_index"]).any(), "a seed was trained twice"
    assert (done.groupby("trial").size() == 2).all(), jobs.to_string()  # two seeds per confirmed candidate
    # The search that ended last saw every search trial finished: the two candidates it selected are all
    # queued and trained, so planning again queues nothing. A search that ended earlier queued the front
    # as it saw it then, which may add a candidate (up to 2 per machine).
    assert 2 <= done["trial"].nunique() <= 2 * MACHINES, jobs.to_string()
    val_images = json.loads((homes[0] / "runs" / name / "summary.json").read_text())["splits"]["val"]["images"]
    again = plan(open_confirm_study(name, postgres_database), study, load_space(space).budget, "accuracy", val_images,
                 ConfirmSettings(seeds=2, most=2, extra=0), seed=0)
    assert again == 0, "the final front's candidates were not all confirmed"

    said = outputs + [during.stdout, during.stderr, after.stdout, after.stderr]
    assert not [text for text in said if password in text], "the password was printed"
    assert files_holding(tmp_path, password) == [], "the password was written to a file"
    assert any(redact(postgres_database) in text for text in outputs)  # the storage is named, redacted
