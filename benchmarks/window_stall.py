"""How long the window stops responding during a labelling session: the simulated annotator of the
shared yield protocol replays its actions on Fashion-MNIST photos in the real window (offscreen), as
key events delivered through the window (QTest on the window handle: shortcut override, focus and
popups as a window system has them), while a 5 ms QTimer heartbeat runs on the GUI thread.

    python -m benchmarks.window_stall                          # 10,000 photos, 300 actions (the figure)
    python -m benchmarks.window_stall --n 2000 --actions 100   # quick

The annotator acts as a careful person: before each accept it looks the group over (Home, then Down
a screenful at a time, each once drawn) so no photo is labelled unseen and the window's unseen-photo
question never stops it, and it waits for `window.idle()` (nothing in flight, no key held) between
actions. `--profile K` samples every thread's stack to say where the K longest stalls went.

Prints the longest gap between heartbeats (target under 100 ms) and their 99th percentile, for the
session and for opening the folder, the longest gaps with the action they fell in, the median action
round trip (key press until the window shows the result), peak memory (ru_maxrss) and the command.

The photos are real PNG files and the window opens them through `Project`, but the store is seeded
from the cached features of `benchmarks.fashion` (computed from the same pixels), so the window's
scan finds everything embedded instead of running the network for 5 minutes. Each run starts from a
fresh copy of that store (no decisions).
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import sqlite3
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

TARGET_MS = 100.0
BEAT_MS = 5
ACTION_TIMEOUT = 180.0    # seconds for one action's result (a relearn included) before giving up


def _extractor_id() -> str:
    from core.embedding import DEFAULT_POOLING, efficientnet_lite_id

    return efficientnet_lite_id(DEFAULT_POOLING, "auto")   # what Project.scan would record


def prepare(n: int, work: Path) -> tuple[Path, dict[str, str], Path]:
    """The photo folder, its truth, and a base store holding every photo's embedding and the graph."""
    from benchmarks.fashion import fashion_features, write_fashion_folder
    from core import catalogue
    from core.project import Project

    pooling = _extractor_id().partition(":")[0].removeprefix("efficientnet-lite0")   # "" or "-gem"
    folder, truth_file, base = work / f"fashion-{n}", work / f"fashion-{n}-truth.json", work / f"fashion-{n}-store{pooling}"
    if not truth_file.exists():
        shutil.rmtree(folder, ignore_errors=True)
        truth_file.parent.mkdir(parents=True, exist_ok=True)
        truth_file.write_text(json.dumps(write_fashion_folder(folder, n)))
    truth = json.loads(truth_file.read_text())
    if not (base / "ready").exists():
        shutil.rmtree(base, ignore_errors=True)
        features, _ = fashion_features(n)
        p = Project.open(folder, store=base, annotator="bench")
        cat = catalogue.scan_folder(folder, {}, {})   # the walk leaves hidden folders (a .kinfold/) out
        row_of = {r.path: int(r.path.rsplit("_", 1)[1].split(".")[0]) for r in cat.photos}
        ext = _extractor_id()
        p.store.set_setting("extractor_id", ext)
        p.store.replace_catalogue(cat.photos, {})
        p.store.put_embeddings(ext, [r.fingerprint for r in cat.photos], features[[row_of[r.path] for r in cat.photos]])
        p._load_catalogue()
        p.graph()            # the neighbour graph cache a reopened project would have
        p.close()
        (base / "ready").write_text("")
    return folder, truth, base


def fresh_store(folder: Path, base: Path) -> None:
    shutil.rmtree(folder / ".kinfold", ignore_errors=True)
    shutil.copytree(base, folder / ".kinfold", ignore=shutil.ignore_patterns("lock", "ready"))


def percentile(values: list[float], q: float) -> float:
    s = sorted(values)
    return s[min(len(s) - 1, max(0, round(q / 100 * (len(s) - 1))))] if s else float("nan")


