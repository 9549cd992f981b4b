"""The installed Qt binding must not leak references to None, True or False through Kinfold's own
models and signals.

PySide6/shiboken6 6.12.0 on CPython 3.11 drops one reference to None each time a model's data()
returns None through QModelIndex.data(), and one to True on every layoutChanged.emit(); the window
then dies with "Fatal Python error: none_dealloc" (or bool_dealloc) after a few minutes.
pyproject.toml keeps that release off Python < 3.12; this test catches the next release that does
the same, whatever pip installed.

Each probe repeats one call N times and compares sys.getrefcount() of None, True and False before
and after (CPython's own counter: the measure is outside the project). It runs in a child
interpreter, in batches, and stops a probe as soon as it leaks, so a leaking binding fails the test
instead of aborting the test run. On Python >= 3.12 these objects are immortal: their counts never
move and the test passes, which is right, since the leak cannot free them there.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
N = 2000          # calls per probe
BATCH = 10        # refcounts are checked after every batch (True starts near 650 references)
TOLERANCE = 20    # references gained or lost over N calls still called noise (a leak moves N or more)


def test_no_reference_leaks_through_models_and_signals(tmp_path):
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen",
               PYTHONPATH=os.pathsep.join([str(ROOT)] + [p for p in [os.environ.get("PYTHONPATH")] if p]))
    proc = subprocess.run([sys.executable, __file__, str(tmp_path)], capture_output=True, text=True,
                          env=env, timeout=300, cwd=str(ROOT))
    rows = [json.loads(line) for line in proc.stdout.splitlines() if line.startswith("{")]
    stack = next((r for r in rows if "binding" in r), {})
    probes = [r for r in rows if "probe" in r]
    leaks = [f"{r['probe']}: {r['object']} {r['delta']:+d} references after {r['calls']} calls"
             for r in probes if abs(r["delta"]) > TOLERANCE]
    died = f"; the probe process then died ({proc.returncode})" if proc.returncode else ""
    assert not leaks, (f"{stack.get('binding')} on Python {stack.get('python')} leaks references "
                       f"(the crash of issue 16; see pyproject.toml){died}:\n  " + "\n  ".join(leaks))
    assert proc.returncode == 0, (f"the probe process died ({proc.returncode}) on {stack}; last line: "
                                  f"{rows[-1] if rows else None}\n{proc.stderr[-2000:]}")
    assert rows[-1] == {"done": True} and len(probes) >= 3 * 20, f"not every probe ran: {rows[-3:]}"


# -- the child process ------------------------------------------------------------------------------
def _emit(**row) -> None:
    print(json.dumps(row), flush=True)


def _measure(name: str, call, objects=(None, True, False)) -> None:
    """Call `call` N times in batches; report each object's refcount change, stopping at a leak."""
    import gc

    gc.collect()
    before = {repr(o): sys.getrefcount(o) for o in objects}
    calls = 0
    while calls < N:
        for _ in range(BATCH):
            call()
        calls += BATCH
        moved = {k: sys.getrefcount(o) - before[k] for k, o in zip(before, objects)}
        if any(abs(d) > TOLERANCE for d in moved.values()):
            break  # a leak: stop before the object's count reaches zero and the process aborts
    gc.collect()
    for o in objects:
        _emit(probe=name, object=repr(o), delta=sys.getrefcount(o) - before[repr(o)], calls=calls)


def _photo_folder(folder: Path) -> list[str]:
    from PIL import Image

    folder.mkdir(parents=True, exist_ok=True)
    names = []
    for i, colour in enumerate(((200, 40, 40), (40, 160, 60))):
        Image.new("RGB", (64, 48), colour).save(folder / f"p{i}.png")
        names.append(f"p{i}.png")
    (folder / "broken.png").write_bytes(b"\x89PNG not really")   # no thumbnail: DecorationRole is None
    return names + ["broken.png"]


