"""Bringing in labels the user already has: a CSV file, a COCO JSON file, a class-folder tree, or the
photo folder's own subfolder names.

Every source is read into entries (which photo, which label, where in the source), every entry is
matched to a photo of the project, and what matched becomes ONE decision of kind ``import`` (undone
as one step by `Project.undo`). Nothing is guessed:

- a CSV row names its photo by a path relative to the photo folder, or an absolute path inside it
  (RFC 4180, read with Python's csv module; cells separated by ',', or by ';' or a tab when the
  header row holds no comma; the path and label columns are chosen by name, or found
  among the usual names: ``path``/``file``/``filename``/``image``, ``label``/``class``/``category``);
- a COCO image (``file_name`` read like a CSV path) takes the category of its annotations; an image
  whose annotations name several categories is reported, not labelled (image-level labels only);
- a class-folder tree: each subfolder of the given folder is a label, and every file under it is
  matched to the project's photos by its content fingerprint (the scan's BLAKE2b), so copies kept
  anywhere, under any name, still match; a tree divided into train/val/test folders first (all its
  top folders so named, as a split export writes it) takes its labels from the folders inside those;
- the photo folder's own subfolders: each photo takes the name of the folder it lies in.

A photo that already carries a different label (or is set aside) is a conflict: listed with the
existing and the incoming label, kept unless ``replace=True``. A photo that already carries the
incoming label is counted as unchanged. Entries that match no photo are listed with the reason.
A dry run reads and matches everything and writes nothing.

The source of each import is kept in the store setting ``import_sources`` ({decision id: text}),
written in the same transaction as the decision.
"""
from __future__ import annotations

import csv
import json
import os
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Callable

from core import catalogue
from core.images import IMAGE_SUFFIXES, PhotoError, open_regular

if TYPE_CHECKING:
    from core.project import Project

Progress = Callable[[int, int, str], None]
Cancel = Callable[[], bool]

HOW = "import"                      # the `how` of an imported label row
SOURCES_SETTING = "import_sources"
PATH_COLUMNS = ("path", "file", "filename", "file_name", "image", "photo", "filepath", "file_path")
LABEL_COLUMNS = ("label", "class", "category", "class_name", "category_name", "tag")
_CSV_FIELD_LIMIT = 1 << 20
# A class-folder tree whose top folders all bear these names is divided into parts (as Kinfold's own
# export with a split writes it): the labels are the folders inside each part.
SPLIT_FOLDERS = {"train", "val", "valid", "validation", "test"}


class ImportError_(Exception):
    """A source that cannot be read at all (missing file, not CSV/JSON, no such column); one line."""


@dataclass
class Conflict:
    path: str
    existing: str            # the label it carries now ("(set aside)" for a photo set aside)
    incoming: str


