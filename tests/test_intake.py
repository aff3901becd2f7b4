"""intake: which files are found, how each decodes to RGB, and the status of each one that does not."""
from __future__ import annotations

import hashlib
import os

import numpy as np
import pytest
from PIL import Image

from oddling.data.intake import FOLDER_AGAIN, IMAGE_SUFFIXES, IntakeError, discover, load_rgb, sha256_file

RED, BLUE = (220, 30, 30), (30, 30, 220)


def touch(path, data: bytes = b"x"):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return path


def rel(paths, root):
    return [p.relative_to(root).as_posix() for p in paths]


def status_of(path, **kwargs) -> str:
    with pytest.raises(IntakeError) as caught:
        load_rgb(path, **kwargs)
    return caught.value.status


# --- discover -----------------------------------------------------------------------------------

def test_discover_is_recursive_and_sorted_by_relative_path(tmp_path):
    for name in ("b.png", "a/z.jpg", "a/b/c.png", "A.png"):
        touch(tmp_path / name)
    assert rel(discover(tmp_path), tmp_path) == ["A.png", "a/b/c.png", "a/z.jpg", "b.png"]


def test_discover_includes_non_image_files(tmp_path):
    touch(tmp_path / "photo.jpg")
    touch(tmp_path / "notes.txt")
    assert rel(discover(tmp_path), tmp_path) == ["notes.txt", "photo.jpg"]


def test_discover_skips_hidden_files_and_hidden_folders(tmp_path):
    touch(tmp_path / "keep.png")
    touch(tmp_path / ".DS_Store")
    touch(tmp_path / ".thumbs" / "t.png")
    touch(tmp_path / "sub" / ".hidden.png")
    assert rel(discover(tmp_path), tmp_path) == ["keep.png"]


def test_discover_skips_excluded_folder_by_resolved_path(tmp_path):
    touch(tmp_path / "keep.png")
    touch(tmp_path / "out" / "made_by_us.png")
    # The same folder spelled another way must still be excluded.
    assert rel(discover(tmp_path, exclude=[tmp_path / "sub" / ".." / "out"]), tmp_path) == ["keep.png"]


def test_discover_skips_a_folder_holding_bank_json(tmp_path):
    touch(tmp_path / "keep.png")
    touch(tmp_path / "parts.bank" / "bank.json", b"{}")
    touch(tmp_path / "parts.bank" / "embeddings.npy")
    assert rel(discover(tmp_path), tmp_path) == ["keep.png"]


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="no symlinks")
def test_discover_lists_a_symlink_loop_instead_of_following_it_again(tmp_path):
    touch(tmp_path / "real" / "x.png")
    (tmp_path / "loop").symlink_to(tmp_path, target_is_directory=True)
    assert rel(discover(tmp_path), tmp_path) == ["loop", "real/x.png"]
    assert status_of(tmp_path / "loop") == FOLDER_AGAIN


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="no symlinks")
def test_discover_follows_a_symlinked_folder_once(tmp_path):
    touch(tmp_path / "outside" / "o.png")
    touch(tmp_path / "in" / "a.png")
    (tmp_path / "in" / "ext").symlink_to(tmp_path / "outside", target_is_directory=True)
    (tmp_path / "in" / "ext2").symlink_to(tmp_path / "outside", target_is_directory=True)
    assert rel(discover(tmp_path / "in"), tmp_path / "in") == ["a.png", "ext/o.png", "ext2"]


def test_discover_raises_when_root_is_not_a_folder(tmp_path):
    with pytest.raises(IntakeError, match="not a folder"):
        discover(tmp_path / "missing")


# --- formats ------------------------------------------------------------------------------------

@pytest.mark.parametrize("suffix", sorted(IMAGE_SUFFIXES))
def test_each_format_decodes_to_rgb_at_full_size(tmp_path, suffix):
    path = tmp_path / f"img{suffix}"
    Image.new("RGB", (37, 21), RED).save(path)
    image = load_rgb(path)
    assert (image.mode, image.size) == ("RGB", (37, 21))
    assert np.abs(np.asarray(image)[10, 18].astype(int) - RED).max() <= 12   # lossy formats drift a little


