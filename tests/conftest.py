import os
import shutil
from pathlib import Path

import numpy as np
import pytest

# Qt, where a test needs it, runs without a screen.
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

ROOT = Path(__file__).resolve().parent.parent


def _photo_folder(folder: Path) -> Path:
    """A small real-photo folder: scikit-image's bundled sample photos, a few variants each."""
    from PIL import Image, ImageEnhance
    from skimage import data

    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(0)
    for name in ("chelsea", "coffee", "astronaut", "rocket", "camera", "coins"):
        img = Image.fromarray(getattr(data, name)()).convert("RGB")
        sub = folder / ("a" if name < "co" else "b")
        sub.mkdir(exist_ok=True)
        for k in range(5):
            w, h = img.size
            box = (int(rng.integers(0, w // 8)), int(rng.integers(0, h // 8)), w - int(rng.integers(0, w // 8)),
                   h - int(rng.integers(0, h // 8)))
            v = ImageEnhance.Brightness(img.crop(box)).enhance(0.8 + 0.1 * k)
            v.save(sub / f"{name}_{k}.jpg", quality=90)
    (folder / "notes.txt").write_text("not a photo")
    data_bytes = (folder / "b" / "coffee_0.jpg").read_bytes()
    (folder / "b" / "broken.jpg").write_bytes(data_bytes[: len(data_bytes) // 3])
    return folder


@pytest.fixture(scope="session")
def scanned_template(tmp_path_factory):
    """A scanned photo folder (with its store), made once per test session."""
    from core.project import Project

    folder = _photo_folder(tmp_path_factory.mktemp("template") / "photos")
    with Project.open(folder, annotator="tester") as p:
        p.scan()
    return folder


@pytest.fixture
def photo_project_folder(scanned_template, tmp_path):
    """A private copy of the scanned folder, store included, so each test starts fresh."""
    dest = tmp_path / "photos"
    shutil.copytree(scanned_template, dest, symlinks=True)
    return dest


@pytest.fixture(scope="session")
def scanned_demo(tmp_path_factory):
    """A scanned copy of the demo folder (sample_images/), made once per test session."""
    from core.project import Project

    dest = tmp_path_factory.mktemp("demo") / "sample_images"
    # A store left in the checkout by a local run is not copied: the scan here starts fresh.
    shutil.copytree(ROOT / "sample_images", dest, ignore=shutil.ignore_patterns(".kinfold"))
    with Project.open(dest, annotator="tester") as p:
        p.scan()
    return dest


@pytest.fixture
def demo_folder(scanned_demo, tmp_path):
    """A private copy of the scanned demo folder, store included: a test that decides, proposes (open
    groups keep their numbers in the store) or rescans must not change what later tests start from."""
    dest = tmp_path / "sample_images"
    shutil.copytree(scanned_demo, dest, symlinks=True)
    return dest


@pytest.fixture(scope="session")
def fashion_2000_named():
    """Fashion-MNIST test, first 2,000 (Debian dataset-fashion-mnist): cached features and class names.
    The package is a test requirement: missing data is a failure, not a skip."""
    from benchmarks import fashion

    try:
        feats, labels = fashion.fashion_features(2000)
    except FileNotFoundError as exc:
        pytest.fail(str(exc))
    return feats, [fashion.CLASS_NAMES[int(c)] for c in labels]