@dataclass
class ImportReport:
    source: str                              # what was read, in words
    entries: int = 0                         # entries read from the source (rows, images, files, photos)
    matched: int = 0                         # entries that matched a photo of the project
    labelled: int = 0                        # photos given a label by this import (new ones and replaced)
    unchanged: int = 0                       # photos that already carried the incoming label
    replaced: int = 0                        # conflicts resolved in favour of the incoming label
    conflicts: list[Conflict] = field(default_factory=list)
    not_matched: list[tuple[str, str]] = field(default_factory=list)   # (entry, reason)
    several: list[tuple[str, list[str]]] = field(default_factory=list)  # COCO images with several categories
    labels: dict[str, int] = field(default_factory=dict)               # photos per label given now
    replace: bool = False
    dry_run: bool = False
    cancelled: bool = False
    decision: int | None = None              # the logged decision (None: dry run, or nothing to change)

    def lines(self) -> list[str]:
        """The report as aligned text (the CLI prints it; the window shows it)."""
        verb = "would be" if self.dry_run else "were"
        rows = [("read", f"{self.entries} entries from {self.source}"),
                ("matched", f"{self.matched} to photos of the project"),
                ("labelled", f"{self.labelled} photos {verb} labelled" +
                 (f" ({self.replaced} replacing another label)" if self.replaced else "")),
                ("unchanged", f"{self.unchanged} already carried that label"),
                ("conflicts", f"{len(self.conflicts)} carry another label: " +
                 ("replaced by the incoming one" if self.replace else "kept (replace to take the incoming one)")),
                ("not matched", f"{len(self.not_matched)}"),
                ("several", f"{len(self.several)} COCO images with several categories (not labelled)")]
        width = max(len(k) for k, _ in rows)
        out = [f"{k:<{width}}  {v}" for k, v in rows if k != "several" or self.several]
        if self.cancelled:
            out.insert(0, "cancelled: nothing was imported")
        elif self.dry_run:
            out.insert(0, "dry run: nothing was imported")
        if self.labels:
            w = max(len(n) for n in self.labels)
            out.append("labels:")
            out += [f"  {n:<{w}}  {c}" for n, c in sorted(self.labels.items())]
        if self.conflicts:
            w = max(len(_shown(c.path)) for c in self.conflicts)
            out.append("conflicts (photo: existing -> incoming):")
            out += [f"  {_shown(c.path):<{w}}  {c.existing} -> {c.incoming}" for c in self.conflicts]
        if self.several:
            out.append("several categories (not labelled):")
            out += [f"  {_shown(p)}: {', '.join(map(_shown, cats))}" for p, cats in self.several]
        if self.not_matched:
            w = min(max(len(_shown(e)) for e, _ in self.not_matched), 60)
            out.append("not matched:")
            out += [f"  {_shown(e):<{w}}  {r}" for e, r in self.not_matched]
        return out


def _shown(text: str) -> str:
    """Text from a source as one printable line: control characters (a NUL, a line break) as escapes."""
    return "".join(ch if ch.isprintable() else ascii(ch)[1:-1] for ch in text)


@dataclass
class _Entry:
    where: str                  # how the entry is named in the report (a path, "row 7: path", ...)
    label: str
    path: str | None = None     # a path relative to the photo folder, or
    fingerprint: str | None = None


# -- reading the sources --------------------------------------------------------------------------
def _relative(folder: Path, text: str) -> tuple[str | None, str]:
    """A path from a source as a path relative to the photo folder, or (None, the reason)."""
    text = text.strip()
    if not text:
        return None, "the path is empty"
    if "\x00" in text:
        return None, "the path holds a NUL character, which no file name can"
    if "\\" in text and "/" not in text:
        text = text.replace("\\", "/")          # written on Windows
    p = Path(text)
    if p.is_absolute():
        norm = Path(os.path.normpath(p))
        for base in (folder, Path(os.path.realpath(folder))):
            try:
                return norm.relative_to(base).as_posix(), ""
            except ValueError:
                pass
        real = Path(os.path.realpath(norm))
        try:
            return real.relative_to(folder).as_posix(), ""
        except ValueError:
            return None, "outside the photo folder"
    norm = os.path.normpath(text)
    if norm == ".." or norm.startswith("../") or norm == ".":
        return None, "outside the photo folder"
    return Path(norm).as_posix(), ""


def _read_text(path: Path, what: str) -> str:
    try:
        with open(path, encoding="utf-8-sig", newline="") as f:
            return f.read()
    except FileNotFoundError:
        raise ImportError_(f"there is no {what} file {path}") from None
    except IsADirectoryError:
        raise ImportError_(f"{path} is a folder, not a {what} file") from None
    except UnicodeDecodeError:
        raise ImportError_(f"{path} is not UTF-8 text, so it is not a {what} file Kinfold can read") from None
    except OSError as exc:
        raise ImportError_(f"cannot read {path}: {exc.strerror or exc}") from None


def _pick(header: list[str], asked: str | None, usual: tuple[str, ...], what: str, path: Path) -> int:
    names = [h.strip() for h in header]
    if asked is not None:
        if asked in names:
            return names.index(asked)
        folded = [n.casefold() for n in names]
        if asked.strip().casefold() in folded:
            return folded.index(asked.strip().casefold())
        raise ImportError_(f"{path.name} has no column {asked!r}; its columns: {', '.join(names)}")
    folded = [n.casefold() for n in names]
    for u in usual:
        if u in folded:
            return folded.index(u)
    raise ImportError_(f"cannot tell which column of {path.name} holds the {what} (columns: {', '.join(names)}); "
                       f"name it with --{what}-column")


