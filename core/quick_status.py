"""Where a project stands, counted by SQLite (COUNT ... GROUP BY) without reading its photos.

`Project.status()` uses this until something has read the catalogue and the label state into memory
(a proposal, a decision, browsing neighbours, ...), so reopening a project and asking for its status
costs a few indexed aggregate queries, whatever the size of the collection: no photo rows become
Python objects and no vectors are read. Once the label state is in memory, status() counts from its
arrays instead (core/label_state.py); both give the same figures (tests/test_quick_status.py).

The photos counted are the project's catalogue: the photos whose content (fingerprint) has a vector
of the project's extractor, each catalogued path once (two paths of one content count twice, as the
label state counts rows).
"""
from __future__ import annotations

from dataclasses import dataclass

# The join orders are fixed (CROSS JOIN) so that SQLite walks the smaller side and looks the other
# tables up by their indexes: the photos' fingerprint index for the count, the labels for the rest.
_PHOTOS = ("SELECT COUNT(*) FROM photos p CROSS JOIN vector_rows e "
           "ON e.fingerprint = p.fingerprint AND e.extractor = ?")
_BY_LABEL = ("SELECT l.state, l.label, COUNT(*) FROM labels l CROSS JOIN photos p ON p.fingerprint = l.fingerprint "
             "CROSS JOIN vector_rows e ON e.fingerprint = p.fingerprint AND e.extractor = ? "
             "GROUP BY l.state, l.label")


@dataclass(frozen=True)
class Counts:
    photos: int
    labelled: int
    set_aside: int
    by_label: dict[str, int]     # sorted by label name; labels no catalogued photo carries left out


def counts(store, extractor: str | None) -> Counts:
    """The catalogue's photos, and how many of them are labelled (per label) or set aside."""
    if extractor is None:
        return Counts(0, 0, 0, {})
    photos = store._one(_PHOTOS, (extractor,))[0]
    rows = store._all(_BY_LABEL, (extractor,))
    by_label = {lab: c for state, lab, c in rows if state == "labelled"}
    aside = sum(c for state, _, c in rows if state == "set_aside")
    return Counts(photos, sum(by_label.values()), aside, dict(sorted(by_label.items())))

