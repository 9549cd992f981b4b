"""Scanning hostile folders: nothing lost, nothing hung (issue 17, items 3, 5, 6, 14, 15, 17).

Every test builds its hostile files itself (named pipes, sockets, symbolic links, names that are
not UTF-8, sparse multi-gigabyte files, injected I/O errors). Whatever could hang runs in a
subprocess with a timeout, so a regression fails instead of stopping the suite."""
from __future__ import annotations

import errno
import json
import os
import shutil
import signal
import stat
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageFile

from core import catalogue
from core.project import Project, ProjectError

ROOT = Path(__file__).resolve().parent.parent


def kinfold(*args, cwd=None, timeout=300):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "app.cli", *args], capture_output=True, text=True,
                          cwd=cwd, env=env, timeout=timeout)


def _photo(path, seed: int) -> bytes:
    """A small real JPEG (a crop of scikit-image's astronaut photo) that no other test folder has."""
    from skimage import data

    img = Image.fromarray(data.astronaut())
    rng = np.random.default_rng(seed)
    x, y = (int(v) for v in rng.integers(0, 150, 2))
    img.crop((x, y, x + 300, y + 300)).save(path, quality=90)
    with open(path, "rb") as f:
        return f.read()


def _huge_photo(path, gigabytes: int) -> None:
    """A readable JPEG header followed by a sparse tail: cheap to make, slow to fingerprint."""
    _photo(path, 99)
    with open(path, "r+b") as f:
        f.truncate(gigabytes << 30)


def _no_absolute_path(text: str, tmp_path: Path) -> bool:
    """No path of this test session (the photo folder, its moved copy, the template it was copied
    from) appears in `text`."""
    return str(tmp_path.parent) not in text


# -- 3: a failure that may pass is not remembered --------------------------------------------------
def test_io_error_while_decoding_is_retried_at_the_next_scan(photo_project_folder, monkeypatch):
    _photo(photo_project_folder / "late.jpg", 1)
    real_load = ImageFile.ImageFile.load
    calls = []

    def failing_once(self):
        calls.append(1)
        if len(calls) == 1:  # the disk fails once, as EIO does
            raise OSError(errno.EIO, os.strerror(errno.EIO))
        return real_load(self)

    monkeypatch.setattr(ImageFile.ImageFile, "load", failing_once)
    with Project.open(photo_project_folder) as p:
        rep = p.scan()
        reasons = dict(rep.skipped)
        assert "Input/output error" in reasons["late.jpg"] and "tried again" in reasons["late.jpg"]
        assert "late.jpg" not in p.store.skipped()          # not remembered as unreadable
        assert rep.photos == 30 and rep.embedded == 0
        rep = p.scan()                                       # decoding works again
        assert "late.jpg" not in dict(rep.skipped)
        assert rep.embedded == 1 and rep.photos == 31 and "late.jpg" in p.photos()
        # A damaged file, by contrast, stays remembered as such.
        assert "cut short" in p.store.skipped()["b/broken.jpg"][2]


def test_network_failure_is_retried_at_the_next_scan(photo_project_folder, monkeypatch):
    _photo(photo_project_folder / "late.jpg", 2)
    with Project.open(photo_project_folder) as p:
        extractor = p.extractor()

        def out_of_memory(batch):
            raise RuntimeError("DefaultCPUAllocator: not enough memory")

        monkeypatch.setattr(extractor, "embed", out_of_memory)
        rep = p.scan()
        assert "not enough memory" in dict(rep.skipped)["late.jpg"] and rep.photos == 30
        assert "late.jpg" not in p.store.skipped()
        monkeypatch.undo()
        rep = p.scan()
        assert rep.embedded == 1 and rep.photos == 31 and "late.jpg" not in dict(rep.skipped)


