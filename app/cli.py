"""The `kinfold` command: the verbs of `core.project.Project` from a shell.

Every command takes the photo folder first; `--store DIR` keeps the project store elsewhere.
Exit status 0 on success, 1 with a one-line reason on stderr for bad input, 2 for bad usage (also one
line). No traceback reaches the user: an unexpected error is one line too, and KINFOLD_DEBUG=1 shows
the traceback.
"""
from __future__ import annotations

import argparse
import dataclasses
import errno
import json
import math
import os
import signal
import sqlite3
import sys
import threading
import time

from app.graph_progress import GraphInterrupted, prepare_on_terminal
from core.export import WHY_LINKS, ExportError, folder_export_mode
from core.label_names import shown_suggestion
from core.project import DEFAULT_EXTRACTOR, NETWORKS, STORE_DIR, FolderInUse, Project, ProjectError
from core.store import StoreError

DEBUG_ENV = "KINFOLD_DEBUG"
_MAX_ID = 2 ** 63 - 1  # SQLite integers
# SQLite primary result codes (https://sqlite.org/rescode.html) that need their own advice.
_SQLITE_PERM, _SQLITE_BUSY, _SQLITE_LOCKED, _SQLITE_READONLY, _SQLITE_FULL, _SQLITE_CANTOPEN = 3, 5, 6, 8, 13, 14
_SQLITE_CORRUPT, _SQLITE_NOTADB = 11, 26
_SQLITE_ADVICE = {_SQLITE_PERM, _SQLITE_BUSY, _SQLITE_LOCKED, _SQLITE_READONLY, _SQLITE_FULL, _SQLITE_CANTOPEN,
                  _SQLITE_CORRUPT, _SQLITE_NOTADB}


class _Bar:
    """A one-line progress bar on stderr: done/total, rate, time left. Silent when not a terminal."""

    def __init__(self, enabled: bool):
        self.enabled = enabled and sys.stderr.isatty()
        self.t0 = time.monotonic()
        self.last = 0.0
        self.message = None
        self.done0 = 0

    def __call__(self, done: int, total: int, message: str) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        phase = message.split(" ", 1)[0]       # "embedded 12 of 80 photos": one step, its words change
        if phase != self.message:
            self.t0, self.message, self.done0 = now, phase, done
        if now - self.last < 0.1 and done < total:
            return
        self.last = now
        frac = done / total if total else 1.0
        # The rate from this step's start, once there is something to measure (a step's first report
        # may come after a whole block of work, so no rate is shown before half a second).
        rate = (done - self.done0) / max(now - self.t0, 1e-6) if now - self.t0 >= 0.5 else 0.0
        speed = f"{rate:6.1f}/s  {(total - done) / rate:5.0f} s left " if rate > 0 else " " * 22
        bar = "#" * int(30 * frac)
        sys.stderr.write(f"\r{message:<16} [{bar:<30}] {done}/{total}  {speed}")
        if done >= total:
            sys.stderr.write("\n")
        sys.stderr.flush()


def _print(obj, as_json: bool) -> None:
    if dataclasses.is_dataclass(obj):
        obj = dataclasses.asdict(obj)
    if as_json:
        print(json.dumps(obj, indent=2, ensure_ascii=False))
    elif isinstance(obj, dict):
        for k, v in obj.items():
            print(f"{k}: {v}")
    else:
        print(obj)


def _open(args, lock: bool = True) -> Project:
    """Open the project; with `--wait SECONDS`, a folder another window or command holds is tried
    again (twice a second) until it is free or the wait is over."""
    wait = getattr(args, "wait", None)
    deadline = time.monotonic() + (wait or 0)
    while True:
        try:
            return Project.open(args.folder, store=args.store, annotator=getattr(args, "annotator", None),
                                lock=lock, extractor=NETWORKS.get(getattr(args, "network", None), DEFAULT_EXTRACTOR))
        except FolderInUse as exc:
            left = deadline - time.monotonic()
            if wait is None:
                raise FolderInUse(f"{exc}, or add --wait SECONDS to wait for it") from None
            if left <= 0:
                raise FolderInUse(f"the folder was still open in another Kinfold window or command after "
                                  f"waiting {wait:g} s; close it there, or wait longer") from None
            time.sleep(min(0.5, left))


def _table(rows, indent: str = "") -> list[str]:
    """Rows of cells as aligned text: text left-aligned, numbers right-aligned, two spaces apart."""
    rows = [[("" if c is None else c) for c in r] for r in rows]
    if not rows:
        return []
    widths = [max(len(str(r[i])) for r in rows if i < len(r)) for i in range(max(map(len, rows)))]
    out = []
    for r in rows:
        cells = [(f"{c!s:>{widths[i]}}" if _numeric(c) else f"{c!s:<{widths[i]}}") for i, c in enumerate(r)]
        out.append((indent + "  ".join(cells)).rstrip())
    return out


