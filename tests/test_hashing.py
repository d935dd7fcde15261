"""curate.hashing: the value type, and each hash against imagehash on the same image."""

from __future__ import annotations

import dataclasses

import imagehash
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hash_pictures import drawn
from PIL import Image

from curate import hashing as H
from curate.hashing import PerceptualHash

# The reference for every equality below is imagehash 4.3.2 (Johannes Buchner), the version
# installed here; if a later imagehash changes an algorithm, branch on imagehash.__version__.
assert imagehash.__version__.startswith("4.3"), imagehash.__version__


def skimage_photo(name: str) -> Image.Image:
    # scikit-image's sample photographs ship inside its wheel (skimage/data/*.png, *.jpg)
    import skimage.data

    return Image.fromarray(getattr(skimage.data, name)()).convert("RGB")


SKIMAGE_NAMES = ["astronaut", "camera", "chelsea", "coffee", "rocket", "retina"]


def images():
    out = {f"drawn{w}x{h}": drawn(w, h, w + h) for w, h in [(64, 48), (151, 97), (33, 200), (9, 9)]}
    out["noise"] = Image.fromarray(np.random.default_rng(5).integers(0, 256, (70, 90, 3), dtype=np.uint8))
    out["grey_L"] = drawn(80, 60, 3).convert("L")
    out["flat"] = Image.new("RGB", (40, 40), (120, 80, 60))
    for name in SKIMAGE_NAMES:
        out[name] = H.shrink_for_hashing(skimage_photo(name))
    out["astronaut_full"] = skimage_photo("astronaut")
    return out


IMAGES = images()


def ref_int(h: imagehash.ImageHash) -> int:
    return int(str(h), 16)


@pytest.mark.parametrize("name", sorted(IMAGES))
def test_each_hash_is_bit_identical_to_imagehash(name):
    img = IMAGES[name]
    # reference: imagehash 4.3.2 average_hash, dhash, phash, whash, colorhash on the same image
    assert H.average_hash(img).value == ref_int(imagehash.average_hash(img))
    assert H.difference_hash(img).value == ref_int(imagehash.dhash(img))
    assert H.dct_hash(img).value == ref_int(imagehash.phash(img))
    assert H.wavelet_hash(img, image_scale=64).value == ref_int(imagehash.whash(img, image_scale=64))
    rgb = img.convert("RGB")
    assert H.colour_hash(rgb).value == ref_int(imagehash.colorhash(rgb, binbits=4))
    # imagehash prints the same hex (first bit most significant)
    assert H.dct_hash(img).hex == str(imagehash.phash(img))


@pytest.mark.parametrize("name", ["astronaut", "coffee", "drawn151x97", "noise"])
def test_options_match_imagehash_too(name):
    img = IMAGES[name]
    # reference: imagehash 4.3.2 with non-default options
    for size in (4, 16):
        assert H.average_hash(img, size).value == ref_int(imagehash.average_hash(img, size))
        assert H.difference_hash(img, size).value == ref_int(imagehash.dhash(img, size))
        assert H.dct_hash(img, size).value == ref_int(imagehash.phash(img, size))
        assert H.wavelet_hash(img, size).value == ref_int(imagehash.whash(img, size))
    assert H.dct_hash(img, 8, 2).value == ref_int(imagehash.phash(img, 8, 2))
    assert H.wavelet_hash(img).value == ref_int(imagehash.whash(img))
    assert H.wavelet_hash(img, mode="db4", image_scale=64).value == ref_int(
        imagehash.whash(img, mode="db4", image_scale=64)
    )
    assert H.wavelet_hash(img, remove_max_haar_ll=False).value == ref_int(
        imagehash.whash(img, remove_max_haar_ll=False)
    )
    for bb in (1, 3, 4, 5):
        assert H.colour_hash(img, bb).value == ref_int(imagehash.colorhash(img, binbits=bb))
    assert len(H.dct_hash(img, 16)) == 256


