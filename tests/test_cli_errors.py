"""Issue 17 item 18: every CLI error is one line that says what to do, exit status 1 (2 for
usage), never a traceback. The CLI runs as a subprocess, as a user runs it."""

import json
import os
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
MAIN = "import sys; from app.cli import main; sys.exit(main(sys.argv[1:]))"


def kinfold(*args, patch: str = "", env=None, stdout=subprocess.PIPE):
    """Run `kinfold ARGS`; with `patch`, Python run first in the same process (to fake a fault)."""
    cmd = ([sys.executable, "-c", patch + "\n" + MAIN] if patch else
           [sys.executable, "-m", "app.cli"]) + [str(a) for a in args]
    return subprocess.run(cmd, cwd=ROOT, stdout=stdout, stderr=subprocess.PIPE, text=True,
                          env={**os.environ, **(env or {})}, timeout=300)


def one_line(result, status: int) -> str:
    """The single stderr line of a failed command."""
    assert result.returncode == status, (result.returncode, result.stderr)
    assert "Traceback" not in result.stderr, result.stderr
    lines = result.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("kinfold"), result.stderr
    return lines[0]


@pytest.fixture
def labelled(photo_project_folder):
    """The scanned test folder with 4 photos labelled."""
    from core.project import Project

    with Project.open(photo_project_folder, annotator="tester") as p:
        p.label(p.photos()[:4], "cat")
    return photo_project_folder


def labelled_count(folder) -> int:
    return json.loads(kinfold("status", folder, "--json").stdout)["labelled"]


def test_cli_export_refuses_to_replace_the_store_or_a_photo(labelled, tmp_path):
    store = labelled / ".kinfold" / "kinfold.sqlite"
    photo = next((labelled / "a").glob("*.jpg"))
    before = photo.read_bytes()
    for args in (["--coco", store], ["--csv", photo], ["--csv", photo, "--overwrite"]):
        line = one_line(kinfold("export", labelled, *args), 1)
        assert "inside the photo folder" in line and "choose a destination outside it" in line
    assert labelled_count(labelled) == 4 and photo.read_bytes() == before

    notes = tmp_path / "notes.csv"
    notes.write_text("mine")
    assert "--overwrite" in one_line(kinfold("export", labelled, "--csv", notes), 1)
    assert notes.read_text() == "mine"
    assert kinfold("export", labelled, "--csv", notes, "--overwrite").returncode == 0
    assert kinfold("export", labelled, "--csv", notes).returncode == 0  # now it is ours


def test_cli_export_errors_are_one_line(labelled, tmp_path):
    tmp_path = tmp_path / "exports"  # beside the photo folder
    tmp_path.mkdir()
    a_file = tmp_path / "a-file"
    a_file.write_text("x")
    cases = {
        "does not exist; create it first": ["--csv", tmp_path / "nowhere" / "l.csv"],
        "is a file, not a folder": ["--csv", a_file / "l.csv"],
        "is a folder, not a file": ["--coco", tmp_path],
        "give each its own destination": ["--folders", tmp_path / "o", "--csv",
                                          tmp_path / "o" / "l.csv"],
    }
    for expected, args in cases.items():
        assert expected in one_line(kinfold("export", labelled, *args), 1)
    # A full disk: the write's flush to disk fails with ENOSPC.
    enospc = ("import errno, os\n"
              "def full(fd): raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))\n"
              "os.fsync = full")
    line = one_line(kinfold("export", labelled, "--csv", tmp_path / "l.csv", patch=enospc), 1)
    assert "the disk is full; free some space" in line and "nothing was changed" in line
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a-file"]  # no temporary left


def test_cli_export_to_an_unwritable_folder_is_one_line(labelled, tmp_path):
    if os.geteuid() != 0:
        target = tmp_path / "locked"
        target.mkdir(mode=0o500)
    else:  # root writes anywhere but on a read-only file system such as /sys
        target = Path("/sys")
        try:
            (target / "kinfold-probe").touch()
            pytest.skip("no folder here refuses root")
        except OSError:
            pass
    line = one_line(kinfold("export", labelled, "--csv", target / "l.csv"), 1)
    assert "choose a folder you can write to" in line