def read_csv(path: Path, folder: Path, path_column: str | None = None,
             label_column: str | None = None) -> tuple[list[_Entry], list[tuple[str, str]]]:
    """Entries of a CSV file with a header row (RFC 4180 via Python's csv module); bad rows as
    (where, reason)."""
    text = _read_text(path, "CSV")
    csv.field_size_limit(max(csv.field_size_limit(), _CSV_FIELD_LIMIT))
    first = text.split("\n", 1)[0]
    # A spreadsheet set to another locale writes ';' (or a tab) between cells; the header tells.
    delimiter = next((d for d in (",", ";", "\t") if d in first), ",")
    try:
        rows = list(csv.reader(text.splitlines(keepends=True), delimiter=delimiter))
    except csv.Error as exc:
        raise ImportError_(f"{path.name} is not a readable CSV file: {exc}") from None
    if not rows:
        raise ImportError_(f"{path.name} is empty (a CSV file needs a header row naming its columns)")
    header = rows[0]
    pi = _pick(header, path_column, PATH_COLUMNS, "path", path)
    li = _pick(header, label_column, LABEL_COLUMNS, "label", path)
    entries, bad = [], []
    for n, row in enumerate(rows[1:], start=2):
        if not any(cell.strip() for cell in row):
            continue                                    # a blank line
        where = f"line {n}"
        if len(row) <= max(pi, li):
            bad.append((where, f"has {len(row)} cells; the path and label columns need {max(pi, li) + 1}"))
            continue
        rel, reason = _relative(folder, row[pi])
        where = f"line {n}: {row[pi].strip()}"
        if rel is None:
            bad.append((where, reason))
            continue
        entries.append(_Entry(where, row[li], path=rel))
    return entries, bad


def read_coco(path: Path, folder: Path) -> tuple[list[_Entry], list[tuple[str, str]], list[tuple[str, list[str]]]]:
    """Image-level entries of a COCO JSON file: (entries, bad, images with several categories)."""
    text = _read_text(path, "COCO JSON")
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise ImportError_(f"{path.name} is not JSON ({exc.msg} at line {exc.lineno})") from None
    if not isinstance(data, dict) or not isinstance(data.get("images"), list):
        raise ImportError_(f"{path.name} is not a COCO file: it has no 'images' list")
    cats = {}
    for c in data.get("categories") or []:
        if isinstance(c, dict) and "id" in c and isinstance(c.get("name"), str):
            cats[c["id"]] = c["name"]
    by_image: dict = {}
    for a in data.get("annotations") or []:
        if isinstance(a, dict) and "image_id" in a:
            by_image.setdefault(a["image_id"], []).append(a.get("category_id"))
    entries, bad, several = [], [], []
    for img in data["images"]:
        if not isinstance(img, dict) or not isinstance(img.get("file_name"), str):
            bad.append((f"image {img.get('id', '?') if isinstance(img, dict) else '?'}", "has no file_name"))
            continue
        name = img["file_name"]
        rel, reason = _relative(folder, name)
        if rel is None:
            bad.append((name, reason))
            continue
        ids = by_image.get(img.get("id"), [])
        unknown = [c for c in ids if c not in cats]
        if unknown:
            bad.append((name, f"an annotation names category {unknown[0]!r}, which the file does not list"))
            continue
        names = sorted({cats[c] for c in ids})
        if not names:
            bad.append((name, "no annotation gives it a category"))
        elif len(names) > 1:
            several.append((name, names))
        else:
            entries.append(_Entry(name, names[0], path=rel))
    return entries, bad, several