def test_suffix_is_compared_in_lowercase(tmp_path):
    path = tmp_path / "IMG_0001.JPG"
    Image.new("RGB", (8, 8), RED).save(path, format="JPEG")
    assert load_rgb(path).size == (8, 8)


def test_gif_gives_the_first_frame(tmp_path):
    path = tmp_path / "anim.gif"
    first, second = Image.new("RGB", (16, 16), RED), Image.new("RGB", (16, 16), BLUE)
    first.save(path, save_all=True, append_images=[second], duration=100)
    assert tuple(np.asarray(load_rgb(path))[8, 8]) == RED


def test_exif_orientation_is_applied(tmp_path):
    path = tmp_path / "rotated.jpg"
    exif = Image.Exif()
    exif[0x0112] = 6   # Orientation: rotate 90 degrees clockwise to display
    Image.new("RGB", (40, 20), RED).save(path, exif=exif)
    assert load_rgb(path).size == (20, 40)


# --- modes --------------------------------------------------------------------------------------

def _palette_image(transparent: bool) -> Image.Image:
    image = Image.new("P", (4, 4), 1)
    image.putpalette([0, 0, 0, 200, 10, 10] + [0] * (256 * 3 - 6))
    if transparent:
        image.info["transparency"] = 1
    return image


# (mode read back, how to make it, file suffix, expected RGB at a pixel)
MODES = [
    ("1", lambda: Image.new("1", (4, 4), 1), ".png", (255, 255, 255)),
    ("L", lambda: Image.new("L", (4, 4), 77), ".png", (77, 77, 77)),
    ("LA", lambda: Image.new("LA", (4, 4), (0, 0)), ".png", (255, 255, 255)),         # transparent black -> white
    ("P", lambda: _palette_image(False), ".png", (200, 10, 10)),
    ("P", lambda: _palette_image(True), ".png", (255, 255, 255)),                     # transparent entry -> white
    ("RGBA", lambda: Image.new("RGBA", (4, 4), (0, 0, 0, 0)), ".png", (255, 255, 255)),
    ("RGBA", lambda: Image.new("RGBA", (4, 4), (200, 10, 10, 255)), ".png", (200, 10, 10)),
    ("CMYK", lambda: Image.new("CMYK", (4, 4), (0, 255, 255, 0)), ".tif", (255, 0, 0)),
    ("I;16", lambda: Image.new("I;16", (4, 4), 65535), ".png", (255, 255, 255)),
    ("I;16", lambda: Image.new("I;16", (4, 4), 257 * 100), ".png", (100, 100, 100)),
    ("I", lambda: Image.new("I", (4, 4), 100), ".tif", (100, 100, 100)),
    ("F", lambda: Image.new("F", (4, 4), 0.5), ".tif", (128, 128, 128)),
]


@pytest.mark.parametrize("mode, make, suffix, expected", MODES,
                         ids=[f"{m[0]}-{i}" for i, m in enumerate(MODES)])
def test_each_mode_becomes_sensible_rgb(tmp_path, mode, make, suffix, expected):
    path = tmp_path / f"img{suffix}"
    make().save(path)
    with Image.open(path) as stored:
        assert stored.mode == mode   # the file really exercises that mode's branch
    image = load_rgb(path)
    assert (image.mode, image.size) == ("RGB", (4, 4))
    assert tuple(np.asarray(image)[1, 1]) == expected


def test_mode_I_beyond_16_bits_is_stretched_to_full_range(tmp_path):
    path = tmp_path / "wide.tif"
    Image.fromarray(np.array([[0, 1_000_000], [500_000, 1_000_000]], dtype=np.int32)).save(path)
    grey = np.asarray(load_rgb(path))[..., 0]
    assert grey.tolist() == [[0, 255], [128, 255]]


def test_mode_F_outside_unit_range_is_stretched_and_nan_is_black(tmp_path):
    path = tmp_path / "float.tif"
    Image.fromarray(np.array([[-10.0, 10.0], [0.0, np.nan]], dtype=np.float32)).save(path)
    grey = np.asarray(load_rgb(path))[..., 0]
    assert grey.tolist() == [[0, 255], [128, 0]]


