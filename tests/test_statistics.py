"""Statistics (core/statistics.py, Project.statistics): figures checked against a decision log built
here through Project verbs at set clock times, worked out by hand below each step."""

import csv
import io

import pytest

import core.store
from core import statistics
from core.project import Project


@pytest.fixture
def clock(monkeypatch):
    """Decisions are logged at the times pushed onto this list (UTC, one per decision)."""
    times: list[str] = []
    monkeypatch.setattr(core.store, "utc_now", lambda: times.pop(0) if times else "2026-12-05T12:00:00Z")
    return times


def _group(groups, label):
    return next(g for g in groups if g.suggested_label == label)


def test_statistics_from_a_log_built_through_verbs(photo_project_folder, clock, tmp_path):
    with Project.open(photo_project_folder, annotator="ana") as p:
        photos = p.photos()
        of = {name: [x for x in photos if f"/{name}_" in x] for name in ("astronaut", "coins", "chelsea", "camera")}
        clock += ["2026-12-05T10:00:00Z", "2026-12-05T10:00:30Z", "2026-12-05T10:01:00Z"]
        for name in ("astronaut", "coins", "chelsea"):
            p.label(of[name][:2], name)                           # 3 x 2 labels, label kind
        groups = p.propose(limit=10)
        coins, chelsea, astro = _group(groups, "coins"), _group(groups, "chelsea"), _group(groups, "astronaut")
        clock += ["2026-12-05T10:01:20Z", "2026-12-05T10:02:00Z", "2026-12-05T10:30:00Z", "2026-12-05T10:30:10Z"]
        p.accept(coins.id, "coins")                               # as suggested
        p.accept(chelsea.id, "chelsea", drop=chelsea.members[-1:])  # one taken out: not as suggested
        p.accept(astro.id, "astro")                               # another label ...
        assert p.undo()["kind"] == "accept"                       # ... undone: counts no labels
        camera = next(g for g in p.propose(limit=10) if g.suggested_label is None and
                      all("camera" in m for m in g.members))
    with Project.open(photo_project_folder, annotator="bob") as p:
        clock += ["2026-12-05T11:00:00Z", "2026-12-05T11:00:40Z"]
        p.accept(camera.id, "camera")                             # no suggestion
        p.set_aside(of["astronaut"][2:3])
        st = p.statistics()
        p.export_csv(tmp_path / "labels.csv")

    # Photos per label against the CSV export read back with Python's csv module (RFC 4180).
    with open(tmp_path / "labels.csv", newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    from collections import Counter
    assert st.by_label == dict(Counter(r["label"] for r in rows))
    assert st.by_label == {"coins": 2 + len(coins.members), "camera": len(camera.members),
                           "chelsea": 2 + len(chelsea.members) - 1, "astronaut": 2}
    assert list(st.by_label.values()) == sorted(st.by_label.values(), reverse=True)

    ana, bob = st.annotators
    assert (ana.annotator, bob.annotator) == ("ana", "bob")
    assert ana.actions == 6 and bob.actions == 2                 # undo is not an action
    ana_labels = 6 + len(coins.members) + len(chelsea.members) - 1
    assert ana.labels_given == ana_labels
    # Gaps 30, 30, 20, 40 s, then 28 min capped at 300 s; plus 300 s opening the sitting.
    assert ana.active_seconds == 300 + 30 + 30 + 20 + 40 + 300
    assert ana.labels_per_hour == pytest.approx(ana_labels * 3600 / 720)
    assert (ana.suggested, ana.as_suggested, ana.as_suggested_share) == (2, 1, 0.5)
    assert bob.labels_given == len(camera.members) and bob.active_seconds == 340
    assert (bob.suggested, bob.as_suggested_share) == (0, None)
    assert st.per_hour == {"2026-12-05T10": ana_labels, "2026-12-05T11": len(camera.members)}
    assert st.total.labels_given == ana_labels + len(camera.members) and st.total.actions == 8

    # The CSV form, read back with the csv module.
    table = list(csv.reader(io.StringIO(st.csv_text(), newline="")))
    assert tuple(table[0]) == statistics.CSV_HEADER
    cells = {(r[0], r[1], r[2]): r[3] for r in table[1:]}
    assert cells[("photos", "", "coins")] == str(st.by_label["coins"])
    assert cells[("labels given", "ana", "")] == str(ana_labels)
    assert cells[("accepted as suggested", "", "")] == "1"
    assert cells[("labels in hour", "", "2026-12-05T11")] == str(len(camera.members))
    assert st.csv_text().count("\r\n") == len(table)


def test_statistics_of_a_fresh_project(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        st = p.statistics()
    assert st.by_label == {} and st.annotators == [] and st.per_hour == {}
    assert st.total.labels_per_hour is None and st.total.as_suggested_share is None
    assert st.as_dict()["total"]["labels_given"] == 0


def test_formula_like_names_are_neutralised_in_the_csv():
    st = statistics.compute({"=1+1": 3}, 3, [], {}, {})
    assert "'=1+1" in st.csv_text()


def test_an_unreadable_log_time_counts_no_time_but_its_labels():
    log = [dict(id=1, kind="label", label="a", annotator="x", time="yesterday", group_id=None, photos=["p"],
                undoes=None),
           dict(id=2, kind="label", label="a", annotator="x", time="2026-12-05T10:00:00Z", group_id=None,
                photos=["q", "r"], undoes=None)]
    st = statistics.compute({"a": 3}, 3, log, {}, {})
    (x,) = st.annotators
    assert (x.actions, x.labels_given, x.active_seconds) == (2, 3, statistics.IDLE_CAP)
    assert st.per_hour == {"2026-12-05T10": 2}