def test_read_error_while_fingerprinting_keeps_the_photo_and_is_retried(photo_project_folder, monkeypatch):
    victim = "a/chelsea_1.jpg"
    with Project.open(photo_project_folder) as p:
        p.label([victim], "cat")
    os.utime(photo_project_folder / victim)                  # touched: the next scan reads it again
    real = catalogue.fingerprint

    def failing(f, stop=None):
        if os.fstat(f.fileno()).st_ino == os.stat(photo_project_folder / victim).st_ino:
            raise OSError(errno.EIO, os.strerror(errno.EIO))
        return real(f, stop)

    monkeypatch.setattr(catalogue, "fingerprint", failing)
    with Project.open(photo_project_folder) as p:
        rep = p.scan()
        assert "Input/output error" in dict(rep.skipped)[victim] and rep.removed == 0
        assert victim in p.photos() and p.photo_info(victim)["label"] == "cat"   # nothing dropped
        assert victim not in p.store.skipped()
        monkeypatch.undo()
        rep = p.scan()
        assert victim not in dict(rep.skipped) and rep.photos == 30


def test_folder_that_cannot_be_listed_keeps_its_photos(photo_project_folder, monkeypatch):
    with Project.open(photo_project_folder) as p:
        p.label(["b/coffee_1.jpg"], "coffee")
    real = os.scandir
    failing = str(photo_project_folder / "b")

    def scandir(path="."):
        if os.fspath(path) == failing:  # as a failing disk or a network share that dropped out
            raise OSError(errno.EIO, os.strerror(errno.EIO))
        return real(path)

    monkeypatch.setattr(catalogue.os, "scandir", scandir)
    with Project.open(photo_project_folder) as p:
        rep = p.scan()
        assert "cannot open the folder: Input/output error" in dict(rep.skipped)["b"]
        assert rep.removed == 0 and rep.photos == 30
        assert p.photo_info("b/coffee_1.jpg")["label"] == "coffee"
        assert "cut short" in p.store.skipped()["b/broken.jpg"][2]   # its remembered skips stay too
        monkeypatch.undo()
        rep = p.scan()
        assert "b" not in dict(rep.skipped) and rep.photos == 30


def test_skips_remembered_by_an_older_kinfold_are_looked_at_again(photo_project_folder):
    """Stores written before this rule hold passing failures as final skips, with absolute paths."""
    late = photo_project_folder / "late.jpg"
    _photo(late, 3)
    st = late.stat()
    with Project.open(photo_project_folder) as p:
        old = dict(p.store.skipped())
        old["late.jpg"] = (st.st_size, st.st_mtime_ns, "cannot read: Input/output error")
        old["b/broken.jpg"] = old["b/broken.jpg"][:2] + (f"image data is cut short: {photo_project_folder}/b/broken.jpg",)
        p.store.replace_catalogue(p.store.photos(), old)
        p.store.set_setting("skipped_format", 1)
        rep = p.scan()
        assert "late.jpg" in p.photos() and rep.embedded == 1
        assert _no_absolute_path(p.store.skipped()["b/broken.jpg"][2], photo_project_folder)


# -- 5: named pipes, devices, cancel and Ctrl+C ----------------------------------------------------
def test_named_pipe_called_jpg_does_not_hang_the_scan(tmp_path):
    folder = tmp_path / "photos"
    folder.mkdir()
    _photo(folder / "one.jpg", 4)
    _photo(folder / "two.jpg", 5)
    os.mkfifo(folder / "x.jpg")
    try:
        os.mknod(folder / "socket.jpg", stat.S_IFSOCK | 0o600)
        has_socket = True
    except OSError:  # mknod of a socket needs no privilege on Linux, but not every system allows it
        has_socket = False
    os.symlink("x.jpg", folder / "link-to-pipe.jpg")
    r = kinfold("scan", str(folder), "--json", timeout=240)
    assert r.returncode == 0, r.stderr
    rep = json.loads(r.stdout)
    reasons = dict(rep["skipped"])
    assert rep["photos"] == 2
    assert "named pipe" in reasons["x.jpg"] and "not a regular file" in reasons["x.jpg"]
    assert "named pipe" in reasons["link-to-pipe.jpg"]
    if has_socket:
        assert "socket" in reasons["socket.jpg"]
    Project.open(folder).close()                             # the lock was released


