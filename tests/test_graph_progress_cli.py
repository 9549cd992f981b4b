"""Issue 18, command line: the verbs that need the neighbour graph (propose, split, mistakes, review,
export) build it with the scan's progress bar on a terminal, and Ctrl+C during the build ends the verb
with one line and status 130, nothing changed (no decision, no partial graph file); the next run builds
it and goes on. Run as a subprocess on a pseudo-terminal, as a user runs it.

The project holds 6,000 photos of clustered synthetic vectors written straight into a real store
(benchmarks/cached_project.py). So that the build takes visible time on any machine, the subprocess
cuts the exact search into small blocks and sleeps 50 ms in each (`SLOW` below): the build itself,
its progress and its cancel are the product's."""
import os
import pty
import select
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from benchmarks.cached_project import build_project
from core.project import Project

ROOT = Path(__file__).resolve().parent.parent
N, D = 6000, 32

SLOW = """
import sys, time
from core import neighbours
neighbours._BLOCK = 128
_real = neighbours._run_blocks
def _slow(block, *a, **kw):
    def one(item):
        time.sleep(0.05)
        return block(item)
    return _real(one, *a, **kw)
neighbours._run_blocks = _slow
from app.cli import main
sys.exit(main(sys.argv[1:]))
"""


def _command(*args) -> list[str]:
    return [sys.executable, "-c", SLOW, *map(str, args)]


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    rng = np.random.default_rng(0)
    centres = rng.normal(size=(12, D)).astype(np.float32)
    classes = np.arange(N) % 12
    x = centres[classes] + 0.4 * rng.normal(size=(N, D)).astype(np.float32)
    p, _ = build_project(tmp_path_factory.mktemp("graph-cli") / "photos", x, classes)
    p.close()
    return p.folder


@pytest.fixture
def folder(made, tmp_path):
    dest = tmp_path / "photos"
    shutil.copytree(made, dest)
    return dest


def _graph_files(folder: Path) -> list[Path]:
    return list((folder / ".kinfold").glob("graph-*.npz"))


def _on_a_terminal(args, interrupt_when: bytes | None = None) -> tuple[int, bytes, str, float]:
    """Run the command with stderr a pseudo-terminal; with `interrupt_when`, send SIGINT (Ctrl+C) once
    those bytes showed. Returns (status, what stderr showed, stdout, seconds from SIGINT to the end)."""
    master, slave = pty.openpty()
    proc = subprocess.Popen(_command(*args), cwd=ROOT, stdout=subprocess.PIPE, stderr=slave, text=True)
    os.close(slave)
    err, sent = b"", None
    while True:
        ready, _, _ = select.select([master], [], [], 120)
        if not ready:
            break
        try:
            chunk = os.read(master, 4096)
        except OSError:
            break
        if not chunk:
            break
        err += chunk
        if interrupt_when is not None and sent is None and interrupt_when in err:
            proc.send_signal(signal.SIGINT)
            sent = time.monotonic()
    out, _ = proc.communicate(timeout=120)
    os.close(master)
    return proc.returncode, err, out, (time.monotonic() - sent) if sent else 0.0


def test_propose_shows_the_build_on_a_terminal_then_loads_it(folder):
    rc, err, out, _ = _on_a_terminal(["propose", folder, "--limit", "3"])
    assert rc == 0, err
    text = err.decode()
    assert "Finding neighbours" in text and f"/{N}" in text and "Traceback" not in text
    counts = [int(part.split("/")[0].split()[-1]) for part in text.split("\r") if "Finding neighbours" in part]
    assert len(counts) >= 3 and counts == sorted(counts) and counts[-1] == N    # several steps, up to all
    assert out.count("group ") >= 3
    assert len(_graph_files(folder)) == 1
    # Cached now: the next verb loads it, no bar.
    rc, err, out, _ = _on_a_terminal(["propose", folder, "--limit", "3"])
    assert rc == 0 and b"Finding neighbours" not in err


def test_no_bar_when_not_a_terminal(folder):
    r = subprocess.run(_command("propose", folder, "--limit", "2"), cwd=ROOT, capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0 and r.stderr == "" and "group " in r.stdout


@pytest.mark.parametrize("verb", [["propose"], ["mistakes"], ["export", "--csv", "{tmp}/out.csv"]])
def test_ctrl_c_during_the_build_ends_with_one_line_and_130(folder, tmp_path, verb):
    with Project.open(folder, annotator="t") as p:        # two labels, so mistakes and export have work
        paths = p.photos()
        p.label(paths[:30:12], "first")
        p.label(paths[1:30:12], "second")
        decisions = p.store.decision_count()
    args = [a.replace("{tmp}", str(tmp_path)) for a in verb]
    rc, err, out, after = _on_a_terminal([args[0], folder, *args[1:]], interrupt_when=b"Finding neighbours")
    assert rc == 130, err
    lines = [ln.strip() for ln in err.decode().replace("\r", "\n").splitlines()
             if ln.strip() and "Finding neighbours" not in ln]
    assert lines == ["kinfold: interrupted while finding neighbours; nothing was changed, run the command again "
                     "to go on"], err
    assert after < 5.0                                   # the build stops at its next block
    assert not _graph_files(folder) and not (tmp_path / "out.csv").exists()
    with Project.open(folder, annotator="t") as p:
        assert p.store.decision_count() == decisions and p.status().labelled == 6
    # The next run builds the graph and does the verb.
    rc, err, out, _ = _on_a_terminal([args[0], folder, *args[1:]])
    assert rc == 0, err
    assert len(_graph_files(folder)) == 1


def test_a_wrong_label_or_group_is_refused_before_any_build(folder):
    for args, words in ((["review", folder, "nothing"], "no photo carries the label"),
                        (["split", folder, "99999"], "no group 99999")):
        r = subprocess.run(_command(*args), cwd=ROOT, capture_output=True, text=True, timeout=300)
        assert r.returncode == 1 and words in r.stderr and len(r.stderr.splitlines()) == 1
        assert not _graph_files(folder)
