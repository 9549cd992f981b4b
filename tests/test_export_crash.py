"""SIGKILL while an export puts its files in place (issue 17, item 11): no destination is ever
missing or half written, and the next export leaves no temporary behind.

Each case exports once, then runs a second export in a subprocess that SIGKILLs itself just before
its k-th file operation (rename, replace, link, exchange, removal), for every k, and checks what the
kill left, then what the next export makes of it.
"""
import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from core import export

ROOT = Path(__file__).resolve().parent.parent

_KILLED_EXPORT = r"""
import json, os, shutil, signal, sys
from core import export

spec = json.loads(sys.argv[1])
count = [0]

def counted(fn):
    def wrapper(*args, **kwargs):
        if count[0] == spec["kill_at"]:
            os.kill(os.getpid(), signal.SIGKILL)
        count[0] += 1
        return fn(*args, **kwargs)
    return wrapper

if not spec["exchange"]:
    export._exchange = lambda a, b: False      # a system without an atomic exchange
for name in ("rename", "replace", "link"):
    setattr(os, name, counted(getattr(os, name)))
export._exchange = counted(export._exchange)
export._remove = counted(export._remove)
photos = [export.LabelledPhoto(**p) for p in spec["photos"]]
export.export_all(photos, photo_folder=spec["folder"], overwrite=True, **spec["dests"])
print("steps", count[0], flush=True)
"""


def _photos(folder: Path, label: str) -> list[dict]:
    out = []
    for i in range(3):
        (folder / f"p{i}.jpg").write_bytes(b"photo %d" % i)
        out.append(dict(path=f"p{i}.jpg", label=f"{label} {i % 2}", how="group", annotator="t",
                        time="2026-12-01T00:00:00Z", width=4, height=3))
    return out


def _state(dests: dict) -> dict:
    """Each destination's content: file bytes, or the class-folder tree (names, link targets and
    the marker's label folders), None when missing."""
    out = {}
    for kind, d in dests.items():
        d = Path(d)
        if kind == "folders":
            if not d.is_dir():
                out[kind] = None
                continue
            tree = sorted(str(p.relative_to(d)) for p in d.rglob("*") if p.name != export.MARKER_NAME)
            marker = json.loads((d / export.MARKER_NAME).read_text())
            out[kind] = (tree, marker["folders"])
        else:
            out[kind] = d.read_bytes() if d.exists() else None
    return out


def _temporaries(parent: Path) -> list[str]:
    return sorted(p.name for p in parent.iterdir() if ".kinfold-" in p.name)


def _run_killed(spec: dict) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-c", _KILLED_EXPORT, json.dumps(spec)], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=120)


@pytest.mark.parametrize("exchange", [True, False], ids=["atomic exchange", "two renames"])
def test_killed_export_never_leaves_a_destination_missing_or_half_written(tmp_path, exchange):
    if exchange and export._RENAMEAT2 is None:
        pytest.skip("no renameat2 on this system")
    folder, out = tmp_path / "photos", tmp_path / "out"
    folder.mkdir()
    out.mkdir()
    dests = dict(csv=str(out / "labels.csv"), coco=str(out / "labels.json"), folders=str(out / "classes"))
    first, second = _photos(folder, "washer"), _photos(folder, "hex nut")
    export.export_all([export.LabelledPhoto(**p) for p in first], photo_folder=folder,
                      date_created="2026-12-01T00:00:00", **dests)
    old = _state(dests)
    # The new export, written for comparison in a folder of its own.
    ref = tmp_path / "ref"
    ref.mkdir()
    ref_dests = {k: str(ref / Path(v).name) for k, v in dests.items()}
    export.export_all([export.LabelledPhoto(**p) for p in second], photo_folder=folder, **ref_dests)
    new = _state(ref_dests)

    k, seen_missing = 0, []
    while True:
        spec = dict(kill_at=k, exchange=exchange, photos=second, folder=str(folder), dests=dests)
        proc = _run_killed(spec)
        if proc.returncode == 0:
            break
        assert proc.returncode == -signal.SIGKILL, proc.stderr
        now = _state(dests)
        for kind in dests:
            if kind == "folders" and now[kind] is None and not exchange:
                seen_missing.append(k)  # the gap between two renames: the next export closes it
                continue
            # COCO carries its creation time: the new one is recognised by its labels.
            same_new = now[kind] == new[kind] or (kind == "coco" and now[kind] is not None
                                                  and b"hex nut" in now[kind])
            assert now[kind] == old[kind] or same_new, f"{kind} half written after a kill before step {k}"
        if exchange:
            assert now["folders"] is not None, f"class folders missing after a kill before step {k}"
        # The next export restores or completes everything and leaves no temporary.
        if not exchange and now["folders"] is None:
            export.clean_stale_temporaries(out)
            assert _state(dests)["folders"] == old["folders"], "the previous class folders were not put back"
        export.export_all([export.LabelledPhoto(**p) for p in first], photo_folder=folder,
                          date_created="2026-12-01T00:00:00", **dests)
        assert _state(dests)["folders"] == old["folders"]
        assert _temporaries(out) == []
        k += 1
    assert k >= 4   # every rename, link and removal of the swap was a kill point
    if not exchange:
        assert seen_missing, "no kill landed between the two renames of the class-folder swap"
