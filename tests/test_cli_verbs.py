"""Issue 20, command line: --version, help for every argument, aligned text output (--json unchanged),
the verbs later, clear, restore, review and stats, --wait on a folder another process holds, the scan's
progress bar (only on a terminal), and the exports' split column / one COCO file per split. Every verb
runs as a subprocess, as a user runs it. One small project (36 photos made from scikit-image's sample
photos) is scanned once for the module; each test works on its own copy."""

import csv
import json
import os
import pty
import re
import select
import shutil
import subprocess
import sys
import time
import tomllib
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from core.export import WHY_LINKS
from core.project import Project

ROOT = Path(__file__).resolve().parent.parent
NAMES = ("chelsea", "coffee", "rocket")


def _command(*args) -> list[str]:
    return [sys.executable, "-m", "app.cli", *map(str, args)]


def kinfold(*args, ok: bool = True, **kw):
    r = subprocess.run(_command(*args), cwd=ROOT, capture_output=True,
                       text=True, timeout=300, **kw)
    if ok:
        assert r.returncode == 0, (args, r.stderr)
        assert r.stderr == "" or "Traceback" not in r.stderr
    return r


def one_line(r, status: int = 1) -> str:
    assert r.returncode == status, (r.returncode, r.stderr)
    assert "Traceback" not in r.stderr
    lines = r.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("kinfold"), r.stderr
    return lines[0]