def _numeric(cell) -> bool:
    if isinstance(cell, bool):
        return False
    if isinstance(cell, (int, float)):
        return True
    try:
        float(str(cell).rstrip("%"))
        return True
    except ValueError:
        return False


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def _show_status(st) -> None:
    rows = [("photos", st.photos), ("labelled", st.labelled), ("set aside", st.set_aside),
            ("unlabelled", st.unlabelled), ("actions", st.actions), ("skipped files", st.skipped),
            ("relearned", f"version {st.relearned_version}" if st.relearned_version else "no")]
    print("\n".join(_table(rows)))
    if st.by_label:
        print()
        print("\n".join(_table([("label", "photos")] + list(st.by_label.items()))))


def _show_figures(figures: dict, indent: str = "") -> None:
    """A dict of figures (relearn's, say) as aligned `name  value` lines; nested dicts indented."""
    flat = []
    for key, value in figures.items():
        if isinstance(value, dict):
            flat.append((str(key).replace("_", " "), ""))
            flat += [("  " + str(k).replace("_", " "), v) for k, v in value.items()]
        else:
            flat.append((str(key).replace("_", " "), "yes" if value is True else "no" if value is False
                         else "-" if value is None else value))
    print("\n".join(_table(flat, indent)))


class _InterruptToCancel:
    """Ctrl+C (SIGINT) during a scan asks it to stop, as Cancel does in the window: the scan returns
    within a fraction of a second with its work kept. A second Ctrl+C interrupts at once."""

    def __init__(self):
        self.asked = threading.Event()
        self._previous = None

    def __enter__(self):
        if threading.current_thread() is threading.main_thread():
            self._previous = signal.signal(signal.SIGINT, self._handle)
        return self

    def _handle(self, signum, frame):
        self.asked.set()
        signal.signal(signal.SIGINT, signal.default_int_handler)

    def __exit__(self, *exc):
        if self._previous is not None:
            signal.signal(signal.SIGINT, self._previous)


def cmd_scan(args):
    bar = _Bar(not args.json)
    cluster = args.cluster or args.workers
    if cluster is None and (args.chunk is not None or args.transfer != "auto"):
        args.parser.error("--chunk and --transfer apply to a cluster scan: add --cluster or --workers")
    options = dict(chunk=args.chunk or 32, transfer=args.transfer) if cluster is not None else {}
    with _InterruptToCancel() as interrupt, _open(args) as p:
        rep = p.scan(progress=bar, cancel=interrupt.asked.is_set, cluster=cluster, **options)
    if args.json:
        _print(rep, True)
    else:
        print(f"{rep.photos} photos ready ({rep.new} new, {rep.changed} changed, {rep.removed} gone, "
              f"{rep.embedded} embedded now) in {rep.seconds:.1f} s")
        for path, reason in rep.skipped:
            print(f"skipped {path}: {reason}")
    if rep.cancelled:  # only Ctrl+C cancels a scan here
        print(("\n" if bar.enabled else "") + "kinfold: scan interrupted; what it found and embedded so far "
              "is kept, run scan again to finish", file=sys.stderr)
        return 130


def cmd_propose(args):
    with _open(args) as p:
        prepare_on_terminal(p, args.json)
        groups = p.propose(limit=args.limit)
        if args.json:
            _print([dict(dataclasses.asdict(g), splittable=g.splittable) for g in groups], True)
            return
        for g in groups:
            # As the window: no suggestion on a new-area group or below the floor a suggestion is shown from.
            shown = shown_suggestion(g.kind, g.suggested_label, g.confidence)
            sug = f"  suggests '{shown}' ({g.confidence:.2f})" if shown else ""
            print(f"group {g.id}: {len(g.members)} photos, trust {g.trust:.2f}, {g.kind}{sug}")
            for m in g.members[: args.show]:
                print(f"    {m}")
            if len(g.members) > args.show:
                print(f"    ... {len(g.members) - args.show} more")


def cmd_accept(args):
    with _open(args) as p:
        p.accept(args.group, args.label, drop=args.drop)
        _report_status(p.status(), args.json)


def cmd_label(args):
    with _open(args) as p:
        p.label(args.paths, args.label)
        _report_status(p.status(), args.json)


def _report_status(st, as_json: bool) -> None:
    if as_json:
        _print(st, True)
    else:
        _show_status(st)


def cmd_split(args):
    with _open(args) as p:
        p.group(args.group)                  # an unknown group: its one line before any wait
        prepare_on_terminal(p, args.json)
        parts = p.split(args.group)
    if args.json:
        _print([dataclasses.asdict(g) for g in parts], True)
        return
    print(f"group {args.group} split in {len(parts)}; the parts come first in the next proposals:")
    for g in parts:
        print(f"group {g.id}: {len(g.members)} photos")
        for m in g.members[: args.show]:
            print(f"    {m}")
        if len(g.members) > args.show:
            print(f"    ... {len(g.members) - args.show} more")


