"""core/label_state.py: the label arrays each decision updates in place must always equal the arrays
read afresh from the store's tables (the source of truth), whatever the sequence of decisions."""
import numpy as np
import pytest

from core.label_state import LabelState
from core.project import Project, ProjectError


def _same_as_tables(p: Project) -> None:
    live = p.label_state
    fresh = LabelState.load(p.store, [p.photo_info(q)["fingerprint"] for q in p.photos()])
    assert live.names == fresh.names
    np.testing.assert_array_equal(live.state, fresh.state)
    np.testing.assert_array_equal(live.label_of, fresh.label_of)
    np.testing.assert_array_equal(live.deferred, fresh.deferred)
    np.testing.assert_array_equal(live.not_label(), fresh.not_label())
    assert live.decisions == fresh.decisions == p.store.decision_count()
    assert live.counts() == fresh.counts()


def test_random_decisions_keep_state_equal_to_tables(photo_project_folder):
    rng = np.random.default_rng(3)
    with Project.open(photo_project_folder, annotator="tester") as p:
        photos = p.photos()
        for step in range(40):
            verb = rng.choice(["accept", "label", "set_aside", "clear", "later", "undo", "confirm", "split"])
            groups = p.propose(limit=3)
            try:
                if verb == "accept" and groups:
                    g = groups[0]
                    drop = [m for m in g.members[1:] if rng.random() < 0.3]
                    p.accept(g.id, str(rng.choice(["cat", "cup", "face", "coin"])), drop=drop)
                elif verb == "label":
                    p.label(list(rng.choice(photos, 3, replace=False)), str(rng.choice(["cat", "rocket"])))
                elif verb == "set_aside":
                    p.set_aside([str(rng.choice(photos))])
                elif verb == "clear":
                    p.clear(list(rng.choice(photos, 4, replace=False)))
                elif verb == "later" and groups:
                    p.defer(groups[0].id)
                elif verb == "undo":
                    p.undo()
                elif verb == "confirm":
                    p.confirm([str(rng.choice(photos))], "coin")
                elif verb == "split" and groups and groups[0].splittable:
                    p.split(groups[0].id)
            except ProjectError:
                pass
            _same_as_tables(p)
        assert p.status().labelled > 0


def test_refused_decision_changes_nothing(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        g = p.propose(limit=1)[0]
        p.accept(g.id, "first")
        before = p.label_arrays()
        with pytest.raises(ProjectError, match="no longer open"):
            p.accept(g.id, "second")               # rolled back: the hook is told nothing
        after = p.label_arrays()
        for a, b in zip(before, after):
            assert np.array_equal(a, b) if isinstance(a, np.ndarray) else a == b
        _same_as_tables(p)


def test_rolled_back_transaction_tells_nothing(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        q = p.photos()[0]
        with pytest.raises(RuntimeError):
            with p.store.transaction():
                p.label([q], "gone")
                raise RuntimeError("abort")
        assert p.photo_info(q)["state"] == "unlabelled"
        _same_as_tables(p)