def _probe(tmp: Path) -> None:
    import time

    import PySide6
    from PySide6.QtCore import QAbstractListModel, QModelIndex, QObject, Qt, Signal
    from PySide6.QtWidgets import QApplication

    _emit(binding=f"PySide6 {PySide6.__version__}", python=sys.version.split()[0])
    app = QApplication([sys.argv[0]])

    from app.history import Curve
    from app.pages import LabelField
    from app.photo_grid import OUT_ROLE, PhotoGrid, PhotoModel
    from app.history import Curve
    from app.side_panel import SidePanel
    from app.thumbnails import Thumbnails
    from core.project import Proposal, Status

    role = Qt.ItemDataRole
    folder = tmp / "photos"
    paths = _photo_folder(folder)
    thumbs = Thumbnails(folder)
    model = PhotoModel(thumbs)
    grid = PhotoGrid(model)
    grid.resize(600, 400)
    grid.show()
    model.set_photos(paths)
    end = time.monotonic() + 20
    for p in paths:  # let the thumbnails arrive so no decode thread runs while counting
        thumbs.pixmap(p, model.side)
    while time.monotonic() < end and not (len(thumbs.unreadable) == 1 and all(
            thumbs.cached(p, model.side) is not None for p in paths[:2])):
        app.processEvents()
        time.sleep(0.01)
    thumbs.shutdown()
    app.processEvents()
    good, broken = model.index(0), model.index(2)
    model.toggle(1)
    out = model.index(1)

    # The photo grid's model, read the way the delegate and views read it.
    _measure("PhotoModel data() None role (ForegroundRole)", lambda: good.data(role.ForegroundRole))
    _measure("PhotoModel data() DecorationRole of an unreadable photo", lambda: broken.data(role.DecorationRole))
    _measure("PhotoModel data() OUT_ROLE False", lambda: good.data(OUT_ROLE))
    _measure("PhotoModel data() OUT_ROLE True", lambda: out.data(OUT_ROLE))
    _measure("PhotoModel data() through model.data()", lambda: model.data(good, role.ForegroundRole))
    _measure("PhotoModel layoutChanged.emit()", lambda: model.layoutChanged.emit())
    sides = iter(range(10 ** 6))
    _measure("PhotoModel.set_side (layoutChanged)", lambda: model.set_side(120 + next(sides) % 2 * 8))
    _measure("PhotoModel dataChanged.emit()", lambda: model.dataChanged.emit(good, good, [OUT_ROLE]))
    _measure("PhotoModel.toggle (dataChanged)", lambda: model.toggle(0))
    _measure("PhotoGrid paint (grab)", lambda: grid.grab())

    # The side panel's list models, the label field's completion model.
    panel = SidePanel()
    status = Status(photos=10, labelled=3, set_aside=1, unlabelled=6, by_label={"washer": 3}, actions=2,
                    skipped=0)
    upcoming = [Proposal(7, ["p0.png", "p1.png"], 0.9, None, None, "new area")]
    _measure("SidePanel.show_state", lambda: panel.show_state(status, upcoming, Curve([(0, 0), (2, 3)])))
    empty = Status(photos=10, labelled=0, set_aside=0, unlabelled=10, by_label={}, actions=0, skipped=0)
    panel.show_state(empty, [], Curve())
    no_labels = panel.labels.model().index(0, 0)
    _measure("side panel labels data() UserRole None", lambda: no_labels.data(role.UserRole))
    _measure("side panel item.data() None", lambda: panel.labels.item(0).data(role.UserRole))
    field = LabelField()
    field.set_names(["washer", "hex nut"])
    name = field.names.index(0, 0)
    _measure("LabelField names data() None role", lambda: name.data(role.ToolTipRole))

    # A plain QAbstractListModel subclass and Python signals carrying None and booleans.
    class Plain(QAbstractListModel):
        def rowCount(self, parent=QModelIndex()):
            return 0 if parent.isValid() else 3

        def data(self, index, r=role.DisplayRole):
            return {role.DisplayRole: "x", role.CheckStateRole: None}.get(r, index.row() == 1)

    plain = Plain()
    first, second = plain.index(0), plain.index(1)
    _measure("QAbstractListModel data() None", lambda: first.data(role.CheckStateRole))
    _measure("QAbstractListModel data() False", lambda: first.data(role.UserRole))
    _measure("QAbstractListModel data() True", lambda: second.data(role.UserRole))
    _measure("QAbstractListModel layoutChanged.emit()", lambda: plain.layoutChanged.emit())
    _measure("QAbstractListModel dataChanged.emit()", lambda: plain.dataChanged.emit(first, second))
    _measure("QAbstractListModel reset", lambda: (plain.beginResetModel(), plain.endResetModel()))

    class Carrier(QObject):
        thing = Signal(object)
        flag = Signal(bool)

    carrier, seen = Carrier(), []
    carrier.thing.connect(lambda v: seen.append(v) or seen.clear())
    carrier.flag.connect(lambda v: seen.append(v) or seen.clear())
    _measure("Signal(object) carrying None", lambda: carrier.thing.emit(None))
    _measure("Signal(bool) carrying True", lambda: carrier.flag.emit(True))
    _measure("Signal(bool) carrying False", lambda: carrier.flag.emit(False))
    _emit(done=True)


if __name__ == "__main__":
    _probe(Path(sys.argv[1]))