class Sampler:
    """--profile: a thread that notes, every ~2 ms, where each thread is (its innermost frames), so the
    longest stalls can be attributed. A sampler that could not run for a while shows a thread holding
    the interpreter lock in C code."""

    def __init__(self, every: float = 0.002):
        import threading

        self.every, self.samples, self.gui = every, [], threading.get_ident()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)

    def start(self):
        self._thread.start()

    def stop(self):
        self._stop.set()
        self._thread.join()

    def _loop(self):
        import threading

        me = threading.get_ident()
        while not self._stop.wait(self.every):
            now = time.perf_counter()
            stacks = {}
            for ident, frame in sys._current_frames().items():
                if ident == me:
                    continue
                where = []
                while frame is not None and len(where) < 40:
                    where.append(f"{Path(frame.f_code.co_filename).name}:{frame.f_lineno} {frame.f_code.co_name}")
                    frame = frame.f_back
                stacks["gui" if ident == self.gui else "other"] = stacks.get("gui" if ident == self.gui else "other", []) + [where]
            self.samples.append((now, stacks))

    def report(self, start: float, end: float, depth: int = 8) -> str:
        from collections import Counter

        inside = [(t, st) for t, st in self.samples if start <= t <= end]
        times = [start] + [t for t, _ in inside] + [end]
        longest_hole = max(b - a for a, b in zip(times, times[1:])) * 1000
        gui = Counter(" < ".join(st["gui"][0][:depth]) for _, st in inside if st.get("gui"))
        other = Counter(" < ".join(w[:4]) for _, st in inside for w in st.get("other", [])
                        if not any("wait" in f or "_loop" in f for f in w[:1]))
        lines = [f"    {len(inside)} samples; longest time with no sample (the lock held in C code): "
                 f"{longest_hole:.0f} ms"]
        # Where each thread was just before and just after that hole: the one holding the lock
        # returns from its long call right after it.
        stamps = [t for t, _ in self.samples]
        hole = max(range(1, len(stamps)), key=lambda i: stamps[i] - stamps[i - 1] if start <= stamps[i] <= end + 0.05
                   else -1, default=None)
        if hole is not None:
            for when, (_, st) in (("before", self.samples[hole - 1]), ("after", self.samples[hole])):
                for name, stacks in st.items():
                    for w in stacks:
                        if name == "gui" or not any("wait" in f or "_loop" in f for f in w[:1]):
                            lines.append(f"    {when} the hole, {name}: " + " < ".join(w[:depth + 4]))
        lines += [f"    gui  {n:3d}x {where}" for where, n in gui.most_common(4)]
        lines += [f"    other {n:3d}x {where}" for where, n in other.most_common(3)]
        return "\n".join(lines)


