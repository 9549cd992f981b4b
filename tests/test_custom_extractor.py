"""A custom backbone plugged in through `Project.open(folder, extractor=obj)` (the Extractor protocol of
core/embedding.py): it scans and proposes with no network at all. The photos are scikit-image's sample
photos, five crops each (tests/conftest.py); the check is that a photo's nearest neighbour under the
custom vectors is a crop of the same sample photo, as the file names say."""
import numpy as np
import pytest
import torch

from core.embedding import Extractor
from core.project import Project, ProjectError
from tests.conftest import _photo_folder


class ColourLayout:
    """A tiny extractor: the photo shrunk to 8 x 8 pixels — 192 numbers."""
    id = "test-colour-layout:8x8"
    dim = 192
    decode_side = 64

    def __init__(self):
        self.batches = 0

    def preprocess(self, img):
        small = np.asarray(img.convert("RGB").resize((8, 8)), np.float32) / 255.0
        return torch.from_numpy(small).reshape(-1)

    def embed(self, batch):
        self.batches += 1
        return batch.numpy().astype(np.float32)


def test_custom_extractor_scans_and_proposes(tmp_path):
    folder = _photo_folder(tmp_path / "photos")
    ext = ColourLayout()
    assert isinstance(ext, Extractor)
    with Project.open(folder, extractor=ext, annotator="tester") as p:
        report = p.scan()
        assert report.photos == 30 and report.embedded == 30 and ext.batches >= 1
        assert p.extractor_id == ext.id
        assert p.backbone_features().shape == (30, ext.dim)
        groups = p.propose(limit=5)
        assert groups
        # Crops of one sample photo share their layout: each photo's nearest is mostly a crop of the same.
        def source(m):
            return m.rsplit("/", 1)[-1].split("_")[0]
        same = [source(p.neighbours(m, k=1)[0][0]) == source(m) for m in p.photos()]
        assert sum(same) >= 0.8 * len(same)
        assert all(len(g.members) >= 1 for g in groups)
        p.accept(groups[0].id, "first")
        assert p.status().labelled == len(groups[0].members)
    # Reopened by name, the store keeps the custom extractor's vectors: no re-embedding needed to read.
    with Project.open(folder, annotator="tester", extractor=ColourLayout()) as p:
        assert p.scan().embedded == 0


class NoEmbed:
    id, dim, decode_side = "broken", 3, 0

    def preprocess(self, img):
        return torch.zeros(3)


def test_incomplete_extractor_refused_in_one_line(tmp_path):
    with pytest.raises(ProjectError, match="lacks embed"):
        Project.open(tmp_path, extractor=NoEmbed())
