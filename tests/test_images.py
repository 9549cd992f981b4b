"""core.images: every kind of file is built here with Pillow / numpy; expected pixels come
from numpy arithmetic or the format's own definition, named beside each check."""
from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

from core.images import IMAGE_SUFFIXES, PhotoError, load_rgb, probe, to_rgb

EXIF_ORIENTATION = 0x0112  # EXIF 2.3 tag number for Orientation


def _rgb(img: Image.Image) -> np.ndarray:
    assert img.mode == "RGB"
    return np.asarray(img).astype(int)


def test_suffixes_are_lower_case_with_dot():
    assert ".jpg" in IMAGE_SUFFIXES and ".tiff" in IMAGE_SUFFIXES
    assert all(s.startswith(".") and s == s.lower() for s in IMAGE_SUFFIXES)


def test_exif_rotated_jpeg_swaps_sides_and_rotates_pixels(tmp_path):
    stored = np.zeros((40, 60, 3), np.uint8)
    stored[:, :] = (0, 0, 255)
    stored[:10, :15] = (255, 0, 0)  # red block in the stored top-left corner
    exif = Image.Exif()
    exif[EXIF_ORIENTATION] = 6  # EXIF: "rotate 90 degrees clockwise to display"
    path = tmp_path / "rotated.jpg"
    Image.fromarray(stored).save(path, quality=95, exif=exif)

    assert probe(path) == (40, 60)  # width and height swapped
    shown = _rgb(load_rgb(path))
    assert shown.shape == (60, 40, 3)
    # numpy's rot90 with k=-1 is a clockwise turn: the reference for orientation 6.
    expected = np.rot90(stored, k=-1).astype(int)
    assert np.abs(shown - expected).mean() < 6  # JPEG loss only
    assert shown[2, -2, 0] > 200 and shown[2, -2, 2] < 60  # red block now top-right


def test_sixteen_bit_png_is_scaled_not_clipped(tmp_path):
    ramp = np.linspace(0, 65535, 64 * 32).astype(np.uint16).reshape(32, 64)
    path = tmp_path / "deep.png"
    Image.fromarray(ramp).save(path)
    assert Image.open(path).mode.startswith("I")  # Pillow decodes it as 16-bit
    got = _rgb(load_rgb(path))
    # 16-bit full scale to 8-bit full scale: v * 255 / 65535 (= v / 257).
    expected = np.rint(ramp / 257.0).astype(int)
    assert np.abs(got[..., 0] - expected).max() <= 1
    assert (got[..., 0] == got[..., 1]).all() and (got[..., 1] == got[..., 2]).all()
    assert got.min() == 0 and got.max() == 255 and len(np.unique(got)) > 200  # not clipped


def test_cmyk_jpeg_becomes_rgb(tmp_path):
    path = tmp_path / "print.jpg"
    # Pure cyan-free, magenta+yellow ink = red (subtractive mixing, CMYK definition).
    Image.new("CMYK", (32, 32), (0, 255, 255, 0)).save(path, quality=95)
    got = _rgb(load_rgb(path))
    assert np.abs(got - np.array([255, 0, 0])).max() < 12


def test_palette_png_transparency_on_white(tmp_path):
    idx = np.zeros((16, 16), np.uint8)
    idx[:, 8:] = 1
    img = Image.fromarray(idx, "P")
    img.putpalette([0, 0, 0, 0, 128, 0] + [0] * (3 * 254))
    path = tmp_path / "pal.png"
    img.save(path, transparency=0)  # index 0 (black) fully transparent
    got = _rgb(load_rgb(path))
    assert (got[:, :8] == 255).all()  # transparent -> white background
    assert (got[:, 8:] == [0, 128, 0]).all()  # opaque palette colour kept


def test_grey_with_alpha_on_white(tmp_path):
    grey = np.full((10, 10), 50, np.uint8)
    alpha = np.zeros((10, 10), np.uint8)
    alpha[:, 5:] = 255
    path = tmp_path / "la.png"
    Image.fromarray(np.dstack([grey, alpha]), "LA").save(path)
    got = _rgb(load_rgb(path))
    assert (got[:, :5] == 255).all() and (got[:, 5:] == 50).all()


def test_half_transparent_rgba_blends_with_white():
    rgba = Image.new("RGBA", (4, 4), (0, 0, 0, 128))
    # Alpha blending: out = a*src + (1-a)*white = 255 * (1 - 128/255) = 127.
    assert np.abs(_rgb(to_rgb(rgba)) - 127).max() <= 1


