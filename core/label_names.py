"""Near-duplicate label names, and which suggested labels are worth showing.

A label typed for a group may be an existing one in another spelling ("Washer" for "washer",
"hex-nut" for "hex nut") or the first letters of one ("res" for "resistor", when Return came before
the completion). `near_duplicates` finds those so the window can ask once before a second class is
created; it never changes a label by itself.
"""
from __future__ import annotations

import unicodedata
from typing import Iterable

# A suggested label whose confidence is below this is not shown (nor typed into the label field):
# at 0.5 the engine gives the label no better than even odds, and a wrong preset label costs the
# annotator more (noticing and retyping it) than an empty field does.
SHOW_FLOOR = 0.5


def name_key(label: str) -> str:
    """The label reduced to its letters and digits, case-folded: what two spellings of one name share."""
    text = unicodedata.normalize("NFKC", label).casefold()
    return "".join(ch for ch in text if unicodedata.category(ch)[0] in "LN")


def near_duplicates(new: str, existing: Iterable[str]) -> list[str]:
    """Existing labels that `new` probably means: the same name up to case, spacing and punctuation,
    or a longer name starting with it. Exact matches mean no question (empty list); the same-name
    matches come first, then the longer names in alphabetical order."""
    names = list(existing)
    if new in names:
        return []
    key = name_key(new)
    if not key:
        return []
    same = sorted(n for n in names if name_key(n) == key)
    longer = sorted(n for n in names if n not in same and name_key(n).startswith(key))
    return same + longer


def shown_suggestion(kind: str, label: str | None, confidence: float | None) -> str | None:
    """The suggested label to show for a group, or None: never for a new-area group (no label reaches
    it), and not when the engine's confidence is below SHOW_FLOOR."""
    if label is None or kind == "new area":
        return None
    if confidence is not None and confidence < SHOW_FLOOR:
        return None
    return label


def number_keys(counts: dict[str, int], keys: int = 9) -> dict[str, int]:
    """The labels the number keys 1..`keys` stand for: the most used first (most photos; a tie goes
    to the name first in alphabetical order). {label: key}. Recomputed as counts change, so a key
    can move to another label once that label has more photos."""
    ranked = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
    return {name: i + 1 for i, (name, n) in enumerate(ranked[:keys]) if n > 0}