@pytest.mark.parametrize("name", ["astronaut", "chelsea", "drawn64x48", "grey_L"])
def test_hash_thumbnail_agrees_with_imagehash_on_its_input(name):
    img = IMAGES[name]
    rgb = img.convert("RGB")
    h = H.hash_thumbnail(img)
    assert list(h) == list(H.HASH_COLUMNS)
    # reference: imagehash 4.3.2 on the RGB image hash_thumbnail works from
    assert h["ahash"] == ref_int(imagehash.average_hash(rgb))
    assert h["dhash"] == ref_int(imagehash.dhash(rgb))
    assert h["phash"] == h["phash_t0"] == ref_int(imagehash.phash(rgb))
    assert h["whash"] == ref_int(imagehash.whash(rgb, image_scale=H.WHASH_IMAGE_SCALE))
    assert h["colorhash"] == ref_int(imagehash.colorhash(rgb, binbits=H.COLORHASH_BINBITS))
    assert h["crop_hashes"].dtype == np.uint64 and len(h["crop_hashes"]) == len(H.CROP_WINDOWS) == 69


# --- orientations ---------------------------------------------------------------------


def test_dihedral_order_matches_pillow_transpose():
    a = np.arange(20, dtype=np.uint8).reshape(4, 5)
    square = np.arange(16, dtype=np.uint8).reshape(4, 4)
    got = H.dihedral_arrays(square)
    for k, method in enumerate(H.PIL_TRANSPOSE):
        # reference: Pillow's Image.transpose
        want = square if method is None else np.asarray(Image.fromarray(square).transpose(method))
        assert np.array_equal(got[k], want), H.DIHEDRAL_TRANSFORMS[k]
        if method is not None:
            assert np.asarray(Image.fromarray(a).transpose(method)).size == a.size


@pytest.mark.parametrize("name", ["astronaut", "coffee", "drawn151x97"])
def test_dihedral_codes_are_phash_of_transformed_thumbnail(name):
    img = IMAGES[name]
    thumb = img.convert("L").resize((32, 32), Image.Resampling.LANCZOS)
    codes = H.dihedral_dct_hashes(img)
    for k, method in enumerate(H.PIL_TRANSPOSE):
        t = thumb if method is None else thumb.transpose(method)
        # reference: imagehash 4.3.2 phash of the transformed 32x32 thumbnail
        assert int(codes[k]) == ref_int(imagehash.phash(t))


@pytest.mark.parametrize("seed", range(6))
def test_lossless_rotations_and_flips_hit_their_transform(seed):
    # sides equal to the 32x32 DCT thumbnail: the resize is the identity, so exact
    img = drawn(32, 32, seed)
    codes = H.dihedral_dct_hashes(img)
    for k, method in enumerate(H.PIL_TRANSPOSE):
        copy = img if method is None else img.transpose(method)
        assert H.dct_hash(copy).value == int(codes[k])
    # other sizes: Pillow resizes rows then columns with uint8 rounding in between, so a
    # transposed input can round differently; measured at most 2 bits
    for w, h in [(64, 64), (96, 64), (151, 97)]:
        img = drawn(w, h, seed)
        codes = H.dihedral_dct_hashes(img)
        for k, method in enumerate(H.PIL_TRANSPOSE):
            copy = img if method is None else img.transpose(method)
            assert (H.dct_hash(copy).value ^ int(codes[k])).bit_count() <= 4


def test_a_quarter_turn_moves_phash_far():
    img = IMAGES["astronaut"]
    assert H.dct_hash(img) - H.dct_hash(img.transpose(Image.Transpose.ROTATE_90)) > 16
    assert H.dct_hash(img) - H.dct_hash(img.rotate(1)) <= 6


# --- crop windows -----------------------------------------------------------------------


@pytest.mark.parametrize("name", ["astronaut", "coffee", "drawn151x97", "retina"])
def test_window_codes_are_close_to_phash_of_the_crop(name):
    img = IMAGES[name]
    w, h = img.size
    codes = H.window_dct_hashes(img)
    dists = []
    for (l, t, r, b), code in zip(H.CROP_WINDOWS, codes):
        box = (round(l * w), round(t * h), round(r * w), round(b * h))
        # reference: imagehash 4.3.2 phash of the cropped image
        dists.append((ref_int(imagehash.phash(img.crop(box))) ^ int(code)).bit_count())
    assert max(dists) <= 4 and np.mean(dists) <= 1.5