def test_gif_first_frame(tmp_path):
    frames = [Image.new("RGB", (20, 20), c) for c in ((255, 0, 0), (0, 255, 0), (0, 0, 255))]
    path = tmp_path / "anim.gif"
    frames[0].save(path, save_all=True, append_images=frames[1:], duration=100, loop=0)
    assert Image.open(path).n_frames == 3
    got = _rgb(load_rgb(path))
    assert (np.abs(got - [255, 0, 0]) <= 2).all()


def test_multipage_tiff_first_page(tmp_path):
    pages = [Image.new("RGB", (8, 8), (10, 20, 30)), Image.new("RGB", (8, 8), (200, 0, 0))]
    path = tmp_path / "pages.tiff"
    pages[0].save(path, save_all=True, append_images=pages[1:])
    assert (_rgb(load_rgb(path)) == [10, 20, 30]).all()


def test_float_tiff_in_unit_range(tmp_path):
    values = np.linspace(0.0, 1.0, 100, dtype=np.float32).reshape(10, 10)
    path = tmp_path / "float.tif"
    Image.fromarray(values, "F").save(path)
    got = _rgb(load_rgb(path))
    assert np.abs(got[..., 0] - np.rint(values * 255)).max() <= 1


def test_grey_jpeg_becomes_three_equal_channels(tmp_path):
    path = tmp_path / "grey.jpg"
    Image.new("L", (16, 16), 90).save(path)
    got = _rgb(load_rgb(path))
    assert (np.abs(got - 90) <= 2).all()


def test_draft_mode_keeps_short_side_at_least_min_side(tmp_path):
    rng = np.random.default_rng(0)
    big = rng.integers(0, 255, (3000, 4000, 3), dtype=np.uint8)
    path = tmp_path / "big.jpg"
    Image.fromarray(big).save(path, quality=80)
    small = load_rgb(path, min_side=224)
    # libjpeg scales by 1/8 at most: 4000x3000 -> 500x375, still >= 224 on the short side.
    assert small.size == (500, 375)
    assert load_rgb(path, min_side=400).size == (1000, 750)  # 1/4: 1/8 would give 375 < 400
    assert probe(path) == (4000, 3000)


