"""The engine on the demo folder, scored against the generator's own truth (resources/demo_truth.csv).
The demo data is invented (ours); these checks guard the demo and the end-to-end path, while the
open-data checks live in test_trust_rule.py, test_neighbours.py and test_export.py."""
import json

import numpy as np
from pycocotools.coco import COCO

from app.demo import load_demo_truth
from core.project import Project

from .conftest import ROOT

TRUTH = load_demo_truth(ROOT / "resources" / "demo_truth.csv")


def test_scan_skips_exactly_the_broken_and_non_image_files(demo_folder):
    with Project.open(demo_folder) as p:
        rep = p.scan()
    skipped = {path for path, _ in rep.skipped}
    assert skipped == {p for p, c in TRUTH.items() if c in ("broken", "non_image")}
    assert rep.photos == sum(c not in ("broken", "non_image") for c in TRUTH.values())


def test_bursts_are_found_and_single_class(demo_folder):
    with Project.open(demo_folder) as p:
        g = p.graph()
        photos = p.photos()
    ids = [b for b in np.unique(g.burst) if b >= 0]
    assert len(ids) >= 3                       # the generator renders four bursts
    for b in ids:
        assert len({TRUTH[photos[i]] for i in np.nonzero(g.burst == b)[0]}) == 1


def test_bursts_travel_together(demo_folder):
    with Project.open(demo_folder) as p:
        g = p.graph()
        photos = p.photos()
        groups = p.propose(limit=200)
    where = {m: gr.id for gr in groups for m in gr.members}
    for b in [b for b in np.unique(g.burst) if b >= 0]:
        members = [photos[i] for i in np.nonzero(g.burst == b)[0]]
        assert len({where.get(m) for m in members}) == 1


def test_label_a_few_groups_and_export_loads_in_pycocotools(demo_folder, tmp_path):
    with Project.open(demo_folder) as p:
        for _ in range(5):
            gr = p.propose(limit=1)[0]
            classes = [TRUTH[m] for m in gr.members]
            top = max(set(classes), key=classes.count)
            p.accept(gr.id, top, drop=[m for m, c in zip(gr.members, classes) if c != top])
        st = p.status()
        p.export_coco(tmp_path / "demo.json")
        p.export_csv(tmp_path / "demo.csv")
    # Outside reference: pycocotools reads the file and its counts match the store.
    coco = COCO(str(tmp_path / "demo.json"))
    assert len(coco.getImgIds()) == st.labelled == len(coco.getAnnIds())
    assert sorted(c["name"] for c in coco.loadCats(coco.getCatIds())) == sorted(st.by_label)
    # Every exported label is the true class: the simulated annotator only confirmed true ones.
    for ann in coco.loadAnns(coco.getAnnIds()):
        img = coco.loadImgs(ann["image_id"])[0]
        assert TRUTH[img["file_name"]] == coco.loadCats(ann["category_id"])[0]["name"]