def test_cancel_during_fingerprinting_returns_promptly(tmp_path):
    folder = tmp_path / "photos"
    folder.mkdir()
    _photo(folder / "small.jpg", 6)
    for i in range(3):
        _huge_photo(folder / f"huge{i}.jpg", 2)              # about 10 s of hashing on this machine
    asked = threading.Event()
    with Project.open(folder) as p:
        threading.Timer(0.5, asked.set).start()
        t0 = time.monotonic()
        rep = p.scan(cancel=asked.is_set)
        after_cancel = time.monotonic() - t0 - 0.5
        assert rep.cancelled
        assert after_cancel < 3.0, f"the scan went on {after_cancel:.1f} s after cancel"
        # Cut short by the cancel, the huge files are neither catalogued nor taken for unreadable.
        assert not any(path.startswith("huge") for path in [*p.store.skipped(), *(r.path for r in p.store.photos())])


def test_cancel_at_once_loses_nothing(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        p.label(["a/chelsea_0.jpg"], "cat")
        skipped = p.store.skipped()
        rep = p.scan(cancel=lambda: True)
        assert rep.cancelled and rep.photos == 30 and rep.removed == 0
        assert p.store.skipped() == skipped and p.photo_info("a/chelsea_0.jpg")["label"] == "cat"


def test_ctrl_c_stops_a_cli_scan_and_releases_the_folder(tmp_path):
    folder = tmp_path / "photos"
    folder.mkdir()
    _photo(folder / "small.jpg", 7)
    for i in range(3):
        _huge_photo(folder / f"huge{i}.jpg", 2)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([sys.executable, "-m", "app.cli", "scan", str(folder)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        store = folder / ".kinfold" / "kinfold.sqlite"
        deadline = time.monotonic() + 60
        while not store.exists() and time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.05)
        time.sleep(1.0)                                      # now fingerprinting the huge files
        assert proc.poll() is None, proc.communicate()
        proc.send_signal(signal.SIGINT)
        t0 = time.monotonic()
        out, err = proc.communicate(timeout=30)
        elapsed = time.monotonic() - t0
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 130, err
    assert elapsed < 5.0, f"Ctrl+C took {elapsed:.1f} s to stop the scan"
    assert err.count("\n") == 1 and "interrupted" in err and "Traceback" not in err
    Project.open(folder).close()                             # the lock was released


# -- 6: names that are not UTF-8 ---------------------------------------------------------------------
def test_name_that_is_not_utf8_is_skipped_with_its_name_shown(photo_project_folder, tmp_path):
    base = os.fsencode(photo_project_folder)
    _photo(base + b"/bad\xff.jpg", 8)
    os.mkdir(base + b"/dir\xfe")
    _photo(base + b"/dir\xfe/inside.jpg", 9)
    with Project.open(photo_project_folder) as p:
        rep = p.scan()
        reasons = dict(rep.skipped)
        assert rep.photos == 30                              # the scan went on
        assert "not valid UTF-8" in reasons["bad\\xff.jpg"]
        assert "folder name is not valid UTF-8" in reasons["dir\\xfe"]
        for path, (_, _, reason) in p.store.skipped().items():
            (path + reason).encode("utf-8")                  # the store holds text that encodes
    r = kinfold("scan", str(photo_project_folder))
    assert r.returncode == 0 and "skipped bad\\xff.jpg:" in r.stdout, r.stderr
    r = kinfold("status", str(photo_project_folder), "--json")
    assert r.returncode == 0 and json.loads(r.stdout)["photos"] == 30


# -- 14: skip reasons hold relative paths ------------------------------------------------------------
def test_skip_reasons_name_no_absolute_path_and_survive_a_move(photo_project_folder, tmp_path):
    with Project.open(photo_project_folder) as p:
        rep = p.scan()
        assert dict(rep.skipped)["b/broken.jpg"]
        assert all(_no_absolute_path(path + reason, tmp_path) for path, reason in rep.skipped)
    moved = tmp_path / "moved"
    shutil.move(photo_project_folder, moved)
    with Project.open(moved) as p:
        rep = p.scan()
        for path, reason in rep.skipped:
            assert not path.startswith("/") and _no_absolute_path(reason, tmp_path)
        for path, (_, _, reason) in p.store.skipped().items():
            assert not path.startswith("/") and _no_absolute_path(reason, tmp_path)


# -- 15: symbolic links ---------------------------------------------------------------------------------
def test_symbolic_links_rule_for_catalogue_and_export(photo_project_folder, tmp_path):
    outside = tmp_path / "outside"
    outside.mkdir()
    secret = _photo(outside / "private.jpg", 10)
    _photo(outside / "other.jpg", 11)
    f = photo_project_folder
    os.symlink(f / "a" / "chelsea_0.jpg", f / "link-inside.jpg")       # to a photo in the folder
    os.symlink(outside / "private.jpg", f / "link-outside.jpg")        # to a photo elsewhere
    os.symlink(outside, f / "linked-folder")                           # to a folder elsewhere
    os.symlink(f / "a", f / "b" / "linked-a")                          # to a folder inside
    os.symlink(f / "nowhere.jpg", f / "dangling.jpg")
    with Project.open(f) as p:
        rep = p.scan()
        reasons = dict(rep.skipped)
        assert "link-inside.jpg" in p.photos() and rep.photos == 31
        info = p.photo_info("link-inside.jpg")
        assert info["fingerprint"] == p.photo_info("a/chelsea_0.jpg")["fingerprint"]
        assert "outside the folder" in reasons["link-outside.jpg"]
        assert "symbolic link to a folder" in reasons["linked-folder"]
        assert "symbolic link to a folder" in reasons["b/linked-a"]
        assert "does not exist" in reasons["dangling.jpg"]
        assert not any(path.startswith("linked-folder/") for path in p.photos())
        p.label(p.photos(), "thing")
        out = tmp_path / "export"
        p.export_folders(out, mode="copy")
        p.export_csv(tmp_path / "labels.csv")
    exported = [q for q in out.rglob("*") if q.is_file() and not q.name.startswith(".")]
    assert len(exported) == 31
    assert not any(q.read_bytes() == secret for q in exported)         # nothing from outside
    assert "link-outside.jpg" not in (tmp_path / "labels.csv").read_text()


# -- 17: the folder and store arguments ---------------------------------------------------------------
def test_empty_folder_argument_is_refused(tmp_path):
    with pytest.raises(ProjectError, match="empty"):
        Project.open("")
    with pytest.raises(ProjectError, match="empty"):
        Project.open(tmp_path, store="")
    _photo(tmp_path / "here.jpg", 12)
    r = kinfold("scan", "", cwd=tmp_path)
    assert r.returncode == 1 and r.stderr.count("\n") == 1 and "empty" in r.stderr
    assert not (tmp_path / ".kinfold").exists()                       # the current folder was not scanned


def test_store_inside_the_photo_folder_is_refused(photo_project_folder, tmp_path):
    f = photo_project_folder
    for inside in (f / "a", f / "new-store", f):
        with pytest.raises(ProjectError, match="inside the photo folder"):
            Project.open(f, store=inside)
    with Project.open(f, store=f / ".other-store") as p:             # hidden: never scanned anyway
        assert p.scan().photos == 30
    with Project.open(f, store=tmp_path / "elsewhere") as p:
        assert p.store.directory == (tmp_path / "elsewhere").resolve()
    r = kinfold("scan", str(f), "--store", str(f / "a"))
    assert r.returncode == 1 and r.stderr.count("\n") == 1 and "inside the photo folder" in r.stderr
    assert not (f / "a" / "kinfold.sqlite").exists()