def read_folders(directory: Path, progress: Progress | None = None, cancel: Cancel | None = None,
                 ) -> tuple[list[_Entry], list[tuple[str, str]], bool]:
    """Entries of a class-folder tree, each keyed by content fingerprint: (entries, bad, cancelled).
    Every subfolder of `directory` is a label; its files, at any depth, are hashed. Hidden files and
    folders are left out (an export's own marker among them)."""
    directory = Path(directory)
    if not directory.is_dir():
        raise ImportError_(f"{directory} is not a folder")
    try:
        tops = sorted(os.scandir(directory), key=lambda e: e.name)
    except OSError as exc:
        raise ImportError_(f"cannot read the folder {directory}: {exc.strerror or exc}") from None
    files: list[tuple[str, str, str]] = []      # (shown name, path, label)
    bad: list[tuple[str, str]] = []
    tops = [t for t in tops if not t.name.startswith(".")]
    folders = [t for t in tops if t.is_dir()]
    if folders and all(t.name.casefold() in SPLIT_FOLDERS for t in folders):
        parts, tops = tops, []
        for part in parts:
            if not part.is_dir():
                bad.append((part.name, "lies in no label subfolder"))
                continue
            try:
                tops += sorted(os.scandir(part.path), key=lambda e: e.name)
            except OSError as exc:
                bad.append((part.name, f"cannot read the folder: {exc.strerror or exc}"))
        tops = [t for t in tops if not t.name.startswith(".")]
    for top in tops:
        if not top.is_dir():
            bad.append((catalogue.shown_name(os.path.relpath(top.path, directory).replace(os.sep, "/")),
                        "lies in no label subfolder"))
            continue
        for here, dirs, names in os.walk(top.path, followlinks=False):
            dirs[:] = sorted(d for d in dirs if not d.startswith("."))
            for name in sorted(names):
                if name.startswith("."):
                    continue
                full = os.path.join(here, name)
                shown = catalogue.shown_name(os.path.relpath(full, directory).replace(os.sep, "/"))
                if Path(name).suffix.lower() not in IMAGE_SUFFIXES:
                    bad.append((shown, "not a photo (its name has no photo suffix)"))
                    continue
                files.append((shown, full, top.name))
    entries = []
    stop = threading.Event()
    for n, (shown, full, label) in enumerate(files):
        if cancel is not None and cancel():
            return entries, bad, True
        if progress is not None:
            progress(n, len(files), "fingerprinting")
        try:
            with open_regular(full) as f:
                fp = catalogue.fingerprint(f, stop)
        except PhotoError as exc:
            bad.append((shown, str(exc)))
            continue
        except OSError as exc:
            bad.append((shown, f"cannot read the file: {exc.strerror or exc}"))
            continue
        entries.append(_Entry(shown, label, fingerprint=fp))
    if progress is not None:
        progress(len(files), len(files), "fingerprinting")
    return entries, bad, False


def read_subfolders(project: "Project") -> tuple[list[_Entry], list[tuple[str, str]]]:
    """Each photo of the project labelled with the name of the folder it lies in."""
    entries, bad = [], []
    for path in project.photos():
        parts = path.split("/")
        if len(parts) < 2:
            bad.append((path, "lies at the top of the photo folder, in no subfolder"))
        else:
            entries.append(_Entry(path, parts[-2], path=path))
    return entries, bad


