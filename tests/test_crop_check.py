"""The second-stage crop check: crops are confirmed, different pictures are not."""

import io
import os

import numpy as np
import pandas as pd
import pytest
from PIL import Image, ImageDraw, ImageFilter

from curate.crop_check import COARSE_SCALES, MIN_KEEP, _Original, _Placements, _turn, check_crop
from curate.crop_files import MAX_CHECK_D_CROP, pairs_to_check, upgrade_crop_pairs
from curate.hashing import INVERSE_ORIENTATION, PIL_TRANSPOSE


def _skin(seed, size=(240, 180)):
    """A skin-like background: a smooth tone gradient plus fine grain (drawn here)."""
    rng = np.random.default_rng(seed)
    w, h = size
    base = np.array([205, 160, 135], float) + rng.normal(0, 8, 3)
    yy, xx = np.mgrid[0:h, 0:w] / max(w, h)
    shade = 18 * (xx * rng.uniform(-1, 1) + yy * rng.uniform(-1, 1))
    grain = rng.normal(0, 5, (h, w))
    arr = base[None, None, :] + (shade + grain)[..., None]
    return Image.fromarray(np.clip(arr, 0, 255).astype(np.uint8))


def _lesion(img, seed, colours=((90, 55, 40), (60, 35, 30))):
    """A blob of a few overlapping ellipses in the given colours, slightly blurred."""
    rng = np.random.default_rng(seed)
    out = img.copy()
    draw = ImageDraw.Draw(out)
    w, h = img.size
    for k in range(6):
        cx, cy = rng.uniform(0.3, 0.7) * w, rng.uniform(0.3, 0.7) * h
        rx, ry = rng.uniform(0.06, 0.2) * w, rng.uniform(0.06, 0.2) * h
        draw.ellipse([cx - rx, cy - ry, cx + rx, cy + ry], fill=colours[k % len(colours)])
    return out.filter(ImageFilter.GaussianBlur(1.2))


def _random_crop(img, rng, low=0.75, high=0.95):
    kw, kh = rng.uniform(low, high, 2)
    cw, ch = int(img.width * kw), int(img.height * kh)
    x0 = int(rng.integers(0, img.width - cw + 1))
    y0 = int(rng.integers(0, img.height - ch + 1))
    return img.crop((x0, y0, x0 + cw, y0 + ch))


def _jpeg(img, quality=75):
    buf = io.BytesIO()
    img.convert("RGB").save(buf, "JPEG", quality=quality)
    buf.seek(0)
    return Image.open(buf).convert("RGB")


# --- drawn images ----------------------------------------------------------------------------


