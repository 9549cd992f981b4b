"""A project opened with the default extractor keeps the EfficientNet-Lite0 pooling its store was
scanned with, so a change of the default never re-embeds a scanned folder; no network is loaded."""
from __future__ import annotations


import pytest

from core.project import _LITE_BY_ID, DEFAULT_EXTRACTOR, Project


@pytest.mark.parametrize("stored, name", [
    (None, DEFAULT_EXTRACTOR),
    ("efficientnet-lite0:imagenet:fp32", "efficientnet-lite0-avg"),
    ("efficientnet-lite0:imagenet:bf16", "efficientnet-lite0-avg"),
    ("efficientnet-lite0-gem:imagenet:fp32", "efficientnet-lite0-gem"),
    ("efficientnet-lite2-gem:imagenet:bf16", "efficientnet-lite2-gem"),
    ("torchvision-resnet18:IMAGENET1K_V1:fp32", DEFAULT_EXTRACTOR),
])
def test_default_extractor_keeps_the_stored_pooling(tmp_path, stored, name):
    (tmp_path / "photos").mkdir()
    with Project.open(tmp_path / "photos") as p:
        if stored:
            p.store.set_setting("extractor_id", stored)
    with Project.open(tmp_path / "photos") as p:
        assert p.extractor_name == name
    with Project.open(tmp_path / "photos", extractor="resnet18") as p:
        assert p.extractor_name == "resnet18"          # an explicit choice is never overridden


def test_the_table_matches_the_extractor_ids():
    from core.embedding import EFFICIENTNET_LITE0, EFFICIENTNET_LITE2, efficientnet_lite_id
    from core.project import NETWORKS

    for name, pooling in EFFICIENTNET_LITE0.items():
        assert _LITE_BY_ID[efficientnet_lite_id(pooling, "fp32").partition(":")[0]] == name
    for name, pooling in EFFICIENTNET_LITE2.items():
        assert _LITE_BY_ID[efficientnet_lite_id(pooling, "fp32", "lite2").partition(":")[0]] == name
    assert set(NETWORKS.values()) <= set(EFFICIENTNET_LITE0) | set(EFFICIENTNET_LITE2)