def test_crop_windows_cover_every_span_pair_but_the_whole_image():
    coarse, fine = H.CROP_WINDOWS[:35], H.CROP_WINDOWS[35:]
    assert len(set(H.CROP_WINDOWS)) == 69
    assert (0.0, 0.0, 1.0, 1.0) not in H.CROP_WINDOWS
    assert coarse[0] == (0.0, 0.0, 0.9, 1.0)  # y span (0, 1), x span (0, 0.9)
    assert {(w[0], w[2]) for w in coarse} == set(H.CROP_SPANS)
    # fine windows keep the same share of both sides, every offset step of 0.05 from 0 to 1 - length
    assert all(np.isclose(r - l, b - t) for l, t, r, b in fine)
    assert sorted({round(r - l, 4) for l, t, r, b in fine}) == [0.775, 0.875]
    assert sorted({l for l, t, r, b in fine if np.isclose(r - l, 0.775)}) == [0.0, 0.05, 0.1, 0.15, 0.2]
    assert max(max(r, b) for l, t, r, b in fine) <= 1.0


def test_fine_windows_bring_off_grid_crops_within_the_candidate_radius():
    # a crop keeping 82% of each side at an offset of 0.09 lies between the coarse windows;
    # reference: imagehash 4.3.2 phash of the cropped photograph (scikit-image's astronaut)
    img = IMAGES["astronaut"]
    w, h = img.size
    crop = img.crop((round(0.09 * w), round(0.06 * h), round(0.91 * w), round(0.88 * h)))
    target = ref_int(imagehash.phash(crop))
    codes = H.window_dct_hashes(img)
    best_coarse = min((int(c) ^ target).bit_count() for c in codes[:35])
    best_all = min((int(c) ^ target).bit_count() for c in codes)
    assert best_all <= 8 and best_all < best_coarse


def _crop_distances():
    rng = np.random.default_rng(0)
    originals = [IMAGES[n] for n in ["astronaut", "coffee", "chelsea", "rocket", "camera"]]
    originals += [drawn(180, 120, s) for s in range(5)]
    full_set, set_set = [], []
    for img in originals:
        h = H.hash_thumbnail(img)
        codes = np.concatenate([[np.uint64(h["phash"])], h["crop_hashes"]])
        w, hgt = img.size
        for _ in range(8):
            sx, sy = rng.uniform(0.75, 1.0, 2)
            x0, y0 = rng.uniform(0, 1 - sx), rng.uniform(0, 1 - sy)
            crop = img.crop((round(x0 * w), round(y0 * hgt), round((x0 + sx) * w), round((y0 + sy) * hgt)))
            c = H.hash_thumbnail(crop)
            ccodes = np.concatenate([[np.uint64(c["phash"])], c["crop_hashes"]])
            full_set.append(int(np.bitwise_count(np.uint64(c["phash"]) ^ codes).min()))
            set_set.append(int(np.bitwise_count(np.bitwise_xor.outer(ccodes, codes)).min()))
    return np.array(full_set), np.array(set_set)


