"""Scanning on a Dask cluster (core/cluster_scan.py): the same result as an in-process scan, a killed
worker costs only its chunk, cancel keeps what finished, a lost scheduler is one line and the next scan
carries on. The reference for "the same" is the in-process scan of the same folder (scikit-image's sample
photos, tests/conftest.py); the cluster is Dask distributed's own LocalCluster / `dask scheduler` and
`dask worker` programs, all bound to 127.0.0.1."""
from __future__ import annotations

import json
import os
import shutil
import tempfile
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")

from core import cluster_scan  # noqa: E402
from core.project import STORE_DIR, Project, ProjectError  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
CHUNK = 4


@pytest.fixture(scope="module")
def client():
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                       dashboard_address=None, silence_logs=50)
    c = distributed.Client(cluster)
    yield c
    c.close()
    cluster.close()


def _fresh_copy(scanned_template, tmp_path) -> Path:
    dest = tmp_path / "photos"
    shutil.copytree(scanned_template, dest, ignore=shutil.ignore_patterns(STORE_DIR))
    return dest


def _state(folder: Path):
    with Project.open(folder, annotator="tester") as p:
        rows = {r.path: r.fingerprint for r in p._rows}
        feats = {r.path: p.features()[i] for i, r in enumerate(p._rows)}
        first = [g.members for g in p.propose(limit=3)]
        return rows, feats, first


def _assert_same(folder: Path, reference: Path):
    rows, feats, first = _state(folder)
    # The reference is the session's scanned template: read a copy, since proposing writes open groups
    # (and a graph cache) into the store that every later test copies.
    with tempfile.TemporaryDirectory() as tmp:
        ref_rows, ref_feats, ref_first = _state(Path(shutil.copytree(reference, Path(tmp) / "ref", symlinks=True)))
    assert rows == ref_rows                                   # same photos, same fingerprints
    worst = max(float(np.abs(feats[p] - ref_feats[p]).max()) for p in rows)
    assert worst < 1e-4, worst
    assert first == ref_first                                 # the same first proposals


def test_two_workers_give_the_in_process_result(scanned_template, tmp_path, client):
    folder = _fresh_copy(scanned_template, tmp_path)
    seen = []
    with Project.open(folder, annotator="tester") as p:
        rep = p.scan(cluster=client, chunk=CHUNK, progress=lambda d, n, m: seen.append((d, n, m)))
    assert rep.embedded == 30 and not rep.cancelled
    assert [s for s in rep.skipped if s[0] == "b/broken.jpg"]  # the damaged photo is reported, as in-process
    assert seen[-1][2].startswith("done: 30 embedded, 1 could not be read")
    _assert_same(folder, scanned_template)


def test_bytes_sent_from_the_client_give_the_same_result(scanned_template, tmp_path, client):
    folder = _fresh_copy(scanned_template, tmp_path)
    with Project.open(folder, annotator="tester") as p:
        rep = p.scan(cluster=client, chunk=8, transfer="bytes")
    assert rep.embedded == 30
    _assert_same(folder, scanned_template)


def test_a_worker_killed_mid_scan_costs_only_its_chunk(scanned_template, tmp_path, client):
    folder = _fresh_copy(scanned_template, tmp_path)
    pids = list(client.run(os.getpid).values())
    killed = []

    def progress(done, total, message):
        if done >= CHUNK and not killed and message.startswith("embedded"):
            os.kill(pids[0], signal.SIGKILL)   # a worker process dies while it has work
            killed.append(pids[0])

    with Project.open(folder, annotator="tester") as p:
        rep = p.scan(cluster=client, chunk=CHUNK, progress=progress)
    assert killed and rep.embedded == 30 and not rep.cancelled
    client.wait_for_workers(2, timeout=60)    # the nanny brings it back for the next test
    _assert_same(folder, scanned_template)


def test_cancel_mid_scan_keeps_what_finished_and_the_next_scan_carries_on(scanned_template, tmp_path, client):
    folder = _fresh_copy(scanned_template, tmp_path)
    stored = []

    def progress(done, total, message):
        if done >= CHUNK and message.startswith("embedded"):
            stored.append(done)

    with Project.open(folder, annotator="tester") as p:
        rep = p.scan(cluster=client, chunk=CHUNK, progress=progress, cancel=lambda: bool(stored))
        assert rep.cancelled and 0 < rep.embedded < 30
        assert len(p.photos()) == rep.embedded                   # what finished is usable now
        first = rep.embedded
        rep2 = p.scan(cluster=client, chunk=CHUNK)
    assert rep2.embedded == 30 - first                           # a finished chunk is never redone
    _assert_same(folder, scanned_template)


def _start(args, cwd):
    return subprocess.Popen([sys.executable, "-m", *args], cwd=cwd, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)


