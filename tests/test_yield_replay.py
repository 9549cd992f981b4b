"""The yield replay (benchmarks/yield_replay.py) must keep running on the product's own Project: its
`Variant` wraps Project's verbs, and a change of what the simulator passes broke it once unnoticed.

Data: Fashion-MNIST test, first 400 of the cached 2,000 (Debian dataset-fashion-mnist), true classes
as the simulated annotator's knowledge; reference: scikit-learn's KMeans baseline of the same module."""
from benchmarks.cached_project import build_project
from benchmarks.yield_replay import VARIANTS, Variant
from benchmarks.yield_sim import kmeans_baseline, simulate


def test_replay_runs_every_photo_to_a_label_through_project(fashion_2000_named, tmp_path):
    feats, classes = fashion_2000_named
    feats, classes = feats[:400], classes[:400]
    project, truth = build_project(tmp_path / "replay", feats, classes, annotator="simulated")
    with project:
        spec = VARIANTS["relearn"]
        run = simulate(Variant(project, spec.get("settings"), spec.get("propose")), truth, sitting=50,
                       relearn=True, name="kinfold, relearn")
        assert project.status().labelled == 400           # every photo labelled through the verbs
    base = kmeans_baseline(feats, classes)
    # Rule of thumb, not a measured bound: grouping by neighbourhoods beats one photo at a time
    # comfortably and is not far below k-means groups in random order even on 400 photos.
    assert run.yield_at(0.8) > 1.5
    assert run.yield_at(0.8) > 0.7 * base.yield_at(0.8)
