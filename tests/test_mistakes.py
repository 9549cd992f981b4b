"""The likely-mistakes queue (core/mistakes.py, Project.likely_mistakes / confirm, `kinfold mistakes`)."""
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from core import mistakes, neighbours
from core.project import Project, ProjectError

ROOT = Path(__file__).resolve().parent.parent


def _digits_with_planted_errors(rate=0.05, seed=0):
    """scikit-learn's bundled digits (1,797 8x8 scans, its own classes as truth), raw pixels as features,
    with `rate` of the labels flipped to a random other digit."""
    from sklearn.datasets import load_digits

    x, truth = load_digits(return_X_y=True)
    rng = np.random.default_rng(seed)
    wrong = rng.choice(len(truth), size=int(round(rate * len(truth))), replace=False)
    given = truth.copy()
    given[wrong] = (truth[wrong] + rng.integers(1, 10, size=len(wrong))) % 10
    return x.astype(np.float32), truth, given, set(int(i) for i in wrong)


@pytest.mark.parametrize("method", mistakes.METHODS)
def test_planted_errors_on_digits_come_first(method):
    # Source: sklearn.datasets.load_digits (UCI optical digits); 90 of 1,797 labels flipped (5 %).
    # Random order puts 5 of them among the first 100; each scorer must catch far more (measured:
    # classifier 0.87, neighbours 0.89, combined 0.88 with seed 0, so 0.5 leaves a wide margin).
    x, truth, given, wrong = _digits_with_planted_errors()
    sims, idx = neighbours.knn(neighbours.prepare(x), 20)
    ranked = mistakes.rank(x, given, idx, method=method)
    order = [s.index for s in ranked]
    assert sorted(order) == list(range(len(x)))        # every labelled photo, once
    assert mistakes.precision_at(order, wrong, 100) >= 0.5
    # The suggestion for a caught error is mostly the digit it really is.
    caught = [s for s in ranked[:100] if s.index in wrong]
    right = sum(s.suggested == truth[s.index] for s in caught)
    assert right >= 0.7 * len(caught)
    assert all(s.suggested != s.label for s in ranked[:100])


def test_probabilities_are_out_of_sample():
    # A photo that is the only one of its label cannot be predicted from folds without it: p = 0.
    x = np.random.default_rng(1).normal(size=(60, 5))
    y = np.array([0] * 30 + [1] * 29 + [2])
    prob = mistakes.out_of_sample_probabilities(x, y, 3)
    assert prob[-1, 2] == 0.0
    assert np.allclose(prob.sum(1), 1.0)


def test_one_label_has_no_mistakes():
    x = np.eye(4, dtype=np.float32)
    assert mistakes.rank(x, np.array([0, 0, 0, -1]), np.array([[1], [2], [0], [0]])) == []
    with pytest.raises(ValueError):
        mistakes.rank(x, np.array([0, 1, 0, 1]), np.zeros((4, 1), int), method="nonsense")


def _label_by_photo(p: Project) -> dict[str, str]:
    """The conftest photo folder: five variants of each of six scikit-image sample photos; the photo's
    name is its class."""
    return {q: Path(q).name.rsplit("_", 1)[0] for q in p.photos()}


def test_project_queue_confirm_and_undo(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        truth = _label_by_photo(p)
        for c in sorted(set(truth.values())):
            p.label([q for q, t in truth.items() if t == c], c)
        planted = "b/coffee_2.jpg"
        p.label([planted], "chelsea")
        queue = p.likely_mistakes(limit=5)
        assert queue[0].path == planted
        assert (queue[0].label, queue[0].suggested) == ("chelsea", "coffee")
        assert 0 < queue[0].score <= 1
        assert [m.score for m in queue] == sorted((m.score for m in queue), reverse=True)

        # Confirming: the photo leaves the queue, keeps its label; one logged decision; undo brings it back.
        actions = p.status().actions
        p.confirm([planted])
        assert planted not in [m.path for m in p.likely_mistakes(limit=100)]
        assert p.photo_info(planted)["label"] == "chelsea"
        assert p.status().actions == actions + 1
        assert p.store.decisions()[-1]["kind"] == "confirm"
        assert p.undo()["kind"] == "confirm"
        assert p.likely_mistakes(limit=1)[0].path == planted

        # Fixing with a label: relabelled and out of the queue at once; undo gives the old label back.
        p.confirm([planted], "coffee")
        assert p.photo_info(planted)["label"] == "coffee"
        assert planted not in [m.path for m in p.likely_mistakes(limit=100)]
        p.undo()
        assert p.photo_info(planted)["label"] == "chelsea"

        with pytest.raises(ProjectError):
            p.confirm(["no/such.jpg"])
        assert p.likely_mistakes(limit=0) == []


def test_confirm_refuses_an_unlabelled_photo(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        first = p.photos()[0]
        with pytest.raises(ProjectError, match="no label"):
            p.confirm([first])
        assert p.status().actions == 0


def _cli(*args, cwd=ROOT):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "app.cli", *args], capture_output=True, text=True, env=env,
                          cwd=cwd, timeout=300)


def test_cli_mistakes(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        truth = _label_by_photo(p)
        for c in sorted(set(truth.values())):
            p.label([q for q, t in truth.items() if t == c], c)
        p.label(["a/astronaut_1.jpg"], "rocket")
    r = _cli("mistakes", str(photo_project_folder), "--limit", "3", "--json")
    assert r.returncode == 0, r.stderr
    rows = json.loads(r.stdout)
    assert len(rows) == 3
    assert rows[0]["path"] == "a/astronaut_1.jpg"
    assert rows[0]["label"] == "rocket" and rows[0]["suggested"] == "astronaut"
    r = _cli("mistakes", str(photo_project_folder), "--limit", "2")
    assert r.returncode == 0, r.stderr
    assert "a/astronaut_1.jpg" in r.stdout.splitlines()[1] and "astronaut" in r.stdout
    r = _cli("mistakes", str(photo_project_folder), "--limit", "-1")
    assert r.returncode == 2 and "limit" in r.stderr and "Traceback" not in r.stderr
    # `kinfold confirm` takes the photo off the list; --label fixes it at the same time.
    r = _cli("confirm", str(photo_project_folder), "a/astronaut_1.jpg", "--json")
    assert r.returncode == 0, r.stderr
    r = _cli("mistakes", str(photo_project_folder), "--json")
    assert "a/astronaut_1.jpg" not in [m["path"] for m in json.loads(r.stdout)]
    r = _cli("confirm", str(photo_project_folder), "no/such.jpg")
    assert r.returncode == 1 and "not a photo of this project" in r.stderr and "Traceback" not in r.stderr