def cmd_set_aside(args):
    with _open(args) as p:
        p.set_aside(args.paths)
        _report_status(p.status(), args.json)


def cmd_undo(args):
    with _open(args) as p:
        done = p.undo()
        if args.json:
            _print(done or {"undone": None, "reason": "nothing to undo"}, True)
        elif done is None:
            print("nothing to undo")
        else:
            print(f"undid decision {done['decision']} ({done['kind']}): {done['photos']} photos back as they were")


def cmd_redo(args):
    with _open(args) as p:
        done = p.redo()
        if args.json:
            _print(done, True)
        else:
            print(f"redid the {done['kind'].replace('_', ' ')} as decision {done['decision']}: "
                  f"{done['photos']} photos as it left them")


def cmd_browse(args):
    with _open(args, lock=False) as p:   # only reads: works while the window has the folder open
        found = p.browse(state=args.state, label=args.label, subfolder=args.subfolder, name=args.name,
                         offset=args.offset, limit=args.limit)
        if args.json:
            _print({"total": found.total, "offset": found.offset,
                    "photos": [dataclasses.asdict(b) for b in found.photos]}, True)
            return
        for line in _table([(b.path, b.state, b.label or "") for b in found.photos]):
            print(line)
        sys.stdout.flush()    # the table first, then the count on stderr
        print(f"{len(found.photos)} of {found.total} matching photos shown (from {found.offset})", file=sys.stderr)


def cmd_mistakes(args):
    with _open(args, lock=False) as p:   # only reads: works while the window has the folder open
        prepare_on_terminal(p, args.json)
        found = p.likely_mistakes(limit=args.limit)
    if args.json:
        _print([dataclasses.asdict(m) for m in found], True)
        return
    if not found:
        print("no likely mistakes (the queue needs photos of at least two labels; confirmed ones are left out)")
        return
    width = max(len(m.path) for m in found)
    print(f"{'score':>5}  {'photo':<{width}}  label -> suggested")
    for m in found:
        print(f"{m.score:5.2f}  {m.path:<{width}}  {m.label} -> {m.suggested or '?'}")


def cmd_confirm(args):
    with _open(args) as p:
        p.confirm(args.paths, args.label)
        _report_status(p.status(), args.json)


def cmd_status(args):
    with _open(args, lock=False) as p:
        _report_status(p.status(), args.json)


def cmd_export(args):
    with _open(args) as p:
        prepare_on_terminal(p, args.json)
        written = p.export(csv=args.csv, coco=args.coco, folders=args.folders, split=args.split,
                           mode=args.mode, overwrite=args.overwrite)
        out = {}
        if "csv" in written:
            out["csv"] = {"path": args.csv, "rows": written["csv"]}
        if "coco" in written:
            # With a split: one file per split, {split: {"path", "images", ...}}.
            out["coco"] = written["coco"] if args.split else {"path": args.coco, **written["coco"]}
        if "folders" in written:
            out["folders"] = {"path": args.folders, **written["folders"]}
            mode = folder_export_mode(args.folders)
    if args.json:
        _print(out, True)
        return
    rows = []
    if "csv" in out:
        rows.append(("csv", out["csv"]["path"], out["csv"]["rows"], "rows" + (", with a split column" if args.split
                                                                                else "")))
    if "coco" in out:
        parts = out["coco"].items() if args.split else [(None, out["coco"])]
        for part, w in parts:
            rows.append((f"coco {part}" if part else "coco", w["path"], w["images"],
                         f"images, {_plural(w['categories'], 'category').replace('ys', 'ies')}"))
    if "folders" in out:
        counts = written["folders"]
        if args.split:
            for part, by_label in counts.items():
                rows.append((f"folders {part}", os.path.join(args.folders, part), sum(by_label.values()),
                             f"photos in {_plural(len(by_label), 'label folder')}"))
        else:
            rows.append(("folders", args.folders, sum(counts.values()),
                         f"photos in {_plural(len(counts), 'label folder')}"))
    print("\n".join(_table(rows)))
    if "folders" in out:
        how = ("symbolic links to the photos" if mode == "link" else
               "copies (links failed on this disk)" if args.mode == "link" else "copies, as asked")
        print(f"\nThe class folders hold {how}.\n{WHY_LINKS}")


def cmd_relearn(args):
    with _open(args) as p:
        result = p.relearn(progress=_Bar(not args.json), seconds=args.seconds, adapt_embedding=args.adapt_embedding)
    if args.json:
        _print(result, True)
    else:
        _show_figures(result)


def cmd_later(args):
    with _open(args) as p:
        p.defer(args.group)
        n = len(p.group(args.group).members)
    if args.json:
        _print({"later": args.group, "photos": n}, True)
    else:
        print(f"group {args.group} left for later: its {n} photos come back after everything else "
              "(undo brings it back now)")