def run(folder: Path, truth: dict[str, str], actions_wanted: int, sitting: int, size=(1280, 820),
        sampler: Sampler | None = None) -> dict:
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from PySide6.QtCore import QSettings, Qt, QTimer
    from PySide6.QtTest import QTest
    from PySide6.QtWidgets import QApplication

    from app.main_window import MainWindow
    from benchmarks.yield_sim import majority

    app = QApplication.instance() or QApplication([sys.argv[0]])
    tmp = Path(tempfile.mkdtemp(prefix="kinfold-stall-"))
    w = MainWindow(QSettings(str(tmp / "settings.ini"), QSettings.Format.IniFormat))
    w.resize(*size)
    w.show()
    w.activateWindow()
    shown = [0]
    w.groups_shown.connect(lambda: shown.__setitem__(0, shown[0] + 1))

    beats: list[float] = []
    heart = QTimer()
    heart.setTimerType(Qt.TimerType.PreciseTimer)
    heart.setInterval(BEAT_MS)
    heart.timeout.connect(lambda: beats.append(time.perf_counter()))
    log: list[dict] = []          # one row per action: kind, start, end
    marks: dict[str, float] = {}
    out: dict = {}

    def key(k, mods=Qt.KeyboardModifier.NoModifier):
        QTest.keyClick(w.windowHandle(), k, mods)

    def next_group_ready(before: int):
        """The window showed a new group, has nothing in flight, and takes the next decision (or has
        nothing left to show)."""
        return lambda: shown[0] > before and w.idle() and (w.current() is None or w.actions["accept"].isEnabled())

    def drawn() -> bool:
        """Every card inside the grid's viewport has been drawn with its picture (what a careful person
        waits for before looking on or deciding)."""
        grid, model = w.group_page.grid, w.group_model
        view, unseen = grid.viewport().rect(), set(grid.unseen_paths())
        return not any(p in unseen and view.contains(grid.visualRect(model.index(i)))
                       for i, p in enumerate(model.paths))

    def script():
        """The annotator, as a generator: it yields a condition to wait for (checked every ~1 ms)."""
        marks["open"] = time.perf_counter()
        w.open_folder(str(folder))
        yield lambda: shown[0] > 0
        marks["session"] = time.perf_counter()
        grid = w.group_page.grid
        used: set[str] = set()
        actions, next_relearn, counts = 0, sitting or 10 ** 9, dict(accept=0, split=0, taken_out=0, labelled=0)
        while actions < actions_wanted and w.current() is not None:
            g = w.current()
            classes = [truth[m] for m in g.members]
            m = majority(classes)
            minority = sum(c != m for c in classes)
            before = shown[0]
            if g.splittable and minority / len(classes) >= 0.3:
                t0 = time.perf_counter()
                key(Qt.Key.Key_D, Qt.KeyboardModifier.ControlModifier)
                yield next_group_ready(before)
                log.append(dict(kind="split", start=t0, end=time.perf_counter()))
                actions += 1
                counts["split"] += 1
            else:
                for _ in range(3):              # the keyboard starts on the grid
                    if QApplication.focusWidget() is grid:
                        break
                    key(Qt.Key.Key_Escape)
                    yield None
                drop = [r for r, c in enumerate(classes) if c != m]
                if drop:
                    key(Qt.Key.Key_Home)
                    yield None
                for r in drop:
                    while grid.currentIndex().row() < r:        # moving is not an action
                        was = grid.currentIndex().row()
                        key(Qt.Key.Key_Right)
                        yield None
                        if grid.currentIndex().row() <= was:
                            raise RuntimeError(f"the Right key did not move past photo {was} of {len(classes)}")
                    path = g.members[r]
                    t0 = time.perf_counter()
                    key(Qt.Key.Key_Space)
                    yield lambda p=path: p in w.group_model.taken_out()
                    log.append(dict(kind="take out", start=t0, end=time.perf_counter()))
                    actions += 1
                    counts["taken_out"] += 1
                # Look over the whole group before accepting, a screenful at a time (Home, then Down to the
                # last row), so the accept does not stop to ask about photos never on screen.
                key(Qt.Key.Key_Home)
                last = -1
                while True:
                    yield drawn
                    if not grid.unseen_paths() or grid.currentIndex().row() == last:
                        break
                    last = grid.currentIndex().row()
                    key(Qt.Key.Key_Down)
                if grid.unseen_paths():
                    raise RuntimeError(f"{len(grid.unseen_paths())} photos of group {g.id} never came on screen")
                if w.group_page.label.text().strip() != m:
                    t0 = time.perf_counter()
                    for ch in m:
                        key(ch)
                        yield None
                    log.append(dict(kind="type label", start=t0, end=time.perf_counter()))
                    if m not in used and g.suggested_label != m:
                        actions += 1            # typing a new label name
                t0 = time.perf_counter()
                key(Qt.Key.Key_Return)
                yield next_group_ready(before)
                log.append(dict(kind="accept", start=t0, end=time.perf_counter()))
                used.add(m)
                actions += 1
                counts["accept"] += 1
                counts["labelled"] += len(g.members) - len(drop)
            if actions >= next_relearn and w.actions["relearn"].isVisible():
                yield lambda: w.actions["relearn"].isEnabled()
                before = shown[0]
                t0 = time.perf_counter()
                key(Qt.Key.Key_R, Qt.KeyboardModifier.ControlModifier | Qt.KeyboardModifier.ShiftModifier)
                yield next_group_ready(before)
                log.append(dict(kind="relearn", start=t0, end=time.perf_counter()))
                next_relearn = actions + sitting
        marks["end"] = time.perf_counter()
        out.update(actions=actions, counts=counts)

    steps = script()
    state = dict(cond=None, since=time.perf_counter())

    def pump():
        cond = state["cond"]
        if cond is not None and not cond():
            if time.perf_counter() - state["since"] > ACTION_TIMEOUT:
                out["error"] = (f"no result {ACTION_TIMEOUT:.0f} s after the last key "
                                f"(after {len(log)} actions; last: {log[-1]['kind'] if log else 'opening'})")
                app.quit()
            return
        try:
            state["cond"], state["since"] = next(steps), time.perf_counter()
        except StopIteration:
            app.quit()
        except RuntimeError as exc:
            out["error"] = str(exc)
            app.quit()

    driver = QTimer()
    driver.setInterval(1)
    driver.timeout.connect(pump)
    heart.start()
    if sampler is not None:
        sampler.start()
    driver.start()
    app.exec()
    driver.stop()
    heart.stop()
    t0 = time.perf_counter()
    w.close()
    out["close_s"] = time.perf_counter() - t0
    shutil.rmtree(tmp, ignore_errors=True)
    if sampler is not None:
        sampler.stop()
    out.update(beats=beats, log=log, marks=marks)
    return out


def gaps_between(beats: list[float], start: float, end: float) -> list[tuple[float, float]]:
    """(gap in ms, time it ended) for consecutive heartbeats inside [start, end]."""
    inside = [b for b in beats if start <= b <= end]
    return [((b - a) * 1000, b) for a, b in zip(inside, inside[1:])]


