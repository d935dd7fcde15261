"""Thumbnails for review: orientation, squaring, difference/overlay, the on-disk cache."""

import hashlib

import numpy as np
import pytest
from PIL import Image, ImageOps
from review_workspace import draw_lesion

from curate.hashing import DIHEDRAL_TRANSFORMS
from curate.thumbnails import (
    ORIENTATION_NAMES,
    INVERSE_ORIENTATION,
    ThumbnailCache,
    align_to,
    difference_image,
    fit_square,
    orient,
    overlay_image,
    pair_pictures,
)

RNG = np.random.default_rng(0)
PIXELS = RNG.integers(0, 256, size=(5, 7, 3), dtype=np.uint8)

# numpy's own array operations as the reference for each dihedral transform
# (numpy.rot90 turns counter-clockwise, as Pillow's ROTATE_90 does)
NUMPY_REFERENCE = {
    "identity": lambda a: a,
    "rot90": lambda a: np.rot90(a, 1),
    "rot180": lambda a: np.rot90(a, 2),
    "rot270": lambda a: np.rot90(a, 3),
    "flip_h": np.fliplr,
    "flip_v": np.flipud,
    "transpose": lambda a: np.transpose(a, (1, 0, 2)),
    "transverse": lambda a: np.rot90(np.transpose(a, (1, 0, 2)), 2),
}


@pytest.mark.parametrize("k", range(8))
def test_orient_follows_the_hashing_order_of_transforms(k):
    name = DIHEDRAL_TRANSFORMS[k]
    got = np.asarray(orient(Image.fromarray(PIXELS), k))
    assert np.array_equal(got, NUMPY_REFERENCE[name](PIXELS))
    assert len(ORIENTATION_NAMES) == len(DIHEDRAL_TRANSFORMS)


def test_orient_refuses_unknown_codes():
    with pytest.raises(ValueError, match="orientation must be an integer 0..7"):
        orient(Image.fromarray(PIXELS), 8)


def test_fit_square_keeps_aspect_and_pads():
    im = fit_square(Image.new("RGB", (100, 50), (255, 0, 0)), 80)
    a = np.asarray(im)
    assert im.size == (80, 80)
    assert tuple(a[40, 40]) == (255, 0, 0)  # the picture, centred
    assert tuple(a[2, 40]) == (40, 40, 40)  # padding above it


def test_difference_and_overlay_match_numpy():
    a = Image.fromarray(PIXELS)
    b = Image.fromarray(PIXELS[::-1].copy())
    expected = np.clip(np.abs(PIXELS.astype(int) - PIXELS[::-1].astype(int)) * 2, 0, 255)
    assert np.array_equal(np.asarray(difference_image(a, b, gain=2)), expected)
    # Pillow's blend is a + alpha * (b - a) per channel, rounded (Pillow docs, Image.blend)
    blended = np.asarray(overlay_image(a, b, alpha=0.5)).astype(int)
    assert np.abs(blended - (PIXELS.astype(int) + PIXELS[::-1].astype(int)) / 2).max() <= 1
    with pytest.raises(ValueError, match="same size"):
        difference_image(a, Image.new("RGB", (2, 2)))
    with pytest.raises(ValueError, match="alpha"):
        overlay_image(a, b, alpha=2)


def test_pair_pictures_turns_b_back_onto_a():
    a = draw_lesion(3, size=120)
    for k, name in enumerate(DIHEDRAL_TRANSFORMS):
        # b is a transformed by the inverse of transform k; orientation k undoes it
        b = a
        for _ in range(3 if name in ("rot90", "rot270") else 1):  # the others undo themselves
            b = orient(b, k)
        left, right, diff = pair_pictures(a, b, orientation=k, size=120, mode="difference")
        assert np.asarray(diff).max() == 0, name
    with pytest.raises(ValueError, match="mode must be one of"):
        pair_pictures(a, a, mode="blink")


def test_cache_makes_each_thumbnail_once_keyed_by_content(tmp_path):
    big = draw_lesion(1, size=1200)
    path = tmp_path / "big.jpg"
    big.save(path, quality=90)
    sha = hashlib.sha256(path.read_bytes()).hexdigest()
    cache = ThumbnailCache(tmp_path / "thumbs", size=128)
    t = cache.get(path, sha)
    assert t.size == (128, 128) and cache.made == 1
    assert cache.path_for(sha) == tmp_path / "thumbs" / sha[:2] / f"{sha}_128.jpg"
    assert cache.path_for(sha).is_file()
    # the same content under another name reuses the thumbnail
    copy = tmp_path / "copy.jpg"
    copy.write_bytes(path.read_bytes())
    cache.get(copy, sha)
    assert cache.made == 1
    # a cache of another size is separate
    assert ThumbnailCache(tmp_path / "thumbs", size=64).get(path, sha).size == (64, 64)
    # recent thumbnails are also kept decoded in memory (the review's prefetch lands there)
    cache.path_for(sha).unlink()
    assert cache.get(path, sha) is cache.get(path, sha) and cache.made == 1
    assert ThumbnailCache(tmp_path / "thumbs", size=128, memory_items=0).get(path, sha) is not t
    # no temporary files left behind
    assert not list((tmp_path / "thumbs").rglob(".tmp-*"))
    # ensure() makes only the missing ones
    other = tmp_path / "other.png"
    draw_lesion(2).save(other)
    assert cache.ensure([(path, sha), (other, None)], progress=False) == 1


def test_missing_or_broken_files_give_a_placeholder_that_is_not_cached(tmp_path):
    cache = ThumbnailCache(tmp_path / "thumbs", size=32)
    assert cache.get(tmp_path / "nope.jpg", "0" * 64).size == (32, 32)
    broken = tmp_path / "broken.jpg"
    broken.write_bytes(b"not an image")
    assert cache.get(broken, "1" * 64).size == (32, 32)
    assert cache.made == 0 and not (tmp_path / "thumbs").exists()
    with pytest.raises(ValueError, match="hex digest"):
        cache.path_for("../../etc")
    with pytest.raises(ValueError, match="size must be"):
        ThumbnailCache(tmp_path, size=2)


def test_thumbnails_are_turned_upright_by_the_exif_orientation_tag(tmp_path):
    im = draw_lesion(4, size=160).crop((0, 0, 160, 100))  # landscape
    exif = Image.Exif()
    exif[0x0112] = 6  # Exif 2.32 Orientation tag: 6 = display rotated 90 degrees clockwise
    path = tmp_path / "tagged.jpg"
    im.save(path, exif=exif, quality=95)
    thumb = ThumbnailCache(tmp_path / "thumbs", size=80).get(path)
    # Pillow's ImageOps.exif_transpose is the reference for what upright means
    with Image.open(path) as raw:
        upright = ImageOps.exif_transpose(raw)
    assert upright.size == (100, 160) and thumb.size == (50, 80)
    ref = np.asarray(upright.convert("RGB").resize(thumb.size), dtype=float)
    assert np.abs(np.asarray(thumb, dtype=float) - ref).mean() < 8


@pytest.mark.parametrize("turn", [Image.Transpose.ROTATE_90, Image.Transpose.ROTATE_270])
def test_a_quarter_turn_is_undone_whichever_direction_the_code_names(turn):
    # a pair's orientation may name the turn of a onto b or of b onto a; for 90/270 these differ
    a = draw_lesion(5, size=120)
    b = a.transpose(turn)
    for code in (1, 3):
        assert np.asarray(align_to(a, b, code)).tobytes() == np.asarray(a).tobytes()
    assert [INVERSE_ORIENTATION[INVERSE_ORIENTATION[k]] for k in range(8)] == list(range(8))