# --- JPEG draft mode ----------------------------------------------------------------------------

@pytest.fixture
def big_jpeg(tmp_path):
    path = tmp_path / "big.jpg"
    Image.new("RGB", (3000, 2000), RED).save(path, quality=80)
    return path


def test_draft_mode_decodes_a_large_jpeg_smaller_but_not_below_min_side(big_jpeg):
    image = load_rgb(big_jpeg, min_side=256)
    assert image.mode == "RGB"
    assert image.size[0] < 3000 and min(image.size) >= 256
    assert image.size[0] * 2 == image.size[1] * 3   # aspect ratio kept


def test_without_min_side_a_jpeg_decodes_at_full_size(big_jpeg):
    assert load_rgb(big_jpeg).size == (3000, 2000)


def test_draft_mode_keeps_min_side_on_a_rotated_jpeg(tmp_path):
    path = tmp_path / "tall.jpg"
    exif = Image.Exif()
    exif[0x0112] = 6
    Image.new("RGB", (2400, 600), RED).save(path, exif=exif)
    image = load_rgb(path, min_side=256)
    assert image.size[0] < image.size[1] and min(image.size) >= 256


# --- failures and their status ------------------------------------------------------------------

def test_non_image_suffix_is_skipped_with_its_suffix(tmp_path):
    assert status_of(touch(tmp_path / "notes.txt")) == "skipped: not an image file type (.txt)"


def test_zero_byte_file_is_unreadable_empty(tmp_path):
    assert status_of(touch(tmp_path / "empty.png", b"")) == "unreadable: empty file (0 bytes)"


@pytest.mark.parametrize("suffix", [".jpg", ".png"])
def test_truncated_file_is_unreadable_not_padded(tmp_path, suffix):
    whole = tmp_path / f"whole{suffix}"
    noise = np.random.default_rng(0).integers(0, 256, (64, 64, 3), dtype=np.uint8)
    Image.fromarray(noise).save(whole)
    data = whole.read_bytes()
    cut = touch(tmp_path / f"cut{suffix}", data[: len(data) // 2])
    assert status_of(cut).startswith("unreadable: truncated or corrupt image data (")


def test_random_bytes_with_image_suffix_are_not_a_recognised_image(tmp_path):
    path = touch(tmp_path / "noise.png", np.random.default_rng(1).bytes(4096))
    status = status_of(path)
    assert status.startswith("unreadable: not a recognised image (")
    assert str(tmp_path) not in status   # short: the row already names the file


def test_more_pixels_than_max_pixels_is_too_large(tmp_path):
    path = tmp_path / "big.png"
    Image.new("RGB", (200, 100)).save(path)
    assert status_of(path, max_pixels=10_000) == "unreadable: image too large (200 x 100 pixels, limit 10000)"


def test_pillows_hard_bomb_limit_is_reported_not_raised(tmp_path, monkeypatch):
    path = tmp_path / "big.png"
    Image.new("RGB", (200, 100)).save(path)
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 5_000)   # 20 000 > 2 x 5 000: Pillow raises its bomb error
    assert status_of(path, max_pixels=10**9).startswith("unreadable: image too large (")


# --- hashing ------------------------------------------------------------------------------------

def test_sha256_file_matches_hashlib(tmp_path):
    data = np.random.default_rng(2).bytes(2_500_000)   # more than two 1 MiB chunks
    path = touch(tmp_path / "blob.bin", data)
    # Outside reference: hashlib over the whole byte string at once.
    assert sha256_file(path) == hashlib.sha256(data).hexdigest()


@pytest.mark.parametrize("mode, colour, key", [("L", 0, 0), ("RGB", (0, 0, 0), (0, 0, 0))])
def test_transparent_colour_key_becomes_white(tmp_path, mode, colour, key):
    path = tmp_path / f"key_{mode}.png"
    Image.new(mode, (4, 4), colour).save(path, transparency=key)
    assert load_rgb(path).getpixel((0, 0)) == (255, 255, 255)