def cmd_clear(args):
    with _open(args) as p:
        p.clear(args.paths)
        _report_status(p.status(), args.json)


def cmd_restore(args):
    with _open(args) as p:
        aside = p.set_aside_photos()
        if args.paths:
            known = set(aside)
            for path in args.paths:
                info = p.photo_info(path)        # an unknown photo: a one-line reason
                if info["path"] not in known:
                    raise ProjectError(f"{path} is not set aside (it is {info['state']}); 'kinfold clear' "
                                       "removes a label")
            chosen = [p.photo_info(path)["path"] for path in args.paths]
        else:
            chosen = aside
        if chosen:
            p.clear(chosen)
        st = p.status()
    if args.json:
        _print({"restored": chosen, "status": dataclasses.asdict(st)}, True)
        return
    print(f"{len(chosen)} set-aside photo{'s' if len(chosen) != 1 else ''} back in the pool"
          + ("" if chosen else " (none was set aside)"))
    print()
    _show_status(st)


def cmd_review(args):
    with _open(args, lock=False) as p:     # only reads
        if args.label not in p.label_arrays()[2]:     # its one line before any wait for the graph
            raise ProjectError(f"no photo carries the label {args.label!r}")
        prepare_on_terminal(p, args.json)
        found = p.review(args.label)
    shown = found[: args.limit]
    if args.json:
        _print([{"path": path, "typicality": round(t, 4)} for path, t in shown], True)
        return
    print(f"{len(found)} photos labelled {args.label!r}, least typical first (typicality: cosine similarity "
          "to the label's other photos)")
    print("\n".join(_table([("typicality", "photo")] + [(f"{t:.3f}", path) for path, t in shown])))
    if len(found) > len(shown):
        print(f"... {len(found) - len(shown)} more (--limit)")


def cmd_stats(args):
    with _open(args, lock=False) as p:     # only reads: works while the window has the folder open
        st = p.statistics()
        protected = [(p.folder, "the photo folder"), (p.store.directory, "the project store")]
    if args.csv:
        _write_new_file(args.csv, st, args.overwrite, protected)
    if args.json:
        _print(st.as_dict(), True)
        return
    if args.csv:
        print(f"statistics written to {args.csv}")
        return
    total = st.total
    print(f"{st.photos} photos, {sum(st.by_label.values())} labelled under {_plural(len(st.by_label), 'label')}")
    if st.by_label:
        print()
        top = max(st.by_label.values())
        print("\n".join(_table([("label", "photos", "")] + [(label, n, "#" * max(1, round(30 * n / top)))
                                                             for label, n in st.by_label.items()])))

    def rate(a):
        return "-" if a.labels_per_hour is None else f"{a.labels_per_hour:.0f}"

    def share(a):
        return "-" if a.as_suggested_share is None else f"{a.as_suggested_share:.0%} of {a.suggested}"
    print()
    rows = [("annotator", "actions", "labels", "active h", "labels/h", "accepted as suggested")]
    for a in st.annotators + ([total] if len(st.annotators) > 1 else []):
        rows.append((a.annotator, a.actions, a.labels_given, f"{a.active_seconds / 3600:.2f}", rate(a), share(a)))
    print("\n".join(_table(rows)))
    if st.per_hour:
        print()
        print("\n".join(_table([("hour (UTC)", "labels")] + [(h.replace("T", " ") + ":00", n)
                                                             for h, n in st.per_hour.items()])))


def _write_new_file(path: str, stats, overwrite: bool, protected) -> None:
    """Write the statistics table to `path`; an existing file is replaced only with `overwrite`;
    never inside the photo folder or the store (as exports)."""
    from pathlib import Path

    real = Path(path).expanduser().resolve()
    for root, what in protected:
        root = Path(root).resolve()
        if real == root or root in real.parents:
            raise ProjectError(f"cannot write {path}: it is inside {what} {root}; choose a file outside it")
    if os.path.isdir(path):
        raise ProjectError(f"{path} is a folder; give a file name")
    if os.path.lexists(path) and not overwrite:
        raise ProjectError(f"{path} exists; choose another name, or replace it with --overwrite")
    stats.write_csv(path)


def _version() -> str:
    from importlib import metadata
    try:
        return metadata.version("kinfold")
    except metadata.PackageNotFoundError:  # run from a checkout that was never installed
        import tomllib
        pyproject = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "pyproject.toml")
        try:
            with open(pyproject, "rb") as f:
                return tomllib.load(f)["project"]["version"]
        except (OSError, KeyError, ValueError):
            return "unknown"