def test_scheduler_gone_is_one_line_and_the_next_scan_carries_on(scanned_template, tmp_path):
    folder = _fresh_copy(scanned_template, tmp_path)
    sched_file = tmp_path / "scheduler.json"
    scheduler = _start(["distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
                        "--scheduler-file", str(sched_file)], ROOT)
    worker = None
    try:
        deadline, address = time.monotonic() + 60, None
        while address is None and time.monotonic() < deadline:
            try:  # the file appears before it is whole
                address = json.loads(sched_file.read_text())["address"]
            except (OSError, ValueError, KeyError):
                time.sleep(0.2)
        assert address, "the scheduler did not start"
        worker = _start(["distributed.cli.dask_worker", address, "--nthreads", "1", "--no-dashboard",
                         "--host", "127.0.0.1"], ROOT)

        def progress(done, total, message):
            if done >= CHUNK and message.startswith("embedded") and scheduler.poll() is None:
                os.kill(scheduler.pid, signal.SIGKILL)

        with Project.open(folder, annotator="tester") as p:
            with pytest.raises(ProjectError) as err:
                p.scan(cluster=address, chunk=CHUNK, progress=progress)
            message = str(err.value)
            assert "\n" not in message and "lost the Dask scheduler" in message, message
            kept = len(p.photos())
            assert 0 < kept < 30                          # the finished chunks are stored
            rep = p.scan()                                # in-process this time: carries on
        assert rep.embedded == 30 - kept
    finally:
        for proc in (worker, scheduler):
            if proc is not None and proc.poll() is None:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(10)
    _assert_same(folder, scanned_template)


def test_unreachable_scheduler_and_bad_targets_are_one_line(tmp_path, monkeypatch):
    monkeypatch.setattr(cluster_scan, "CONNECT_SECONDS", 1)
    (tmp_path / "p").mkdir()
    from PIL import Image

    Image.new("RGB", (40, 30), (200, 10, 10)).save(tmp_path / "p" / "red.png")
    with Project.open(tmp_path / "p", annotator="tester") as p:
        with pytest.raises(ProjectError) as err:
            p.scan(cluster="tcp://127.0.0.1:9")   # the discard port: nothing listens
        assert "cannot reach the Dask scheduler at tcp://127.0.0.1:9" in str(err.value)
        assert "\n" not in str(err.value)
        assert len(p.store.photos()) == 1          # the catalogue was stored all the same
        for bad in ("http://x:1", "tcp://host", "0", "many", -3):
            with pytest.raises(ProjectError):
                p.scan(cluster=bad)


def test_cli_workers_as_a_subprocess(scanned_template, tmp_path):
    folder = _fresh_copy(scanned_template, tmp_path)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    run = subprocess.run([sys.executable, "-m", "app.cli", "scan", str(folder), "--workers", "1", "--chunk", "8",
                          "--json"], cwd=ROOT, env=env, capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    assert json.loads(run.stdout)["embedded"] == 30
    _assert_same(folder, scanned_template)
    bad = subprocess.run([sys.executable, "-m", "app.cli", "scan", str(folder), "--cluster", "udp://x"],
                         cwd=ROOT, env=env, capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1, bad.stderr


def test_the_window_scans_where_the_start_page_says(scanned_template, tmp_path, client, qtbot):
    """The start page's "Embed photos on", typed with real key events: a scheduler's address sends the
    scan's chunks there (seen in the scheduler's task stream) and is remembered; nonsense is refused in one
    line before anything is opened."""
    from PySide6.QtCore import QSettings, Qt
    from PySide6.QtTest import QTest

    from app.main_window import MainWindow

    folder = _fresh_copy(scanned_template, tmp_path)
    settings = QSettings(str(tmp_path / "settings.ini"), QSettings.Format.IniFormat)
    w = MainWindow(settings)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    field = w.start.scan_on
    QTest.mouseClick(field, Qt.MouseButton.LeftButton)
    QTest.keyClicks(field, "0")
    assert not w.open_folder(str(folder))
    assert w.project is None and "Embed photos on:" in w.start.error.text()
    field.selectAll()
    QTest.keyClicks(field, client.scheduler.address)
    with distributed.get_task_stream(client) as stream:
        with qtbot.waitSignal(w.groups_shown, timeout=300_000):
            assert w.open_folder(str(folder))
    assert sum(t["key"].startswith("kinfold-embed") for t in stream.data) >= 1
    assert len(w.project.photos()) == 30
    assert settings.value("scan_on") == client.scheduler.address
    w.close_folder()
    again = MainWindow(settings)
    qtbot.addWidget(again)
    assert again.start.scan_on.text() == client.scheduler.address
    _assert_same(folder, scanned_template)


def test_a_worker_that_cannot_build_the_extractor_refuses_in_one_line():
    out = cluster_scan.embed_chunk([b"x"], "no-such-model", "fp32", "no-such-model:x:fp32")
    assert out.keys() == {"refused"} and "no-such-model" in out["refused"] and "\n" not in out["refused"]