@pytest.mark.parametrize("seed", range(8))
def test_random_crops_of_drawn_lesions_are_confirmed(seed):
    rng = np.random.default_rng(100 + seed)
    original = _lesion(_skin(seed), seed)
    crop = unturned = _random_crop(original, rng)
    t = int(rng.integers(0, 8))
    if t:
        crop = crop.transpose(PIL_TRANSPOSE[t])
    if seed % 2:
        crop = _jpeg(crop.resize((crop.width * 3 // 4, crop.height * 3 // 4)))
    m = check_crop(original, crop)
    assert m.confirmed, m
    assert not m.crop_is_a
    # the orientation that aligns the crop is the inverse of the turn applied to it
    back = crop if m.orientation == 0 else crop.transpose(PIL_TRANSPOSE[m.orientation])
    assert back.width / back.height == pytest.approx(unturned.width / unturned.height, rel=0.02)
    # either argument order works
    assert check_crop(crop, original).crop_is_a


@pytest.mark.parametrize("seed", range(6))
def test_look_alike_lesions_on_the_same_skin_are_not_confirmed(seed):
    # hard negatives: the same skin, the same two colours, a different blob
    skin = _skin(seed)
    a, b = _lesion(skin, 1000 + seed), _lesion(skin, 2000 + seed)
    assert not check_crop(a, b).confirmed
    assert not check_crop(a, _random_crop(b, np.random.default_rng(seed))).confirmed


def test_different_drawn_images_are_not_confirmed():
    for seed in range(5):
        a = _lesion(_skin(seed), seed)
        b = _lesion(_skin(seed + 50), seed + 50)
        assert not check_crop(a, b).confirmed


def test_whole_image_is_found_at_scale_one_and_full_box():
    img = _lesion(_skin(3), 3)
    m = check_crop(img, img)
    assert m.confirmed and m.scale == pytest.approx(1.0, abs=0.02)
    assert m.box == pytest.approx((0.0, 0.0, 1.0, 1.0), abs=0.03)


def test_non_image_argument_is_a_type_error():
    with pytest.raises(TypeError, match="PIL.Image.Image"):
        check_crop(np.zeros((8, 8)), Image.new("L", (8, 8)))


# --- scikit-image sample photographs ---------------------------------------------------------

# Source: scikit-image's sample data (skimage.data), photographs shipped in its wheel.
SAMPLES = ("astronaut", "camera", "chelsea", "coffee", "rocket", "coins", "moon", "page")


def _samples():
    data = pytest.importorskip("skimage.data")
    out = {}
    for name in SAMPLES:
        arr = np.asarray(getattr(data, name)())
        out[name] = Image.fromarray(arr.astype(np.uint8)).reduce(2)
    return out


def test_random_crops_of_sample_photographs_are_confirmed():
    rng = np.random.default_rng(7)
    for k, (name, img) in enumerate(_samples().items()):
        crop = _random_crop(img, rng)
        if k % 3 == 1:
            crop = crop.transpose(PIL_TRANSPOSE[int(rng.integers(1, 8))])
        if k % 2:
            crop = _jpeg(crop, 70)
        m = check_crop(img, crop)
        assert m.confirmed, (name, m)


def test_different_sample_photographs_are_not_confirmed():
    photos = list(_samples().items())
    for (na, a), (nb, b) in zip(photos, photos[1:] + photos[:1]):
        assert not check_crop(a, b).confirmed, (na, nb)
        assert not check_crop(a, _random_crop(b, np.random.default_rng(0))).confirmed, (na, nb)


# --- the batched NCC search against scikit-image ----------------------------------------------


def _match_template():
    # Reference: scikit-image's skimage.feature.match_template (0.26): the zero-mean normalised
    # cross-correlation of the template at every offset where it fits inside the image, the
    # same as the Pearson correlation of the template with each window (checked to 1e-14).
    return pytest.importorskip("skimage.feature").match_template


@pytest.mark.parametrize("shape", [(36, 48), (48, 33), (128, 96)])
def test_batched_ncc_maps_match_scikit_image_match_template(shape):
    match_template = _match_template()
    rng = np.random.default_rng(sum(shape))
    H, W = shape
    image = rng.random(shape) * 255
    # shapes repeat (they share arithmetic) and differ (they share only the FFTs); at the
    # small sizes 12 templates span more than one FFT batch
    shapes = [(H, W), (H - 3, W - 5), (H - 3, W - 5), (int(0.8 * H), int(0.75 * W)), (6, 6), (H, 7), (7, W),
              (H - 3, W - 5), (int(0.7 * H), W - 1), (H - 1, int(0.7 * W)), (6, 6), (H - 2, W - 2)]
    templates = [rng.random(s) * 255 for s in shapes]
    maps = _Original(image).ncc_maps(templates)
    assert len(maps) == len(templates)
    for template, m in zip(templates, maps):
        np.testing.assert_allclose(m, match_template(image, template), rtol=0, atol=1e-9)
    # one template per call gives the same maps as the batch
    for template, m in zip(templates[:4], maps[:4]):
        np.testing.assert_allclose(_Original(image).ncc_map(template), m, rtol=0, atol=1e-12)


def test_best_placements_match_a_loop_over_scales_with_match_template():
    match_template = _match_template()
    rng = np.random.default_rng(11)
    original = rng.random((36, 48)) * 255
    crop = rng.random((30, 42)) * 255
    search = _Placements(crop, original)
    requests = [(t, COARSE_SCALES) for t in (0, 1, 3, 4, 6)] + [(0, [0.85]), (0, [0.5, 0.9, 1.2])]
    got = search.best(requests)
    for (t, scales), found in zip(requests, got):
        best = (-2.0, 0.0, 0, 0, 0, 0)  # the first largest NCC over the scales, as the module documents
        for f in scales:
            turned = Image.fromarray(_turn(crop, t).astype(np.float32))
            width = round(f * 48)
            height = round(width * turned.height / turned.width)
            if not (MIN_KEEP - 0.03 <= f <= 1.0 and 6 <= width <= 48 and 6 <= height <= 36
                    and height >= MIN_KEEP * 36 - 1):
                continue  # the template does not fit in the original
            template = np.asarray(turned.resize((width, height), Image.Resampling.BILINEAR), dtype=np.float64)
            m = match_template(original, template)
            y, x = np.unravel_index(np.argmax(m), m.shape)
            if m[y, x] > best[0]:
                best = (float(m[y, x]), float(f), int(x), int(y), width, height)
        assert found[1:] == best[1:], (t, scales)
        assert found[0] == pytest.approx(best[0], abs=1e-9)
    # both cases came up: turned a quarter, the crop is too tall to fit at any scale
    assert {found[0] == -2.0 for found in got} == {True, False}


# --- the file layer -------------------------------------------------------------------------


def test_pairs_to_check_takes_possible_pairs_with_crop_evidence():
    limit = MAX_CHECK_D_CROP
    p = pd.DataFrame({"verdict": ["possible", "possible", "near", "possible"], "d_crop": [limit, limit + 1, 1, None]})
    assert pairs_to_check(p).tolist() == [True, False, False, False]


def test_upgrade_marks_only_confirmed_crops(tmp_path):
    original = _lesion(_skin(1), 1)
    crop = _random_crop(original, np.random.default_rng(1))
    other = _lesion(_skin(1), 99)
    paths = {}
    for i, (name, img) in enumerate((("o.png", original), ("c.png", crop), ("x.png", other))):
        img.save(tmp_path / name)
        paths[i] = str(tmp_path / name)
    paths[3] = str(tmp_path / "gone.png")  # vanished since hashing: the pair is left alone
    pairs = pd.DataFrame({"image_a": [0, 0, 0, 0], "image_b": [1, 2, 3, 2],
                          "verdict": ["possible", "possible", "possible", "near"],
                          "d_crop": [6, 6, 6, 0], "crop": [0, 0, 0, 0], "orientation": [0, 0, 0, 0]})
    out = upgrade_crop_pairs(pairs, paths, progress=False)
    assert out["verdict"].tolist() == ["near", "possible", "possible", "near"]
    assert out["crop"].tolist() == [1, 0, 0, 0]
    assert out["crop_checked"].tolist() == [1, 1, 0, 0]
    assert out.attrs["crop_checked"] == 3
    assert out.loc[0, "crop_ncc"] > 0.95 and pd.isna(out.loc[3, "crop_ncc"])
    assert pairs["verdict"].tolist()[0] == "possible"  # input left unchanged


def _turned_crop_files(tmp_path):
    """An original, a crop of it turned a quarter, and an unrelated lesion, as files."""
    original = _lesion(_skin(2), 2)
    crop = _random_crop(original, np.random.default_rng(2)).transpose(PIL_TRANSPOSE[1])
    paths = {}
    for i, (name, img) in enumerate((("o.png", original), ("c.png", crop), ("x.png", _lesion(_skin(2), 98)))):
        img.save(tmp_path / name)
        paths[i] = str(tmp_path / name)
    digests = {i: f"{i:064x}" for i in paths}  # stand-ins: the cache only needs distinct keys
    return paths, digests


def _two_ways(pairs_ab):
    both = pd.concat([pairs_ab, pairs_ab.rename(columns={"image_a": "image_b", "image_b": "image_a"})],
                     ignore_index=True)
    return both.assign(verdict="possible", d_crop=6, crop=0, orientation=0)


def test_cached_crop_checks_are_read_back_not_checked_again(tmp_path, monkeypatch):
    import curate.crop_files as crop_files
    from curate.store import Workspace

    paths, digests = _turned_crop_files(tmp_path)
    ws = Workspace.create(tmp_path / "ws")
    pairs = _two_ways(pd.DataFrame({"image_a": [0, 0], "image_b": [1, 2]}))
    # reference: the same pairs checked with no cache
    fresh = upgrade_crop_pairs(pairs, paths, workers=1, progress=False)
    assert fresh["verdict"].tolist() == ["near", "possible", "near", "possible"]
    # asked the other way round, the check reports the inverse turn
    assert INVERSE_ORIENTATION[int(fresh.loc[0, "crop_orientation"])] == int(fresh.loc[2, "crop_orientation"])
    first = upgrade_crop_pairs(pairs.iloc[:2], paths, workers=1, progress=False, digests=digests, cache=ws)
    assert first.attrs["crop_cached"] == 0

    def no_checks(items):
        raise AssertionError(f"checked again: {items}")

    monkeypatch.setattr(crop_files, "check_chunk", no_checks)
    again = upgrade_crop_pairs(pairs, paths, workers=1, progress=False, digests=digests, cache=ws)
    assert again.attrs["crop_cached"] == again.attrs["crop_checked"] == 4
    pd.testing.assert_frame_equal(again, fresh)
    # a new version of the check does not trust the old answers
    monkeypatch.setattr(crop_files, "CHECK_VERSION", crop_files.CHECK_VERSION + 1)
    with pytest.raises(AssertionError, match="checked again"):
        upgrade_crop_pairs(pairs, paths, workers=1, progress=False, digests=digests, cache=ws)


def test_copies_of_one_content_pair_are_checked_once(tmp_path, monkeypatch):
    import shutil

    import curate.crop_files as crop_files
    from curate.store import Workspace

    paths, digests = _turned_crop_files(tmp_path)
    shutil.copy(paths[1], tmp_path / "c_copy.png")  # a byte copy of the crop: the same digest
    paths[3], digests[3] = str(tmp_path / "c_copy.png"), digests[1]
    pairs = pd.DataFrame({"image_a": [0, 0, 0], "image_b": [1, 3, 2]}).assign(
        verdict="possible", d_crop=6, crop=0, orientation=0)
    seen = []
    check_chunk = crop_files.check_chunk
    monkeypatch.setattr(crop_files, "check_chunk", lambda items: seen.extend(items) or check_chunk(items))
    out = upgrade_crop_pairs(pairs, paths, workers=1, progress=False, digests=digests,
                             cache=Workspace.create(tmp_path / "ws"))
    assert sorted(k for k, _, _ in seen) == [0, 2]  # pair 1 is pair 0 again, by content
    # reference: the same pairs each checked, without digests
    pd.testing.assert_frame_equal(out, upgrade_crop_pairs(pairs, paths, workers=1, progress=False))
    assert out["verdict"].tolist() == ["near", "near", "possible"]


def test_find_near_duplicates_calls_a_crop_near(tmp_path):
    from curate.pair_store import find_near_duplicates

    rng = np.random.default_rng(5)
    for k in range(4):
        _lesion(_skin(k), k).save(tmp_path / f"img{k}.png")
    original = _lesion(_skin(9), 9)
    original.save(tmp_path / "orig.png")
    _random_crop(original, rng, 0.8, 0.85).save(tmp_path / "orig_crop.png")
    pairs = find_near_duplicates(tmp_path, workers=1, progress=False)
    names = [tuple(sorted((os.path.basename(a), os.path.basename(b)))) for a, b in
             zip(pairs["path_a"], pairs["path_b"])]
    got = dict(zip(names, zip(pairs["verdict"], pairs["crop"])))
    assert got.get(("orig.png", "orig_crop.png"), ("missed", 0))[0] == "near", pairs
    assert got[("orig.png", "orig_crop.png")][1] == 1
    assert all(v != "near" for n, (v, _) in got.items() if n != ("orig.png", "orig_crop.png"))


@pytest.mark.parametrize("t", [1, 3, 4, 6])
@pytest.mark.parametrize("turned_first", [False, True])
def test_stored_check_orientation_turns_image_b_onto_image_a(tmp_path, t, turned_first):
    # reference: Pillow's transpose makes the turned copy and, applied with the stored code to
    # the picture at path_b (curate.thumbnails.orient), must give the picture at path_a back
    from curate.thumbnails import orient

    original = _lesion(_skin(3, (160, 160)), 3)
    turned = original.transpose(PIL_TRANSPOSE[t])
    pictures = [turned, original] if turned_first else [original, turned]
    paths = {}
    for k, picture in enumerate(pictures):
        paths[k] = str(tmp_path / f"{k}.png")
        picture.save(paths[k])
    pairs = pd.DataFrame({"image_a": [0], "image_b": [1], "verdict": ["possible"], "d_crop": [6],
                          "crop": [0], "orientation": [0]})
    out = upgrade_crop_pairs(pairs, paths, workers=1, progress=False)
    assert out["crop_checked"].tolist() == [1]
    back = orient(pictures[1], int(out["crop_orientation"].iloc[0]))
    assert np.array_equal(np.asarray(back), np.asarray(pictures[0]))


def _dermoscopic(seed):
    """A lesion seen through a round field of view on a black surround."""
    picture = _lesion(_skin(seed, (160, 160)), seed)
    field = Image.new("L", picture.size, 0)
    ImageDraw.Draw(field).ellipse((3, 3, 156, 156), fill=255)
    return Image.composite(picture, Image.new("RGB", picture.size, (6, 5, 5)), field)


def test_turned_dermoscopic_copy_is_confirmed_as_a_whole_picture(tmp_path):
    from curate.crop_files import check_chunk

    original = _dermoscopic(5)
    original.save(tmp_path / "a.png")
    original.transpose(PIL_TRANSPOSE[5]).save(tmp_path / "b.png")
    [(row, (confirmed, _, scale, _, _))] = check_chunk([(0, str(tmp_path / "a.png"), str(tmp_path / "b.png"))])
    assert confirmed and scale >= 0.97


def test_whole_picture_match_through_the_surround_alone_is_not_confirmed(tmp_path, monkeypatch):
    # the rule: a whole-picture match of pictures with a field-of-view surround must hold again
    # with the surrounds filled; a stand-in check confirms only pictures that still have theirs
    import curate.crop_check as cc
    from curate.crop_check import CropMatch
    from curate.crop_files import check_chunk

    def stand_in(a, b):
        dark_corner = min(a.convert("L").getpixel((0, 0)), b.convert("L").getpixel((0, 0))) < 20
        return CropMatch(dark_corner, False, 0, 1.0, (0.0, 0.0, 1.0, 1.0), 0.99, 0.9, {}, 4)

    monkeypatch.setattr(cc, "check_crop", stand_in)
    _dermoscopic(1).save(tmp_path / "a.png")
    _dermoscopic(2).save(tmp_path / "b.png")
    [(_, evidence)] = check_chunk([(0, str(tmp_path / "a.png"), str(tmp_path / "b.png"))])
    assert evidence[0] is False  # confirmed only through the surround: refused