def cmd_import(args):
    bar = _Bar(not args.json)
    with _InterruptToCancel() as interrupt, _open(args) as p:
        rep = p.import_labels(csv=args.csv, coco=args.coco, folders=args.folders, subfolders=args.subfolders,
                              path_column=args.path_column, label_column=args.label_column,
                              replace=args.replace, dry_run=args.dry_run, progress=bar,
                              cancel=interrupt.asked.is_set)
    if args.json:
        _print(rep, True)
    else:
        print("\n".join(rep.lines()))
    if rep.cancelled:
        print("kinfold: import interrupted; nothing was imported", file=sys.stderr)
        return 130


def cmd_rename(args):
    from core.label_rename import NameQuestion

    with _open(args) as p:
        try:
            done = p.rename_label(args.old, args.new, confirm=args.yes)
        except NameQuestion as q:
            print(f"kinfold: {_one_line(q)}; to merge: kinfold rename FOLDER {_quoted(args.old)} "
                  f"{_quoted(q.near[0])}; to keep the new name: add --yes", file=sys.stderr)
            return 1
    if args.json:
        _print(done, True)
    else:
        verb = "merged into" if done.merged else "renamed to"
        print(f"{done.old!r} {verb} {done.new!r}: {done.photos} photos (undo reverses it)")


def _quoted(text: str) -> str:
    import shlex
    return shlex.quote(text)


def cmd_backdrop(args):
    """Switch the opt-in backdrop correction on or off (core/backdrop_correction.py)."""
    bar = _Bar(not args.json)
    with _InterruptToCancel() as interrupt, _open(args) as p:
        info = p.backdrop_correction(None if args.off else args.groups, progress=bar, cancel=interrupt.asked.is_set)
    if info.get("cancelled"):
        print(("\n" if bar.enabled else "") + "kinfold: interrupted; nothing changed", file=sys.stderr)
        return 130
    if args.json:
        _print(dict(info, on=not args.off), True)
    elif args.off:
        print("backdrop correction off: proposals use the photos' features as they are")
    else:
        unread = f"; {info['unreadable']} photos could not be read" if info["unreadable"] else ""
        print(f"backdrop correction on: {info['photos']} photos in {info['clusters']} backdrop groups "
              f"({', '.join(map(str, info['sizes']))} photos){unread}; new groups are formed without what "
              f"each backdrop group shares")
        check = info.get("check")
        if check:
            print(f"your {check['labelled']} labelled photos: their nearest labelled photos carry the same label "
                  f"{check['before']:.3f} of the time without it, {check['after']:.3f} with it: "
                  + {"helps": "it helps this collection",
                     "hurts": "it hurts this collection; 'kinfold backdrop FOLDER --off' switches it off",
                     "no clear difference": "no clear difference yet"}[check["verdict"]])


def cmd_open(args):
    # The engine never imports the window: the window replaces this process (same pid, so whoever
    # started `kinfold open` can still stop it), and Qt loads only there.
    import importlib.util

    if importlib.util.find_spec("PySide6") is None:
        raise ProjectError("the window needs PySide6: pip install PySide6-Essentials (see README, Set up)")
    argv = [sys.executable, "-m", "app.main"] + ([args.folder] if args.folder else [])
    sys.stdout.flush()
    sys.stderr.flush()
    os.execv(sys.executable, argv)


class _Parser(argparse.ArgumentParser):
    """Usage errors as one line (argparse prints the whole usage block), exit status 2."""

    def error(self, message):
        self.exit(2, f"{self.prog}: {_one_line(message)}; see '{self.prog} --help'\n")


def _whole(lo: int, hi: int, what: str):
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{what} must be a whole number, not {text!r}") from None
        if not lo <= value <= hi:
            raise argparse.ArgumentTypeError(f"{what} must be between {lo} and {hi}, not {text}")
        return value
    return parse


_group_id = _whole(0, _MAX_ID, "a group id (shown by 'kinfold propose')")