def test_truncated_jpeg_is_a_photo_error(tmp_path):
    rng = np.random.default_rng(1)
    path = tmp_path / "cut.jpg"
    Image.fromarray(rng.integers(0, 255, (200, 300, 3), dtype=np.uint8)).save(path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(PhotoError, match="truncated"):
        load_rgb(path)


def test_text_file_named_jpg_is_a_photo_error(tmp_path):
    path = tmp_path / "notes.jpg"
    path.write_text("shopping list: bolts, washers\n")
    with pytest.raises(PhotoError, match="not a readable image"):
        probe(path)
    with pytest.raises(PhotoError, match="not a readable image"):
        load_rgb(path)


def test_missing_file_and_folder_are_photo_errors(tmp_path):
    with pytest.raises(PhotoError, match="not found") as gone:
        load_rgb(tmp_path / "gone.png")
    assert gone.value.retry                     # it may be back (a disk not mounted yet)
    with pytest.raises(PhotoError, match="a folder, not a regular file") as folder:
        probe(tmp_path)
    assert not folder.value.retry


def test_damaged_files_are_final_and_reasons_name_no_path(tmp_path):
    path = tmp_path / "notes.jpg"
    path.write_text("shopping list")
    cut = tmp_path / "cut.png"
    Image.new("RGB", (300, 200), (9, 9, 9)).save(cut)
    cut.write_bytes(cut.read_bytes()[:120])
    for bad, call in ((path, probe), (path, load_rgb), (cut, load_rgb)):
        with pytest.raises(PhotoError) as err:
            call(bad)
        assert not err.value.retry, str(err.value)
        assert str(tmp_path) not in str(err.value)  # shown beside the relative path instead


def test_io_error_while_decoding_is_worth_retrying(tmp_path, monkeypatch):
    import errno

    from PIL import ImageFile

    path = tmp_path / "fine.jpg"
    Image.new("RGB", (64, 48), (200, 10, 10)).save(path)

    def eio(self):
        raise OSError(errno.EIO, "Input/output error")  # what a failing disk raises from read()

    monkeypatch.setattr(ImageFile.ImageFile, "load", eio)
    with pytest.raises(PhotoError, match="Input/output error") as err:
        load_rgb(path)
    assert err.value.retry
    monkeypatch.undo()
    assert load_rgb(path).size == (64, 48)


def test_named_pipe_called_jpg_is_refused_without_waiting(tmp_path):
    import os
    import threading

    pipe = tmp_path / "x.jpg"
    os.mkfifo(pipe)
    errors = []

    def read_both():
        for call in (probe, load_rgb):
            try:
                call(pipe)
            except PhotoError as exc:
                errors.append(exc)

    # A daemon thread: if opening the pipe blocked, the test fails instead of hanging.
    t = threading.Thread(target=read_both, daemon=True)
    t.start()
    t.join(10)
    assert not t.is_alive(), "opening a named pipe blocked"
    assert len(errors) == 2 and all("named pipe" in str(e) and not e.retry for e in errors)


# ------------------------------------------------------------------ phone photos: HEIC (pillow-heif), AVIF
def _stored_for_orientation_6():
    stored = np.zeros((40, 60, 3), np.uint8)
    stored[:, :] = (0, 0, 255)
    stored[:10, :15] = (255, 0, 0)  # red block in the stored top-left corner
    return stored


@pytest.mark.parametrize("suffix", [".heic", ".avif"])
def test_phone_formats_with_exif_rotation_come_out_upright(tmp_path, suffix):
    if suffix == ".heic":
        pytest.importorskip("pillow_heif")
    else:
        from PIL import features
        if not features.check("avif"):
            pytest.skip("this Pillow does not read AVIF")
    assert suffix in IMAGE_SUFFIXES
    stored = _stored_for_orientation_6()
    exif = Image.Exif()
    exif[EXIF_ORIENTATION] = 6  # EXIF: "rotate 90 degrees clockwise to display"
    path = tmp_path / f"phone{suffix}"
    # Written by the format's own writer: pillow-heif (its opener is registered by core.images) or
    # Pillow's AVIF plugin.
    Image.fromarray(stored).save(path, quality=95, exif=exif.tobytes())

    assert probe(path) == (40, 60)
    shown = _rgb(load_rgb(path))
    assert shown.shape == (60, 40, 3)
    expected = np.rot90(stored, k=-1).astype(int)   # numpy's clockwise quarter turn: orientation 6
    assert np.abs(shown - expected).mean() < 8      # lossy coding only
    assert shown[2, -2, 0] > 200 and shown[2, -2, 2] < 60  # red block now top-right


def test_heic_photo_with_exif_rotation_is_scanned_and_embedded_upright(photo_project_folder):
    pytest.importorskip("pillow_heif")
    from skimage import data

    from core.project import Project

    upright = Image.fromarray(data.chelsea()).convert("RGB")            # 451 x 300
    extra = photo_project_folder / "phone"
    extra.mkdir()
    upright.save(extra / "upright.jpg", quality=95)
    sideways = upright.transpose(Image.Transpose.ROTATE_90)           # as a phone held sideways stores it
    sideways.save(extra / "sideways.jpg", quality=95)                 # ... without saying so
    exif = Image.Exif()
    exif[EXIF_ORIENTATION] = 6
    sideways.save(extra / "IMG_0001.HEIC", quality=95, exif=exif.tobytes())   # ... saying so (pillow-heif)
    with Project.open(photo_project_folder) as p:
        rep = p.scan()
        assert rep.embedded == 3 and "phone/IMG_0001.HEIC" not in dict(rep.skipped)
        info = p.photo_info("phone/IMG_0001.HEIC")
        assert (info["width"], info["height"]) == upright.size
        sims = dict(p.neighbours("phone/IMG_0001.HEIC", k=40))
    # The embedding is the upright photo's (the same picture), not the sideways one's (measured: 0.998
    # against the upright JPEG, 0.81 against the sideways one).
    assert sims["phone/upright.jpg"] > 0.95
    assert sims["phone/upright.jpg"] > sims.get("phone/sideways.jpg", -1.0) + 0.05


def test_cut_short_heic_is_a_final_photo_error(tmp_path):
    pytest.importorskip("pillow_heif")
    noise = np.random.default_rng(0).integers(0, 255, (300, 400, 3), np.uint8)
    Image.fromarray(noise).save(tmp_path / "full.heic", quality=80)      # written by pillow-heif
    data = (tmp_path / "full.heic").read_bytes()
    for name, cut in (("half.heic", data[: len(data) // 2]), ("head.heic", data[:200])):
        (tmp_path / name).write_bytes(cut)
        with pytest.raises(PhotoError) as err:
            load_rgb(tmp_path / name)
        assert not err.value.retry and str(tmp_path) not in str(err.value)
