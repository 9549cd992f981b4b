"""The `kinfold` command: the verbs of `core.project.Project` from a shell.

Every command takes the photo folder first; `--store DIR` keeps the project store elsewhere.
Exit status 0 on success, 1 with a one-line reason on stderr for bad input, 2 for bad usage.
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import signal
import sys
import threading
import time

from core.project import Project, ProjectError
from core.store import StoreError


class _Bar:
    """A one-line progress bar on stderr: done/total, rate, time left. Silent when not a terminal."""

    def __init__(self, enabled: bool):
        self.enabled = enabled and sys.stderr.isatty()
        self.t0 = time.monotonic()
        self.last = 0.0
        self.message = None

    def __call__(self, done: int, total: int, message: str) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if message != self.message:
            self.t0, self.message = now, message
        if now - self.last < 0.1 and done < total:
            return
        self.last = now
        frac = done / total if total else 1.0
        rate = done / max(now - self.t0, 1e-6)
        left = (total - done) / rate if rate > 0 else 0
        bar = "#" * int(30 * frac)
        sys.stderr.write(f"\r{message:<16} [{bar:<30}] {done}/{total}  {rate:6.1f}/s  {left:5.0f} s left ")
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
    return Project.open(args.folder, store=args.store, annotator=getattr(args, "annotator", None), lock=lock)


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
    with _InterruptToCancel() as interrupt, _open(args) as p:
        rep = p.scan(progress=bar, cancel=interrupt.asked.is_set)
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
        groups = p.propose(limit=args.limit)
        if args.json:
            _print([dict(dataclasses.asdict(g), splittable=g.splittable) for g in groups], True)
            return
        for g in groups:
            sug = f"  suggests '{g.suggested_label}' ({g.confidence:.2f})" if g.suggested_label else ""
            print(f"group {g.id}: {len(g.members)} photos, trust {g.trust:.2f}, {g.kind}{sug}")
            for m in g.members[: args.show]:
                print(f"    {m}")
            if len(g.members) > args.show:
                print(f"    ... {len(g.members) - args.show} more")


def cmd_accept(args):
    with _open(args) as p:
        p.accept(args.group, args.label, drop=args.drop)
        _print(p.status(), args.json)


def cmd_label(args):
    with _open(args) as p:
        p.label(args.paths, args.label)
        _print(p.status(), args.json)


def cmd_split(args):
    with _open(args) as p:
        parts = p.split(args.group)
        _print([dataclasses.asdict(g) for g in parts], args.json)


def cmd_set_aside(args):
    with _open(args) as p:
        p.set_aside(args.paths)
        _print(p.status(), args.json)


def cmd_undo(args):
    with _open(args) as p:
        done = p.undo()
        _print(done or {"undone": None, "reason": "nothing to undo"}, args.json)


def cmd_status(args):
    with _open(args, lock=False) as p:
        _print(p.status(), args.json)


def cmd_export(args):
    if not (args.csv or args.coco or args.folders):
        raise ProjectError("say what to export: --csv FILE, --coco FILE and/or --folders DIR")
    split = tuple(float(s) for s in args.split.split(",")) if args.split else None
    with _open(args) as p:
        written = {}
        if args.csv:
            written["csv"] = {"path": args.csv, "rows": p.export_csv(args.csv)}
        if args.coco:
            written["coco"] = {"path": args.coco, **p.export_coco(args.coco)}
        if args.folders:
            written["folders"] = {"path": args.folders,
                                  **p.export_folders(args.folders, split=split, mode=args.mode)}
        _print(written, args.json)


def cmd_relearn(args):
    with _open(args) as p:
        result = p.relearn(progress=_Bar(not args.json), seconds=args.seconds, adapt_embedding=args.adapt_embedding)
        _print(result, args.json)


def cmd_open(args):
    from app.main import main as app_main  # Qt is imported only for the window

    return app_main([args.folder] if args.folder else [])


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="kinfold", description="Label a folder of photos a group at a time.")
    sub = ap.add_subparsers(dest="command", required=True)

    def verb(name, func, help_, folder=True):
        s = sub.add_parser(name, help=help_)
        if folder:
            s.add_argument("folder", help="the photo folder")
            s.add_argument("--store", help="keep the project store here instead of FOLDER/.kinfold")
            s.add_argument("--annotator", help="name recorded with each decision (default: your login)")
            s.add_argument("--json", action="store_true", help="machine-readable output")
        s.set_defaults(func=func)
        return s

    verb("scan", cmd_scan, "find and embed new or changed photos")
    s = verb("propose", cmd_propose, "list the next groups to confirm")
    s.add_argument("--limit", type=int, default=10)
    s.add_argument("--show", type=int, default=6, help="members listed per group")
    s = verb("accept", cmd_accept, "label a proposed group")
    s.add_argument("group", type=int)
    s.add_argument("label")
    s.add_argument("--drop", nargs="*", default=[], help="members to leave out (they go back to the pool)")
    s = verb("label", cmd_label, "label photos directly")
    s.add_argument("label")
    s.add_argument("paths", nargs="+")
    s = verb("split", cmd_split, "break a group into two coherent parts")
    s.add_argument("group", type=int)
    s = verb("set-aside", cmd_set_aside, "mark photos as belonging to no class")
    s.add_argument("paths", nargs="+")
    verb("undo", cmd_undo, "reverse the last label decision")
    verb("status", cmd_status, "counts by state and label")
    s = verb("export", cmd_export, "write the labelled photos out")
    s.add_argument("--csv")
    s.add_argument("--coco")
    s.add_argument("--folders")
    s.add_argument("--split", help="train,val,test fractions for --folders, e.g. 0.8,0.1,0.1")
    s.add_argument("--mode", choices=["link", "copy"], default="link")
    s = verb("relearn", cmd_relearn, "relearn the label classifier from the decisions so far")
    s.add_argument("--seconds", type=float, default=None, help="time budget")
    s.add_argument("--adapt-embedding", action="store_true",
                   help="also train the projection head that adapts the embedding "
                        "(slower; it lowered yield in our benchmark)")
    s = sub.add_parser("open", help="open the desktop window")
    s.add_argument("folder", nargs="?")
    s.set_defaults(func=cmd_open)
    return ap


def main(argv=None) -> int:
    args = build_parser().parse_args(argv)
    try:
        rc = args.func(args)
        return int(rc or 0)
    except (ProjectError, StoreError, FileNotFoundError, NotADirectoryError, PermissionError, ValueError) as exc:
        print(f"kinfold: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("kinfold: interrupted; decisions made so far are saved", file=sys.stderr)
        return 130


if __name__ == "__main__":
    raise SystemExit(main())