def _scheduler(text: str) -> str:
    """`--cluster tcp://HOST:PORT`: a Dask scheduler's address."""
    from core.cluster_scan import parse_target

    try:
        target = parse_target(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None
    if not isinstance(target, str):
        raise argparse.ArgumentTypeError(f"{text!r} is not a scheduler address; write it as tcp://HOST:PORT "
                                         f"(for local worker processes use --workers N)")
    return target


def _split(text: str) -> tuple[float, ...]:
    """`--split 0.8,0.1,0.1`: 1 to 3 finite, non-negative fractions that add up to 1."""
    hint = "give 1 to 3 fractions for train,val,test that add up to 1, e.g. --split 0.8,0.1,0.1"
    try:
        values = tuple(float(v) for v in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a list of numbers; {hint}") from None
    if not 1 <= len(values) <= 3:
        problem = f"{len(values)} fractions"
    elif not all(math.isfinite(v) for v in values):
        problem = "not every fraction is a finite number"
    elif any(v < 0 for v in values):
        problem = "a fraction is negative"
    elif abs(sum(values) - 1) > 1e-6:
        problem = f"the fractions add up to {sum(values):g}"
    else:
        return values
    raise argparse.ArgumentTypeError(f"{text!r}: {problem}; {hint}")


_PATHS_HELP = "photos, as paths relative to FOLDER (as 'kinfold propose' lists them)"


def build_parser() -> argparse.ArgumentParser:
    ap = _Parser(prog="kinfold", description="Label a folder of photos a group at a time.",
                 epilog="'kinfold VERB --help' describes a verb and its arguments.")
    ap.add_argument("--version", action="version", version=f"kinfold {_version()}",
                    help="print the version and stop")
    sub = ap.add_subparsers(dest="command", required=True, metavar="VERB")

    def verb(name, func, help_, folder=True):
        s = sub.add_parser(name, help=help_, description=help_)
        if folder:
            s.add_argument("folder", help="the photo folder")
            s.add_argument("--store", help="keep the project store here instead of FOLDER/.kinfold")
            s.add_argument("--annotator", help="name recorded with each decision (default: your login)")
            s.add_argument("--json", action="store_true", help="machine-readable output")
            s.add_argument("--wait", type=_seconds, metavar="SECONDS",
                           help="if another Kinfold window or command has the folder open, try again until "
                                "it is free or SECONDS have passed (default: stop at once)")
        s.set_defaults(func=func, parser=s)
        return s

    s = verb("scan", cmd_scan, "find and embed new or changed photos (a progress bar when run in a terminal)")
    where = s.add_mutually_exclusive_group()
    where.add_argument("--cluster", type=_scheduler, metavar="tcp://HOST:PORT",
                       help="embed on the workers of this Dask scheduler (see README: scanning on a cluster)")
    where.add_argument("--workers", type=_whole(1, 256, "--workers"), metavar="N",
                       help="embed in N local worker processes (a Dask LocalCluster on 127.0.0.1)")
    s.add_argument("--network", choices=sorted(NETWORKS), default=None,
                   help="the network that embeds the photos: lite0 (EfficientNet-Lite0, what a new folder gets) or "
                        "lite2 (EfficientNet-Lite2: about twice the time per photo; README 'A larger network'). A "
                        "folder keeps the network it was scanned with; naming the other one embeds every photo again")
    s.add_argument("--chunk", type=_whole(1, 100_000, "--chunk"), default=None,
                   help="photos per cluster task (default 32)")
    s.add_argument("--transfer", choices=["auto", "path", "bytes"], default="auto",
                   help="how workers get the photos: open the shared path, or bytes sent from here "
                        "(default: the path when every worker sees the folder)")
    s = verb("propose", cmd_propose, "list the next groups to confirm")
    s.add_argument("--limit", type=_whole(1, 100_000, "--limit"), default=10, help="groups listed (default 10)")
    s.add_argument("--show", type=_whole(0, 100_000, "--show"), default=6, help="members listed per group")
    s = verb("accept", cmd_accept, "label a proposed group")
    s.add_argument("group", type=_group_id, help="the group id, as 'kinfold propose' shows it")
    s.add_argument("label", help="the label for its members")
    s.add_argument("--drop", nargs="*", default=[], help="members to leave out (they go back to the pool)")
    s = verb("label", cmd_label, "label photos directly")
    s.add_argument("label", help="the label to give")
    s.add_argument("paths", nargs="+", help=_PATHS_HELP)
    s = verb("split", cmd_split, "break a group into two coherent parts")
    s.add_argument("group", type=_group_id, help="the group id, as 'kinfold propose' shows it")
    s.add_argument("--show", type=_whole(0, 100_000, "--show"), default=6, help="members listed per part")
    s = verb("set-aside", cmd_set_aside, "mark photos as belonging to no class")
    s.add_argument("paths", nargs="+", help=_PATHS_HELP)
    verb("undo", cmd_undo, "reverse the last label decision")
    verb("redo", cmd_redo, "apply again the decision the last undo reversed (only right after an undo)")
    verb("status", cmd_status, "counts by state and label")
    s = verb("browse", cmd_browse, "list photos by state, label, subfolder or file name (path, state, label)")
    s.add_argument("--state", choices=["unlabelled", "aside", "labelled"], help="only photos in this state")
    s.add_argument("--label", help="only photos carrying this label")
    s.add_argument("--subfolder", help="only photos inside this folder ('.' for the top level)")
    s.add_argument("--name", help="text the file name contains")
    s.add_argument("--offset", type=_whole(0, 10**12, "--offset"), default=0,
                   help="skip this many matching photos first (default 0)")
    s.add_argument("--limit", type=_whole(1, 10**12, "--limit"), default=None,
                   help="list at most this many (default: all)")
    s = verb("mistakes", cmd_mistakes, "labelled photos whose label is most likely wrong, likeliest first")
    s.add_argument("--limit", type=_whole(1, 1_000_000, "--limit"), default=20, help="photos listed (default 20)")
    s = verb("confirm", cmd_confirm, "say the photos' labels are right (or, with --label, fix them): they "
                                     "leave the mistakes list")
    s.add_argument("paths", nargs="+", help=_PATHS_HELP)
    s.add_argument("--label", help="the right label, when the present one is wrong")
    s = verb("export", cmd_export, "write the labelled photos out")
    s.add_argument("--csv", metavar="FILE", help="a CSV table (RFC 4180): path, label, how, annotator, time "
                                                 "(and split, with --split)")
    s.add_argument("--coco", metavar="FILE", help="a COCO JSON file (image-level categories); with --split, "
                                                  "one file per split: FILE's name with -train, -val, -test")
    s.add_argument("--folders", metavar="DIR", help="a class-folder tree, DIR/<label>/<photo> "
                                                    "(DIR/<split>/<label>/<photo> with --split)")
    s.add_argument("--split", type=_split, help="train,val,test fractions, e.g. 0.8,0.1,0.1: stratified by label, "
                                                "near-duplicates kept on one side; applies to every format asked")
    s.add_argument("--mode", choices=["link", "copy"], default="link",
                   help="class folders hold symbolic links to the photos (default: no extra disk space, "
                        "written in seconds) or copies (to move the set elsewhere)")
    s.add_argument("--overwrite", action="store_true",
                   help="replace a file that is not a Kinfold export, or write into a non-empty folder that is "
                        "not one (its files are kept unless a photo takes their name)")
    s = verb("relearn", cmd_relearn, "relearn the label classifier from the decisions so far")
    s.add_argument("--seconds", type=float, default=None, help="time budget in seconds (default: none)")
    s.add_argument("--adapt-embedding", action="store_true",
                   help="also train the projection head that adapts the embedding "
                        "(slower; it lowered yield in our benchmark)")
    # --- cli: later, clear, restore, review, stats ---
    s = verb("later", cmd_later, "leave a group for later: its photos come back after everything else")
    s.add_argument("group", type=_group_id, help="the group id, as 'kinfold propose' shows it")
    s = verb("clear", cmd_clear, "remove photos' labels (or set-aside marks): they go back to the pool")
    s.add_argument("paths", nargs="+", help=_PATHS_HELP)
    s = verb("restore", cmd_restore, "bring set-aside photos back to the pool (all of them, or those named)")
    s.add_argument("paths", nargs="*", help="set-aside photos to bring back (default: every one)")
    s = verb("review", cmd_review, "a label's photos, least typical first (where a wrong label shows)")
    s.add_argument("label", help="the label to review")
    s.add_argument("--limit", type=_whole(1, 1_000_000, "--limit"), default=50, help="photos listed (default 50)")
    s = verb("stats", cmd_stats, "photos per label, labels per hour, suggestions accepted as they were, "
                                 "per annotator")
    s.add_argument("--csv", metavar="FILE", help="also write the figures to FILE as a CSV table")
    s.add_argument("--overwrite", action="store_true", help="replace FILE if it exists")
    # --- import: import, rename ---
    s = verb("import", cmd_import, "bring in labels the photos already have (one undoable decision)")
    s.add_argument("--csv", metavar="FILE", help="a CSV file with a header row: a path and a label column")
    s.add_argument("--path-column", metavar="NAME", help="the CSV column holding the photo paths (relative to "
                                                          "FOLDER, or absolute inside it); default: path, file, ...")
    s.add_argument("--label-column", metavar="NAME", help="the CSV column holding the labels; default: label, "
                                                           "class, category, ...")
    s.add_argument("--coco", metavar="FILE", help="a COCO JSON file: each image takes its annotations' category")
    s.add_argument("--folders", metavar="DIR", help="a class-folder tree: each subfolder of DIR is a label; files "
                                                    "match photos by content, wherever they lie")
    s.add_argument("--subfolders", action="store_true", help="each photo takes the name of the subfolder of "
                                                             "FOLDER it lies in")
    s.add_argument("--replace", action="store_true", help="give photos that carry another label the incoming one "
                                                          "(default: keep theirs and list the conflict)")
    s.add_argument("--dry-run", action="store_true", help="report what would happen, change nothing")
    s = verb("rename", cmd_rename, "rename a label; onto an existing label, merge the two (undoable)")
    s.add_argument("old", help="the label as it is now")
    s.add_argument("new", help="the new name (an existing label: merge)")
    s.add_argument("--yes", action="store_true", help="keep the new name even when it is close to an existing "
                                                      "label (case, spacing or a prefix)")
    # --- order19: backdrop ---
    s = verb("backdrop", cmd_backdrop, "group photos by what they show, not what they lie on: estimate each photo's "
                                       "backdrop from its edges and take it out of the comparison (one more pass "
                                       "over the photos; helps photos shot on a few backdrops, hurts "
                                       "photos that fill the frame)")
    on_off = s.add_mutually_exclusive_group()
    on_off.add_argument("--groups", type=_whole(2, 1000, "--groups"), default=4,
                        help="backdrop groups to look for (default 4)")
    on_off.add_argument("--off", action="store_true", help="switch the correction off again")
    s = sub.add_parser("open", help="open the desktop window", description="open the desktop window")
    s.add_argument("folder", nargs="?", help="the photo folder to open (default: choose in the window)")
    s.set_defaults(func=cmd_open)
    return ap


def _seconds(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"--wait takes a number of seconds, not {text!r}") from None
    if not (math.isfinite(value) and 0 <= value <= 86400 * 7):
        raise argparse.ArgumentTypeError(f"--wait must be between 0 and 604800 seconds, not {text}")
    return value


def _one_line(text) -> str:
    return " ".join(str(text).splitlines()) or "no details"


def _store_path(args) -> str:
    folder = getattr(args, "folder", None) or "."
    return getattr(args, "store", None) or os.path.join(folder, STORE_DIR)


def _reason(exc: BaseException, args) -> str:
    """One line for the user: what went wrong and what to do."""
    if isinstance(exc, (ProjectError, StoreError, ExportError)):
        return _one_line(exc)
    if isinstance(exc, sqlite3.Error):
        store = _store_path(args)
        # A failed ROLLBACK can hide the error that caused it: use the first specific code.
        chain, e = [], exc
        while isinstance(e, sqlite3.Error) and len(chain) < 10:
            chain.append((getattr(e, "sqlite_errorcode", None) or 0) & 0xFF)  # primary result code
            e = e.__cause__ or e.__context__
        code = next((c for c in chain if c in _SQLITE_ADVICE), chain[0])
        if code == _SQLITE_FULL:
            return f"the disk holding the project store {store} is full; free some space and run the command again"
        if code in (_SQLITE_BUSY, _SQLITE_LOCKED):
            return f"the project store {store} is busy (another Kinfold is writing); try again in a moment"
        if code in (_SQLITE_READONLY, _SQLITE_CANTOPEN, _SQLITE_PERM):
            return (f"cannot write the project store {store} ({_one_line(exc)}); check its permissions, or "
                    "keep the store elsewhere with --store")
        if isinstance(exc, sqlite3.DatabaseError):
            return (f"the project store {store} is damaged ({_one_line(exc)}); restore it from a backup, or "
                    "move it aside to start the project again")
        return f"the project store {store} cannot be used ({_one_line(exc)})"
    if isinstance(exc, OSError):
        where = f" ({exc.filename})" if exc.filename else ""
        if exc.errno in (errno.ENOSPC, getattr(errno, "EDQUOT", None)):
            return f"the disk is full{where}; free some space and run the command again"
        if exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
            return f"{exc.strerror or 'not allowed'}{where}; check the permissions or use --store elsewhere"
        return f"{exc.strerror or _one_line(exc)}{where}"
    if isinstance(exc, ValueError):
        return _one_line(exc)
    return (f"unexpected error: {type(exc).__name__}: {_one_line(exc)} (rerun with {DEBUG_ENV}=1 to see the "
            "details, and report them)")


def main(argv=None) -> int:
    args = build_parser().parse_args(argv)
    if args.func is cmd_export:
        if not (args.csv or args.coco or args.folders):
            args.parser.error("say what to export: --csv FILE, --coco FILE and/or --folders DIR")
    if args.func is cmd_import:
        given = [o for o, v in (("--csv", args.csv), ("--coco", args.coco), ("--folders", args.folders),
                                ("--subfolders", args.subfolders)) if v]
        if len(given) != 1:
            args.parser.error("say where the labels come from, one of --csv FILE, --coco FILE, --folders DIR, "
                              "--subfolders" + (f" (given: {' '.join(given)})" if given else ""))
        if (args.path_column or args.label_column) and not args.csv:
            args.parser.error("--path-column and --label-column choose columns of --csv FILE")
    try:
        rc = args.func(args)
        sys.stdout.flush()  # a closed pipe shows here, inside the handler
        return int(rc or 0)
    except BrokenPipeError:
        # The reader went away (`kinfold status F | head -1`): stop quietly. Python would report
        # the failed flush at exit too, so stdout is pointed at /dev/null first.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
    except KeyboardInterrupt:
        print("kinfold: interrupted; decisions made so far are saved", file=sys.stderr)
        return 130
    except GraphInterrupted as exc:      # Ctrl+C while the graph was built (app/graph_progress.py)
        print(f"kinfold: {exc}", file=sys.stderr)
        return 130
    except Exception as exc:
        if os.environ.get(DEBUG_ENV):
            raise
        print(f"kinfold: {_reason(exc, args)}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    raise SystemExit(main())
