"""The dermoscope field-of-view surround: found where it is, left alone where it is not."""

import numpy as np
import pytest
from PIL import Image

from curate.field_of_view import GROW, fill_surround, surround_mask

skdata = pytest.importorskip("skimage.data")
skdraw = pytest.importorskip("skimage.draw")


def test_surround_of_a_drawn_disc_is_its_outside_grown_by_the_rim():
    # reference: scikit-image's draw.disk gives the pixels of the round field of view
    side, radius = 150, 70
    grey = np.full((side, side), 6, np.uint8)
    rr, cc = skdraw.disk((side / 2, side / 2), radius, shape=grey.shape)
    grey[rr, cc] = 170
    inside = np.zeros(grey.shape, bool)
    inside[rr, cc] = True
    mask = surround_mask(grey)
    assert mask[~inside].all()  # every pixel outside the field is covered
    grow = max(1, round(GROW * side))
    core = np.zeros(grey.shape, bool)
    rr, cc = skdraw.disk((side / 2, side / 2), radius - grow - 1, shape=grey.shape)
    core[rr, cc] = True
    assert not mask[core].any()  # nothing deeper inside than the rim's growth


def test_round_fundus_photograph_has_its_black_surround_found():
    # reference: scikit-image's sample "retina" (a fundus photograph, round field of view on black)
    grey = np.asarray(Image.fromarray(skdata.retina()).convert("L").reduce(8))
    mask = surround_mask(grey)
    h, w = mask.shape
    assert mask[0, 0] and mask[0, -1] and mask[-1, 0] and mask[-1, -1]
    assert not mask[h // 4:3 * h // 4, w // 4:3 * w // 4].any()
    assert 1 - np.pi / 4 <= mask.mean() <= 0.5  # at least the corners outside an inscribed circle


@pytest.mark.parametrize("name", ["astronaut", "chelsea", "coffee", "rocket", "camera", "coins",
                                  "hubble_deep_field"])
def test_photographs_without_a_round_surround_are_unchanged(name):
    # reference: scikit-image's sample photographs; none has a dark round surround
    # (the deep-field photograph is mostly dark sky: too dark overall to be a surround)
    pixels = getattr(skdata, name)()
    image = Image.fromarray(pixels).convert("RGB")
    assert np.array_equal(np.asarray(fill_surround(image)), np.asarray(image))


def test_a_dark_lesion_at_one_edge_is_not_taken_for_a_surround():
    grey = np.full((120, 160), 190, np.uint8)
    grey[40:80, 0:30] = 20  # dark patch touching the left edge, no corner
    grey[0:25, 130:160] = 15  # dark patch in one corner only
    assert not surround_mask(grey).any()


def test_filling_separates_different_lesions_seen_through_a_dermoscope():
    # the purpose of the fill: without it the shared black surround makes every pair of
    # different dermoscopic pictures hash close together
    from curate.demo_images import Capture, draw_lesion_image, lesion_look, skin_lab
    from curate.hashing import dct_hash

    rng = np.random.default_rng(4)
    diagnoses = ["junctional_naevus", "seborrhoeic_keratosis", "solar_lentigo",
                 "superficial_spreading_melanoma", "blue_naevus", "dermatofibroma"]
    pictures = [draw_lesion_image(lesion_look(diagnoses[k % 6], rng),
                                  Capture("dermoscopic", 256, 256, skin_lab(20.0 + 4 * k, 15.0, 8.0), seed=k))
                for k in range(16)]

    def mean_distance(images):
        codes = [dct_hash(im) for im in images]
        return np.mean([codes[i] - codes[j] for i in range(len(codes)) for j in range(i)])

    assert all(surround_mask(np.asarray(p.convert("L"))).any() for p in pictures)
    assert mean_distance([fill_surround(p) for p in pictures]) > mean_distance(pictures) + 2


def test_fill_rejects_what_is_not_an_image():
    with pytest.raises(TypeError, match="PIL.Image.Image"):
        fill_surround(np.zeros((4, 4)))
    with pytest.raises(ValueError, match="2-D"):
        surround_mask(np.zeros((4, 4, 3)))


def test_stored_hashes_are_imagehash_of_the_filled_picture():
    # reference: imagehash's functions on the filled picture (with a surround) or on the picture
    imagehash = pytest.importorskip("imagehash")
    from curate.hash_files import hashes_of_pictures

    def code(h):
        return int(str(h), 16)

    retina = Image.fromarray(skdata.retina()).reduce(8)  # round field of view on black
    chelsea = Image.fromarray(skdata.chelsea())  # no surround
    got_retina, got_chelsea = hashes_of_pictures([retina, chelsea])
    filled = fill_surround(retina)
    for name, want in (("ahash", imagehash.average_hash), ("dhash", imagehash.dhash),
                       ("phash", imagehash.phash)):
        assert got_retina[name] == code(want(filled)), name
        assert got_chelsea[name] == code(want(chelsea)), name
    assert got_retina["phash"] != code(imagehash.phash(retina))
