"""Browsing every photo of a project: by state, label, subfolder and file name, a page at a time.

One SQL query over the store (photos joined with their label and their embedding's presence), so a
page of a 100,000-photo project costs one indexed scan in SQLite and no Python loop over every photo.
Only photos the project knows (embedded with its extractor) are listed: the others cannot be
labelled yet. Order: by relative path, so a subfolder's photos come together.

Filters (all optional, combined with AND):
- `state`: "unlabelled", "aside" (set aside as no class) or "labelled";
- `label`: photos carrying exactly this label;
- `subfolder`: photos inside this folder of the photo folder, at any depth ("" or "." for the
  top level only); the name must match exactly, case included;
- `name`: text the file name contains (case-insensitive for ASCII letters, as SQLite's LIKE).
"""
from __future__ import annotations

from dataclasses import dataclass

STATES = ("unlabelled", "aside", "labelled")
_STORE_STATE = {"labelled": "labelled", "set_aside": "aside"}

# dirname(path) + "/" (empty at the top level): strip every trailing character that is not a "/".
_DIR = "rtrim(p.path, replace(p.path, '/', ''))"
_NAME = f"substr(p.path, length({_DIR}) + 1)"


@dataclass(frozen=True)
class BrowsedPhoto:
    path: str             # relative POSIX path
    state: str            # "unlabelled", "aside" or "labelled"
    label: str | None

    @property
    def subfolder(self) -> str:
        """The folder holding the photo, relative to the photo folder ("" at the top level)."""
        return self.path.rpartition("/")[0]


@dataclass(frozen=True)
class Browsed:
    total: int                   # photos matching the filters, all pages together
    photos: list[BrowsedPhoto]   # this page
    offset: int = 0


class BrowseError(ValueError):
    """A filter Kinfold cannot apply; the message says why in one line."""


def _like_escape(text: str) -> str:
    return text.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")


def _where(extractor: str, state, label, subfolder, name) -> tuple[str, list]:
    clauses, params = ["e.extractor = ?"], [extractor]
    if state is not None:
        if state not in STATES:
            raise BrowseError(f"state {state!r} is not one of {', '.join(STATES)}")
        clauses.append({"unlabelled": "l.state IS NULL", "aside": "l.state = 'set_aside'",
                        "labelled": "l.state = 'labelled'"}[state])
    if label is not None:
        clauses.append("l.state = 'labelled' AND l.label = ?")
        params.append(label)
    if subfolder is not None:
        sub = subfolder.strip().strip("/")
        if sub in ("", "."):
            clauses.append("instr(p.path, '/') = 0")
        else:
            clauses.append("substr(p.path, 1, ?) = ?")     # exact, case and all (LIKE ignores case)
            params += [len(sub) + 1, sub + "/"]
    if name:
        clauses.append(f"{_NAME} LIKE ? ESCAPE '\\'")
        params.append("%" + _like_escape(name) + "%")
    return " AND ".join(clauses), params


_FROM = ("FROM photos p JOIN vector_rows e ON e.fingerprint = p.fingerprint "
         "LEFT JOIN labels l ON l.fingerprint = p.fingerprint")


def browse(store, extractor: str | None, *, state: str | None = None, label: str | None = None,
           subfolder: str | None = None, name: str | None = None, offset: int = 0,
           limit: int | None = None) -> Browsed:
    """The photos matching the filters, ordered by path: `limit` of them from `offset` (all when
    `limit` is None), with the number matching in all."""
    if offset < 0 or (limit is not None and limit < 0):
        raise BrowseError("offset and limit cannot be negative")
    if extractor is None:
        return Browsed(0, [], offset)
    where, params = _where(extractor, state, label, subfolder, name)
    total = store._one(f"SELECT COUNT(*) {_FROM} WHERE {where}", params)[0]
    rows = store._all(f"SELECT p.path, l.state, l.label {_FROM} WHERE {where} ORDER BY p.path "
                      f"LIMIT ? OFFSET ?", params + [-1 if limit is None else limit, offset])
    return Browsed(total, [BrowsedPhoto(p, _STORE_STATE.get(s, "unlabelled"), lab) for p, s, lab in rows], offset)


def subfolders(store, extractor: str | None) -> list[tuple[str, int]]:
    """Every folder holding photos directly, with how many ("" is the top level), by name."""
    if extractor is None:
        return []
    rows = store._all(f"SELECT {_DIR} AS d, COUNT(*) {_FROM} WHERE e.extractor = ? GROUP BY d ORDER BY d",
                      [extractor])
    return [(d.rstrip("/"), n) for d, n in rows]


def states_of(store, fingerprints: list[str]) -> dict[str, tuple[str, str | None]]:
    """{fingerprint: (state, label)} for a few photos (a neighbour strip), unlabelled ones included."""
    out = {fp: ("unlabelled", None) for fp in fingerprints}
    for i in range(0, len(fingerprints), 500):
        chunk = fingerprints[i:i + 500]
        marks = ",".join("?" * len(chunk))
        for fp, s, lab in store._all(f"SELECT fingerprint, state, label FROM labels WHERE fingerprint IN ({marks})",
                                     chunk):
            out[fp] = (_STORE_STATE.get(s, "unlabelled"), lab)
    return out