# -- matching and applying -------------------------------------------------------------------------
def import_labels(project: "Project", *, csv=None, coco=None, folders=None, subfolders: bool = False,
                  path_column: str | None = None, label_column: str | None = None, replace: bool = False,
                  dry_run: bool = False, progress: Progress | None = None,
                  cancel: Cancel | None = None) -> ImportReport:
    """See the module docstring; `Project.import_labels` calls this. Exactly one source."""
    from core.project import ProjectError, clean_label

    chosen = [name for name, v in (("csv", csv), ("coco", coco), ("folders", folders),
                                   ("subfolders", subfolders)) if v]
    if len(chosen) != 1:
        raise ProjectError("import from one source at a time: a CSV file, a COCO file, a class-folder tree, or "
                           "the photo folder's subfolders" + (f" (given: {', '.join(chosen)})" if chosen else ""))
    if (path_column or label_column) and not csv:
        raise ProjectError("the path and label columns choose CSV columns; they do not apply to " + chosen[0])
    folder = project.folder
    several: list[tuple[str, list[str]]] = []
    cancelled = False
    try:
        if csv:
            source = f"CSV {Path(csv)}"
            entries, bad = read_csv(Path(csv), folder, path_column, label_column)
        elif coco:
            source = f"COCO {Path(coco)}"
            entries, bad, several = read_coco(Path(coco), folder)
        elif folders:
            source = f"class folders {Path(folders)}"
            entries, bad, cancelled = read_folders(Path(folders), progress, cancel)
        else:
            source = f"subfolder names of {folder}"
            entries, bad = read_subfolders(project)
    except ImportError_ as exc:
        raise ProjectError(str(exc)) from None

    report = ImportReport(source=source, entries=len(entries) + len(bad) + len(several),
                          not_matched=list(bad), several=several, replace=replace, dry_run=dry_run,
                          cancelled=cancelled)
    if cancelled:
        return report

    with project._mutex:
        rows, index = project._rows, project._index
        by_fp: dict[str, list[int]] = {}
        for i, r in enumerate(rows):
            by_fp.setdefault(r.fingerprint, []).append(i)
        skipped = project.store.skipped()
        # Entry -> fingerprint, and the label each fingerprint gets (two different labels: reported).
        incoming: dict[str, tuple[str, str]] = {}       # fingerprint -> (label, where)
        clash: dict[str, set[str]] = {}
        for e in entries:
            try:
                label = clean_label(e.label)
            except ProjectError as exc:
                report.not_matched.append((e.where, f"label {e.label!r}: {exc}"))
                continue
            if e.fingerprint is not None:
                if e.fingerprint not in by_fp:
                    report.not_matched.append((e.where, "no photo of the project has this content"))
                    continue
                fp = e.fingerprint
            else:
                i = index.get(e.path)
                if i is None:
                    report.not_matched.append((e.where, _why_missing(folder, e.path, skipped)))
                    continue
                fp = rows[i].fingerprint
            report.matched += 1
            if fp in incoming and incoming[fp][0] != label:
                clash.setdefault(fp, {incoming[fp][0]}).add(label)
                continue
            incoming.setdefault(fp, (label, e.where))
        for fp, names in clash.items():
            incoming.pop(fp, None)
            report.not_matched.append((rows[by_fp[fp][0]].path,
                                       f"given different labels by the source ({', '.join(sorted(names))})"))

        with project.store.transaction() if not dry_run else _nothing():
            existing = project.store.labels()
            changes, photos = {}, []
            for fp, (label, _where) in incoming.items():
                path = rows[by_fp[fp][0]].path
                old = existing.get(fp)
                if old is not None:
                    if old.state == "labelled" and old.label == label:
                        report.unchanged += 1
                        continue
                    report.conflicts.append(Conflict(path, old.label if old.state == "labelled" else "(set aside)",
                                                     label))
                    if not replace:
                        continue
                    report.replaced += 1
                changes[fp] = project._new_row(fp, "labelled", label, HOW)
                photos += [rows[i].path for i in by_fp[fp]]
                report.labels[label] = report.labels.get(label, 0) + len(by_fp[fp])
            report.labelled = sum(len(by_fp[fp]) for fp in changes)
            report.conflicts.sort(key=lambda c: c.path)
            if changes and not dry_run:
                report.decision = project.store.record_decision(HOW, project.annotator, sorted(photos), changes)
                sources = dict(project.store.get_setting(SOURCES_SETTING) or {})
                sources[str(report.decision)] = source
                project.store.set_setting(SOURCES_SETTING, sources)
    return report


def import_source(store, decision: int) -> str | None:
    """What the import logged as `decision` read (None when it is not an import)."""
    return (store.get_setting(SOURCES_SETTING) or {}).get(str(decision))


def _why_missing(folder: Path, rel: str, skipped: dict) -> str:
    if rel in skipped:
        return f"skipped by the scan: {skipped[rel][2]}"
    p = folder / rel
    try:
        if p.is_file():
            return "in the folder but not in the project yet (run scan first)"
        if p.is_dir():
            return "a folder, not a photo"
    except OSError as exc:            # a name too long, a folder that cannot be looked into
        return f"no such photo in the folder ({exc.strerror or exc})"
    if any(part.startswith(".") for part in Path(rel).parts):
        return "in a hidden folder, which a scan leaves out"
    return "no such photo in the folder"


class _nothing:
    def __enter__(self):
        return None

    def __exit__(self, *exc):
        return False