def store_counts(folder: Path) -> dict:
    db = sqlite3.connect(f"file:{folder / '.kinfold' / 'kinfold.sqlite'}?mode=ro", uri=True)
    try:
        kinds = dict(db.execute("SELECT kind, COUNT(*) FROM decisions GROUP BY kind").fetchall())
        labelled = db.execute("SELECT COUNT(*) FROM labels WHERE state='labelled'").fetchone()[0]
    finally:
        db.close()
    return dict(accept=kinds.get("accept", 0), split=kinds.get("split", 0), labelled=labelled)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=10000, help="Fashion-MNIST test photos (default 10000)")
    ap.add_argument("--actions", type=int, default=300)
    ap.add_argument("--sitting", type=int, default=100, help="relearn every this many actions (0: never)")
    ap.add_argument("--profile", type=int, default=0, metavar="K",
                    help="sample every thread's stack and say where the K longest stalls were spent")
    ap.add_argument("--work", default=str(Path.home() / ".cache" / "kinfold-bench" / "window"))
    args = ap.parse_args(argv)
    command = "python -m benchmarks.window_stall " + " ".join(sys.argv[1:] if argv is None else argv)
    print("command:", command, flush=True)

    t0 = time.perf_counter()
    folder, truth, base = prepare(args.n, Path(args.work))
    fresh_store(folder, base)
    print(f"prepared {args.n} photos and their store in {time.perf_counter() - t0:.0f} s ({folder})", flush=True)
    load_before = os.getloadavg()[0]
    sampler = Sampler() if args.profile else None
    r = run(folder, truth, args.actions, args.sitting, sampler=sampler)
    marks, log = r["marks"], r["log"]
    if "error" in r:
        print("STOPPED:", r["error"])
    if "session" not in marks:
        print("the window never showed a group")
        return 1
    session = gaps_between(r["beats"], marks["session"], marks.get("end", r["beats"][-1]))
    opening = gaps_between(r["beats"], marks["open"], marks["session"])
    longest = max(g for g, _ in session)
    p99 = percentile([g for g, _ in session], 99)
    acts = [a for a in log if a["kind"] in ("accept", "split", "take out")]
    trips = [(a["end"] - a["start"]) * 1000 for a in acts]
    accept_trips = [(a["end"] - a["start"]) * 1000 for a in log if a["kind"] == "accept"]
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    stored = store_counts(folder)

    def during(t: float) -> str:
        a = next((a for a in reversed(log) if a["start"] <= t), None)
        return a["kind"] if a and t <= a["end"] + 0.05 else "between actions"

    print(f"photos {args.n}, actions {r.get('actions')} ({r.get('counts')}), window 1280x820 offscreen, "
          f"heartbeat every {BEAT_MS} ms; load average {load_before:.1f} before, {os.getloadavg()[0]:.1f} after "
          f"on {os.cpu_count()} cores")
    print(f"store after the session: {stored}")
    if r.get("counts") and (stored["accept"], stored["split"]) != (r["counts"]["accept"], r["counts"]["split"]):
        print("WARNING: the store does not hold every accept/split the annotator made")
    print(f"longest GUI stall during the session: {longest:.0f} ms  (target < {TARGET_MS:.0f} ms: "
          f"{'met' if longest < TARGET_MS else 'NOT met'})")
    print(f"99th percentile of heartbeat gaps: {p99:.1f} ms; gaps over {TARGET_MS:.0f} ms: "
          f"{sum(g > TARGET_MS for g, _ in session)}")
    print("longest stalls: " + ", ".join(f"{g:.0f} ms ({during(t)})" for g, t in sorted(session, reverse=True)[:6]))
    if sampler is not None:
        for g, t in sorted(session, reverse=True)[:args.profile]:
            print(f"  stall of {g:.0f} ms ({during(t)}), where the threads were:")
            print(sampler.report(t - g / 1000, t))
    if opening:
        print(f"opening the folder ({marks['session'] - marks['open']:.1f} s until the first group): "
              f"longest stall {max(g for g, _ in opening):.0f} ms, 99th percentile "
              f"{percentile([g for g, _ in opening], 99):.1f} ms")
    print(f"median action round trip (key to result on screen): {statistics.median(trips):.0f} ms over "
          f"{len(trips)} actions; accepts: median {statistics.median(accept_trips):.0f} ms, "
          f"worst {max(accept_trips):.0f} ms" if trips and accept_trips else "no actions")
    relearns = [(a["end"] - a["start"]) for a in log if a["kind"] == "relearn"]
    if relearns:
        print("relearn + propose again: " + ", ".join(f"{s:.1f} s" for s in relearns))
    print(f"closing the window: {r['close_s'] * 1000:.0f} ms")
    print(f"peak memory (ru_maxrss): {peak_mb:.0f} MB")
    print("command:", command)
    return 0 if "error" not in r else 1


if __name__ == "__main__":
    raise SystemExit(main())