def _make_photos(folder: Path, per_name: int = 12) -> None:
    from PIL import Image, ImageEnhance
    from skimage import data

    folder.mkdir(parents=True)
    rng = np.random.default_rng(0)
    for name in NAMES:
        img = Image.fromarray(getattr(data, name)()).convert("RGB").resize((160, 120))
        for k in range(per_name):
            w, h = img.size
            box = (int(rng.integers(0, w // 6)), int(rng.integers(0, h // 6)), w - int(rng.integers(0, w // 6)),
                   h - int(rng.integers(0, h // 6)))
            ImageEnhance.Brightness(img.crop(box)).enhance(0.7 + 0.05 * k).save(folder / f"{name}_{k:02d}.jpg")


_TERMINAL: dict = {}      # what the module's scan showed on its terminal


def _scan_on_a_terminal(folder: Path) -> tuple[bytes, str]:
    """`kinfold scan FOLDER` with stderr a terminal (a pseudo-terminal): (what stderr showed, stdout)."""
    master, slave = pty.openpty()
    proc = subprocess.Popen([sys.executable, "-m", "app.cli", "scan", str(folder)], cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=slave, text=True)
    os.close(slave)
    err = b""
    while True:
        ready, _, _ = select.select([master], [], [], 300)
        if not ready:
            break
        try:
            chunk = os.read(master, 4096)
        except OSError:                              # the terminal closed with the process
            break
        if not chunk:
            break
        err += chunk
    out, _ = proc.communicate(timeout=300)
    os.close(master)
    assert proc.returncode == 0, err
    return err, out


@pytest.fixture(scope="module")
def scanned(tmp_path_factory):
    """The module's project, scanned once by the CLI on a terminal (the progress-bar test reads it)."""
    folder = tmp_path_factory.mktemp("cli-verbs") / "photos"
    _make_photos(folder)
    err, out = _scan_on_a_terminal(folder)
    _TERMINAL["scan"] = (err, out)
    return folder


@pytest.fixture
def folder(scanned, tmp_path):
    dest = tmp_path / "photos"
    shutil.copytree(scanned, dest, symlinks=True)
    return dest


def _label_by_name(folder, names=NAMES, annotator="tester"):
    with Project.open(folder, annotator=annotator) as p:
        for name in names:
            p.label([x for x in p.photos() if x.startswith(name)], name)


# ---------------------------------------------------------------------------- version and help

def test_version_and_a_help_text_for_every_argument():
    with open(ROOT / "pyproject.toml", "rb") as f:
        version = tomllib.load(f)["project"]["version"]
    assert kinfold("--version").stdout.strip() == f"kinfold {version}"

    from app.cli import build_parser
    ap = build_parser()
    verbs = next(a for a in ap._actions if a.dest == "command").choices
    missing = [f"{name} {a.dest}" for name, sp in verbs.items() for a in sp._actions if not a.help]
    assert missing == [] and {"later", "clear", "restore", "review", "stats"} <= set(verbs)
    text = kinfold("stats", "--help").stdout
    assert "--wait SECONDS" in text and "--csv FILE" in text and "the photo folder" in text


# ---------------------------------------------------------------------------- aligned text, JSON unchanged

def test_status_text_is_aligned_and_agrees_with_json(folder):
    _label_by_name(folder, NAMES[:2])
    data = json.loads(kinfold("status", folder, "--json").stdout)
    assert set(data) == {"photos", "labelled", "set_aside", "unlabelled", "by_label", "actions", "skipped",
                         "relearned_version"}
    text = kinfold("status", folder).stdout
    head, _, labels = text.partition("\n\n")
    rows = dict(re.split(r"\s{2,}", line.strip()) for line in head.splitlines())
    assert rows["photos"] == str(data["photos"]) == "36" and rows["labelled"] == str(data["labelled"]) == "24"
    assert rows["set aside"] == "0" and rows["unlabelled"] == "12" and rows["actions"] == "2"
    ends = {len(line) for line in head.splitlines() if line.split()[-1].isdigit()}
    assert len(ends) == 1                        # the numbers right-aligned in one column
    lines = labels.splitlines()
    assert lines[0].split() == ["label", "photos"]
    assert {l.split()[0]: int(l.split()[1]) for l in lines[1:]} == data["by_label"]


# ---------------------------------------------------------------------------- later, clear, restore, review, split

def test_later_split_clear_restore_and_review(folder):
    groups = json.loads(kinfold("propose", folder, "--json", "--limit", "3").stdout)
    first, second = groups[0], groups[1]
    out = kinfold("later", folder, first["id"]).stdout
    assert f"group {first['id']} left for later" in out and f"its {len(first['members'])} photos" in out
    with Project.open(folder) as p:
        assert len(p.store.deferred()) == len(first["members"])
        assert {d["kind"] for d in p.store.decisions()} == {"later"}
    assert "no longer open" in one_line(kinfold("accept", folder, first["id"], "x", ok=False))

    out = kinfold("split", folder, second["id"]).stdout
    assert out.startswith(f"group {second['id']} split in 2")
    parts = re.findall(r"^group (\d+): (\d+) photos$", out, re.M)
    assert len(parts) == 2 and sum(int(n) for _, n in parts) == len(second["members"])

    _label_by_name(folder)
    aside = [f"{NAMES[0]}_00.jpg", f"{NAMES[0]}_01.jpg", f"{NAMES[0]}_02.jpg"]
    kinfold("set-aside", folder, *aside)
    out = kinfold("restore", folder, aside[0]).stdout
    assert out.startswith("1 set-aside photo back in the pool") and re.search(r"^set aside\s+2$", out, re.M)
    line = one_line(kinfold("restore", folder, f"{NAMES[1]}_00.jpg", ok=False))
    assert "is not set aside (it is labelled)" in line and "kinfold clear" in line
    data = json.loads(kinfold("restore", folder, "--json").stdout)
    assert sorted(data["restored"]) == aside[1:] and data["status"]["set_aside"] == 0
    assert data["status"]["unlabelled"] == 3

    st = json.loads(kinfold("clear", folder, f"{NAMES[1]}_00.jpg", f"{NAMES[1]}_01.jpg", "--json").stdout)
    assert st["by_label"][NAMES[1]] == 10 and st["unlabelled"] == 5

    # review: the same order as Project.review, least typical first, in text and JSON.
    with Project.open(folder, lock=False) as p:
        expected = p.review(NAMES[2])
    listed = json.loads(kinfold("review", folder, NAMES[2], "--json", "--limit", "5").stdout)
    assert [r["path"] for r in listed] == [path for path, _ in expected[:5]]
    assert [r["typicality"] for r in listed] == sorted(r["typicality"] for r in listed)
    text = kinfold("review", folder, NAMES[2], "--limit", "3").stdout.splitlines()
    assert text[0].startswith(f"12 photos labelled '{NAMES[2]}'")
    assert [l.split()[1] for l in text[2:5]] == [path for path, _ in expected[:3]]
    assert text[-1] == "... 9 more (--limit)"
    assert "no photo carries the label" in one_line(kinfold("review", folder, "nothing", ok=False))


# ---------------------------------------------------------------------------- --wait

def _hold(folder):
    """Another process that holds the folder open (its lock) until a line arrives on its stdin, so the
    test, not the machine's speed, decides when it lets go."""
    code = ("import sys; from core.project import Project; p = Project.open(sys.argv[1]); "
            "print('held', flush=True); sys.stdin.readline(); p.close(); print('let go', flush=True)")
    holder = subprocess.Popen([sys.executable, "-c", code, str(folder)], cwd=ROOT,
                              stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    assert holder.stdout.readline().strip() == "held"
    return holder


def test_wait_for_a_folder_another_process_holds(folder):
    holder = _hold(folder)
    try:
        line = one_line(kinfold("label", folder, "cat", f"{NAMES[0]}_00.jpg", ok=False))
        assert "already open in another Kinfold window or command" in line and "--wait SECONDS" in line
        # The holder never lets go on its own: the command gives up after its wait, with one line.
        line = one_line(kinfold("label", folder, "cat", f"{NAMES[0]}_00.jpg", "--wait", "0.5", ok=False))
        assert "still open" in line and "after waiting 0.5 s" in line
        waiting = subprocess.Popen(_command("label", folder, "cat", f"{NAMES[0]}_00.jpg", "--wait", "120",
                                            "--json"), cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                   text=True)
        time.sleep(3)
        assert waiting.poll() is None                # still waiting while the folder is held
        holder.stdin.write("go\n")
        holder.stdin.flush()
        assert holder.stdout.readline().strip() == "let go"
        out, err = waiting.communicate(timeout=120)
        assert waiting.returncode == 0, err
        assert json.loads(out)["by_label"] == {"cat": 1}
    finally:
        holder.kill()
        holder.wait()
    assert "--wait" in one_line(kinfold("status", folder, "--wait", "soon", ok=False), 2)


# ---------------------------------------------------------------------------- scan progress bar

def test_scan_shows_a_progress_bar_only_on_a_terminal(folder):
    err, out = _TERMINAL["scan"]
    assert re.search(rb"\r\S.*\[#*\s*\] \d+/\d+", err), err   # "\r<step> [####   ] done/total"
    assert "36 photos ready (36 new" in out
    # The same bar with stderr a pipe (relearn uses it too, and loads no model): nothing on stderr.
    _label_by_name(folder, NAMES[:2])
    r = kinfold("relearn", folder)
    assert r.stderr == "" and re.search(r"^version\s+1$", r.stdout, re.M)


# ---------------------------------------------------------------------------- exports

def test_export_with_a_split_csv_column_coco_per_split_and_folders(folder, tmp_path):
    from pycocotools.coco import COCO

    _label_by_name(folder)
    out = tmp_path / "out"
    out.mkdir()
    r = kinfold("export", folder, "--csv", out / "labels.csv", "--coco", out / "labels.json",
                "--folders", out / "classes", "--split", "0.5,0.25,0.25")
    assert "symbolic links to the photos" in r.stdout and WHY_LINKS in r.stdout
    assert re.search(r"^coco train\s+\S+labels-train\.json\s+18\s+images, 3 categories$", r.stdout, re.M)

    # The CSV read back with Python's csv module (RFC 4180).
    with open(out / "labels.csv", newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    assert list(rows[0]) == ["path", "label", "how", "annotator", "time", "split"]
    split_of = {row["path"]: row["split"] for row in rows}
    assert Counter(split_of.values()) == {"train": 18, "val": 9, "test": 9}
    for name in NAMES:                               # stratified: each label 6 / 3 / 3
        assert Counter(s for p, s in split_of.items() if p.startswith(name)) == {"train": 6, "val": 3, "test": 3}

    # One COCO file per split, each loaded by pycocotools; category ids agree across files.
    seen, categories = {}, set()
    for part in ("train", "val", "test"):
        coco = COCO(str(out / f"labels-{part}.json"))
        cats = {c["id"]: c["name"] for c in coco.loadCats(coco.getCatIds())}
        categories.add(tuple(sorted(cats.items())))
        for img in coco.loadImgs(coco.getImgIds()):
            ann = coco.loadAnns(coco.getAnnIds(imgIds=[img["id"]]))
            assert len(ann) == 1
            seen[img["file_name"]] = (part, cats[ann[0]["category_id"]])
    assert len(categories) == 1 and len(next(iter(categories))) == 3
    assert seen == {row["path"]: (row["split"], row["label"]) for row in rows}
    assert not (out / "labels.json").exists()

    # The class folders agree with the CSV's split column.
    in_folders = {p.name: p.relative_to(out / "classes").parts[0] for p in (out / "classes").rglob("*.jpg")}
    assert in_folders == split_of

    # Without a split: the CSV has no split column, one COCO file; copies say so.
    r = kinfold("export", folder, "--csv", out / "plain.csv", "--coco", out / "plain.json",
                "--folders", out / "copies", "--mode", "copy")
    assert "hold copies, as asked" in r.stdout and WHY_LINKS in r.stdout
    with open(out / "plain.csv", newline="", encoding="utf-8") as f:
        assert next(csv.reader(f)) == ["path", "label", "how", "annotator", "time"]
    assert len(COCO(str(out / "plain.json")).getImgIds()) == 36
    assert not any(p.is_symlink() for p in (out / "copies").rglob("*.jpg"))
    data = json.loads(kinfold("export", folder, "--csv", out / "plain.csv", "--json").stdout)
    assert data == {"csv": {"path": str(out / "plain.csv"), "rows": 36}}


# ---------------------------------------------------------------------------- stats

def test_stats_text_json_and_csv(folder, tmp_path):
    _label_by_name(folder, NAMES[:2], annotator="ana")
    _label_by_name(folder, NAMES[2:], annotator="bob")
    with Project.open(folder, lock=False) as p:
        expected = p.statistics().as_dict()
    data = json.loads(kinfold("stats", folder, "--json").stdout)
    assert data == expected
    assert data["by_label"] == {n: 12 for n in NAMES} and [a["annotator"] for a in data["annotators"]] == ["ana", "bob"]
    assert data["total"]["labels_given"] == 36

    text = kinfold("stats", folder).stdout
    assert text.startswith("36 photos, 36 labelled under 3 labels")
    assert re.search(r"^ana\s+2\s+24\s", text, re.M) and re.search(r"^everyone\s+3\s+36\s", text, re.M)

    target = tmp_path / "stats.csv"
    assert kinfold("stats", folder, "--csv", target).stdout.strip() == f"statistics written to {target}"
    with open(target, newline="", encoding="utf-8") as f:
        table = list(csv.reader(f))
    assert table[0] == ["figure", "annotator", "key", "value"]
    assert ["labels given", "bob", "", "12"] in table and ["photos", "", NAMES[0], "12"] in table
    line = one_line(kinfold("stats", folder, "--csv", target, ok=False))
    assert "exists" in line and "--overwrite" in line
    kinfold("stats", folder, "--csv", target, "--overwrite")
    line = one_line(kinfold("stats", folder, "--csv", folder / "stats.csv", ok=False))
    assert "inside the photo folder" in line and not (folder / "stats.csv").exists()


# ---------------------------------------------------------------------------- scan --network
def test_scan_with_the_larger_network_keeps_it_and_sets_the_old_relearning_aside(folder):
    _label_by_name(folder, NAMES[:2])
    with Project.open(folder) as p:
        p.relearn()                                   # a classifier fitted on Lite0's vectors
        assert p.store.active_relearn_version() is not None
        assert p.extractor_id.startswith("efficientnet-lite0-gem:")
    rep = json.loads(kinfold("scan", folder, "--network", "lite2", "--json").stdout)
    assert rep["embedded"] == 36                      # every photo embedded again by the other network
    with Project.open(folder) as p:
        assert p.extractor_id.startswith("efficientnet-lite2-gem:")
        assert p.store.active_relearn_version() is None        # not applied to Lite2's vectors
        assert p.status().labelled == 24                        # the labels stay
        assert p.features().shape == (36, 1280)
        # Each photo's nearest other photo comes from the same scikit-image sample photo.
        near = p.graph().idx[:, 0]
        src = [x.split("_")[0] for x in p.photos()]
        assert all(src[i] == src[j] for i, j in enumerate(near))
    # A later scan without --network keeps Lite2: nothing is embedded again.
    assert json.loads(kinfold("scan", folder, "--json").stdout)["embedded"] == 0
    bad = kinfold("scan", folder, "--network", "lite9", ok=False)
    assert bad.returncode == 2 and "invalid choice" in bad.stderr and "Traceback" not in bad.stderr