def test_random_crops_keeping_three_quarters_are_found():
    """Recall on random crops (75-100% of each side) of scikit-image photos and drawn images."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1):  # tiny matrix products; extra BLAS threads only contend
        full_set, set_set = _crop_distances()
    # measured on this seed: crop phash vs windows 0.925 at 10 bits, 0.96 at 12;
    # every code vs every code 1.0 at 10 bits (issue 6 asks >= 0.95 for such crops)
    assert (set_set <= 10).mean() >= 0.95
    assert (full_set <= 12).mean() >= 0.85


# --- the value type ----------------------------------------------------------------------

codes64 = st.integers(min_value=0, max_value=2**64 - 1)


@settings(max_examples=200, deadline=None)
@given(codes64, codes64, codes64)
def test_hamming_distance_is_a_metric(a, b, c):
    ha, hb, hc = (PerceptualHash("phash", 64, v) for v in (a, b, c))
    assert ha - ha == 0
    assert ha - hb == hb - ha == bin(a ^ b).count("1")
    assert ha - hc <= (ha - hb) + (hb - hc)


@settings(max_examples=200, deadline=None)
@given(codes64, st.sampled_from(["ahash", "dhash", "phash", "whash"]))
def test_string_round_trip_is_exact(v, algorithm):
    h = PerceptualHash(algorithm, 64, v)
    assert PerceptualHash.from_string(str(h)) == h
    assert str(h).startswith(f"{algorithm}:64:") and len(h.hex) == 16


def test_colour_code_string_has_56_bits():
    h = H.colour_hash(IMAGES["coffee"])
    assert len(h) == 56 and str(h).startswith("colorhash:56:") and len(h.hex) == 14
    assert PerceptualHash.from_string(str(h)) == h


def test_mixing_algorithms_or_lengths_is_a_type_error():
    with pytest.raises(TypeError, match="cannot compare"):
        PerceptualHash("phash", 64, 1) - PerceptualHash("dhash", 64, 1)
    with pytest.raises(TypeError, match="cannot compare"):
        PerceptualHash("phash", 64, 1) - PerceptualHash("phash", 256, 1)


def test_foreign_types_are_not_implemented():
    h = PerceptualHash("phash", 64, 5)
    assert h.__sub__(5) is NotImplemented and h.__eq__("phash:64:5") is NotImplemented
    assert (h == None) is False and (h != None) is True  # noqa: E711 - the point of the test
    with pytest.raises(TypeError):
        h - 5


def test_hash_uses_every_bit_and_value_is_immutable():
    # values sharing their low 8 bits (imagehash's __hash__ keeps only 8 bits' worth)
    hashes = {hash(PerceptualHash("phash", 64, (k << 8) | 0xAB)) for k in range(1000)}
    assert len(hashes) == 1000
    h = PerceptualHash("phash", 64, 1)
    with pytest.raises(dataclasses.FrozenInstanceError):
        h.value = 2
    assert {h: 1}[PerceptualHash("phash", 64, 1)] == 1
    assert h.to_bits().sum() == 1 and h.to_bits()[-1]


@pytest.mark.parametrize(
    "args, error",
    [
        (("phash", 64, 2**64), ValueError),
        (("phash", 64, -1), ValueError),
        (("phash", 0, 0), ValueError),
        (("Phash", 64, 0), ValueError),
        (("phash", 64, 1.0), TypeError),
    ],
)
def test_bad_values_are_refused(args, error):
    with pytest.raises(error):
        PerceptualHash(*args)


@pytest.mark.parametrize("text", ["phash:64", "phash:64:xyz", "64:ff", "", "phash:64:1ffffffffffffffff"])
def test_bad_strings_are_refused(text):
    with pytest.raises(ValueError):
        PerceptualHash.from_string(text)


def test_bad_arguments_raise_value_or_type_errors():
    img = IMAGES["noise"]
    with pytest.raises(ValueError, match="hash_size"):
        H.average_hash(img, 1)
    with pytest.raises(ValueError, match="power of 2"):
        H.wavelet_hash(img, 6)
    with pytest.raises(ValueError, match="image_scale"):
        H.wavelet_hash(img, 8, image_scale=48)
    with pytest.raises(ValueError, match="binbits"):
        H.colour_hash(img, 0)
    with pytest.raises(TypeError, match="PIL.Image"):
        H.dct_hash(np.zeros((8, 8)))
    with pytest.raises(ValueError, match="window"):
        H.window_dct_hashes(img, windows=[(0.5, 0, 0.2, 1)])


def test_grey_copy_and_colour_image_have_distant_colour_codes():
    img = IMAGES["coffee"]
    grey = img.convert("L").convert("RGB")
    assert H.colour_hash(img) - H.colour_hash(grey) >= 8
    # while the structural hashes barely move
    assert H.dct_hash(img) - H.dct_hash(grey) <= 2


def test_tiny_images_do_not_crash():
    for size in [(1, 1), (2, 3), (5, 2)]:
        h = H.hash_thumbnail(Image.new("RGB", size, (10, 200, 30)))
        assert len(h["crop_hashes"]) == len(H.CROP_WINDOWS)
