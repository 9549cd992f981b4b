"""Reopening reads no photos: status() counted by SQLite (core/quick_status.py) until the catalogue
and label state are needed, with the same figures as the label state's arrays and as a plain count
over the store's tables; `kinfold status` imports none of the heavy libraries and maps no vectors."""
from __future__ import annotations

import dataclasses
import json
import os
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from core.project import Project
from core.store import PhotoRow, Store

ROOT = Path(__file__).resolve().parent.parent
EXTRACTOR = "test-stand-in:8"


def _store(folder: Path, n: int = 240) -> list[PhotoRow]:
    """n catalogued photos without image files: photo 0 and 1 share one content, photos 230.. are
    not embedded (not part of the catalogue), and one label row belongs to a content no photo has."""
    st = Store(folder / ".kinfold")
    rows = [PhotoRow(f"d{i % 3}/p{i:04d}.png", f"{(1 if i == 0 else i):032x}", 100, 0, 8, 8) for i in range(n)]
    st.replace_catalogue(rows, {"bad.png": (3, 0, "not a photo")})
    fps = sorted({r.fingerprint for r in rows[:230]})
    x = np.random.default_rng(0).random((len(fps), 8), dtype=np.float32)
    st.put_embeddings(EXTRACTOR, fps, x / np.linalg.norm(x, axis=1, keepdims=True))
    st.set_setting("extractor_id", EXTRACTOR)
    st.close()
    return rows


def _decide(folder: Path) -> None:
    """Decisions of every kind through the product's verbs."""
    with Project.open(folder, extractor=EXTRACTOR, annotator="t") as p:
        paths = p.photos()
        for k in range(6):
            members = paths[10 * k:10 * k + 10]
            [gid] = p.store.update_open_proposals([], [dict(members=members, trust=0.9, kind="group")])
            p.accept(gid, f"label {k % 4}", drop=members[-2:])
        p.label(paths[0:1], "label 0")                 # photo 0 shares its content with photo 1
        p.label(paths[100:105], "ünïcode label")
        p.set_aside(paths[110:117])
        [gid] = p.store.update_open_proposals([], [dict(members=paths[120:125], trust=0.5, kind="group")])
        p.defer(gid)
        p.clear(paths[100:102])
        p.label(paths[130:133], "gone soon")
        p.undo()                                        # takes "gone soon" back
    db = sqlite3.connect(folder / ".kinfold" / "kinfold.sqlite")
    with db:
        db.execute("INSERT INTO labels VALUES (?, 'labelled', 'orphan', 'single', 't', 'now')", ("f" * 32,))
    db.close()


def _plain_counts(folder: Path) -> dict:
    """The reference: the tables read whole and counted in Python, per catalogued path."""
    with sqlite3.connect(folder / ".kinfold" / "kinfold.sqlite") as db:
        photos = db.execute("SELECT path, fingerprint FROM photos").fetchall()
        embedded = {fp for (fp,) in db.execute("SELECT fingerprint FROM vector_rows WHERE extractor=?",
                                               (EXTRACTOR,))}
        labels = {fp: (s, lab) for fp, s, lab in db.execute("SELECT fingerprint, state, label FROM labels")}
        actions = db.execute("SELECT COUNT(*) FROM decisions WHERE kind != 'undo'").fetchone()[0]
    by_label: dict[str, int] = {}
    aside = total = 0
    for _, fp in photos:
        if fp not in embedded:
            continue
        total += 1
        s, lab = labels.get(fp, (None, None))
        if s == "labelled":
            by_label[lab] = by_label.get(lab, 0) + 1
        elif s == "set_aside":
            aside += 1
    labelled = sum(by_label.values())
    return dict(photos=total, labelled=labelled, set_aside=aside, unlabelled=total - labelled - aside,
                by_label=dict(sorted(by_label.items())), actions=actions, skipped=1, relearned_version=None)


@pytest.fixture
def decided(tmp_path):
    folder = tmp_path / "photos"
    folder.mkdir()
    _store(folder)
    _decide(folder)
    return folder


def test_status_on_reopen_reads_no_photo_and_counts_as_the_label_state(decided):
    expected = _plain_counts(decided)
    assert expected["photos"] == 230 and expected["set_aside"] == 7 and "orphan" not in expected["by_label"]
    assert expected["by_label"]["ünïcode label"] == 3
    with Project.open(decided, annotator="t") as p:
        quick = p.status()
        assert p._catalogue is None and p._labels is None and p._features_map is None   # nothing was read
        assert dataclasses.asdict(quick) == expected
        p.label_state                                    # now the arrays: the same figures
        assert p._labels is not None
        assert dataclasses.asdict(p.status()) == expected
        # A decision keeps both ways in step.
        p.label(p.photos()[200:204], "label 1")
        in_memory = dataclasses.asdict(p.status())
    with Project.open(decided, annotator="t") as p:
        assert dataclasses.asdict(p.status()) == in_memory == _plain_counts(decided)


def test_label_state_first_read_inside_a_transaction_is_not_applied_twice(decided):
    """A label state read from the tables after a decision was written but before it was committed
    already holds that decision: it must not be kept, or the commit would apply it a second time."""
    with Project.open(decided, annotator="t") as p:
        paths = p.photos()
        members = paths[150:156]
        [gid] = p.store.update_open_proposals([], [dict(members=members, trust=0.9, kind="group")])
        with p.store.transaction():
            p.set_aside(paths[160:161])                 # written, not committed, the state not read yet
            p.accept(gid, "label 2", drop=members[-1:])    # reads the state mid-transaction
            inside = p.label_state
            assert inside.not_label()[p._index[members[-1]], inside.names.index("label 2")]
        ls = p.label_state
        assert ls.decisions == p.store.decision_count()
        assert ls.not_label()[p._index[members[-1]], ls.names.index("label 2")]
        p.undo()
        ls = p.label_state
        assert not ls.not_label()[p._index[members[-1]]].any()     # the take-out went with the undo
        assert ls.decisions == p.store.decision_count()
        assert dataclasses.asdict(p.status()) == _plain_counts(decided)


def test_kinfold_status_imports_no_heavy_library_and_reads_no_vector(decided):
    code = ("import json, sys, app.cli\n"
            "rc = app.cli.main(['status', sys.argv[1], '--json'])\n"
            "heavy = [m for m in ('torch', 'faiss', 'scipy', 'sklearn', 'PIL', 'PySide6') if m in sys.modules]\n"
            "mapped = 'vectors-' in open('/proc/self/maps').read()\n"
            "print(json.dumps(dict(rc=rc, heavy=heavy, mapped=mapped)), file=sys.stderr)\n")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, "-c", code, str(decided)], cwd=ROOT, env=env, capture_output=True,
                       text=True, timeout=120)
    info = json.loads(r.stderr.strip().splitlines()[-1])
    assert info == dict(rc=0, heavy=[], mapped=False), r.stderr
    assert json.loads(r.stdout) == _plain_counts(decided)