@pytest.mark.parametrize("args", [
    ["--folders", "OUT", "--split", "0.8,0.3,0.1"],
    ["--folders", "OUT", "--split=-0.2,0.6,0.6"],
    ["--folders", "OUT", "--split", "nan"],        # an IndexError once
    ["--folders", "OUT", "--split", "1,nan"],      # accepted once, NaN in the marker
    ["--folders", "OUT", "--split", "inf,0"],
    ["--folders", "OUT", "--split", "0.5,0.2,0.2,0.1"],
    ["--folders", "OUT", "--split", ""],           # silently ignored once
    ["--folders", "OUT", "--split", "a,b"],
    # ["--csv", "OUT.csv", "--split", ...] is no longer a mistake: the CSV gets a split column
    # (issue 20; tests/test_cli_verbs.py reads it back).
    [],                                            # nothing to export
])
def test_cli_split_mistakes_are_usage_errors(labelled, tmp_path, args):
    tmp_path = tmp_path / "exports"
    tmp_path.mkdir()
    args = [str(tmp_path / "out") + a[3:] if a.startswith("OUT") else a for a in args]
    line = one_line(kinfold("export", labelled, *args), 2)
    assert "kinfold export --help" in line
    assert ("--split" in line) or not args
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("verb", [["accept", "99999999999999999999", "x"], ["split", "-1"],
                                  ["accept", "seven", "x"]])
def test_cli_group_ids_out_of_range_are_usage_errors(labelled, verb):
    line = one_line(kinfold(verb[0], labelled, *verb[1:]), 2)
    assert "kinfold propose" in line  # where group ids come from
    assert labelled_count(labelled) == 4


def test_cli_damaged_store_is_one_line(labelled):
    store = labelled / ".kinfold" / "kinfold.sqlite"
    data = bytearray(store.read_bytes())
    data[len(data) // 3: len(data) // 3 + 20000] = os.urandom(20000)  # garbage inside the file
    store.write_bytes(bytes(data))
    for verb in (["status"], ["export", "--csv", labelled.parent / "l.csv"], ["propose"]):
        line = one_line(kinfold(verb[0], labelled, *verb[1:]), 1)
        assert "is damaged" in line and "restore it from a backup" in line


def test_cli_full_store_disk_is_one_line(labelled):
    # SQLite's own "database or disk is full" (SQLITE_FULL), by capping the store's size.
    cap = ("import core.store as s\n"
           "init = s.Store.__init__\n"
           "def capped(self, d):\n"
           "    init(self, d)\n"
           "    n = self._db.execute('PRAGMA page_count').fetchone()[0]\n"
           "    self._db.execute(f'PRAGMA max_page_count={n}')\n"
           "s.Store.__init__ = capped")
    photos = [f"b/coffee_{k}.jpg" for k in range(5)] * 400  # enough decisions to need a page
    result = kinfold("label", labelled, "cup", *photos[:5], patch=cap)
    if result.returncode == 0:  # the decision fitted in the free pages: fill them up
        for _ in range(20):
            result = kinfold("label", labelled, "x" * 150, *photos[:5], patch=cap)
            if result.returncode:
                break
    line = one_line(result, 1)
    assert "is full; free some space" in line


def test_cli_closed_pipe_exits_quietly(labelled):
    read, write = os.pipe()
    os.close(read)  # the reader is gone before anything is written (`| head -1` that exited)
    try:
        result = kinfold("status", labelled, "--json", stdout=write)
    finally:
        os.close(write)
    assert result.returncode == 1 and result.stderr == ""
    # And through a real shell pipe with more output than a pipe holds: no traceback.
    shell = subprocess.run(
        f"{sys.executable} -m app.cli propose {labelled} --json --limit 50 --show 100 | head -c 1",
        shell=True, cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert "Traceback" not in shell.stderr and "BrokenPipe" not in shell.stderr


def test_cli_unexpected_error_is_one_line_with_a_debug_hint(labelled):
    boom = ("from core.project import Project\n"
            "def status(self): raise RuntimeError('boom\\nsecond line')\n"
            "Project.status = status")
    line = one_line(kinfold("status", labelled, patch=boom), 1)
    assert "unexpected error: RuntimeError: boom second line" in line and "KINFOLD_DEBUG=1" in line
    debug = kinfold("status", labelled, patch=boom, env={"KINFOLD_DEBUG": "1"})
    assert debug.returncode == 1 and "Traceback" in debug.stderr


def test_cli_usage_errors_are_one_line(labelled):
    for args in (["export", labelled, "--mode", "hardlink", "--csv", "x.csv"], ["no-such-verb"],
                 ["propose", labelled, "--limit", "99999999999999999999"]):
        one_line(kinfold(*args), 2)
