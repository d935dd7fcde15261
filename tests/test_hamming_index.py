"""Exact Hamming radius search against brute force (SciPy's cdist as the reference)."""

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from curate.hamming_index import choose_substrings, hamming_distance, radius_pairs, radius_query


def _bits(codes):
    return np.unpackbits(np.asarray(codes, np.uint64).astype(">u8").view(np.uint8).reshape(-1, 8), axis=1).astype(bool)


def _brute(a, b):
    # reference: SciPy 1.x scipy.spatial.distance.cdist(..., 'hamming') is the share of differing
    # positions, so times 64 it is the Hamming distance in bits
    return np.rint(cdist(_bits(a), _bits(b), "hamming") * 64).astype(int)


def _random(n, seed):
    return np.random.default_rng(seed).integers(0, 2**64 - 1, size=n, dtype=np.uint64, endpoint=True)


def _clustered(n_centres, per_centre, max_flips, seed):
    """Codes planted around centres: each a centre with up to max_flips random bits flipped."""
    rng = np.random.default_rng(seed)
    centres = _random(n_centres, seed + 1)
    out = []
    for c in centres:
        for _ in range(per_centre):
            flips = rng.choice(64, size=rng.integers(0, max_flips + 1), replace=False)
            out.append(int(c) ^ sum(1 << int(f) for f in flips))
    return np.array(out, dtype=np.uint64)


def _check_self(codes, radius, **kw):
    i, j, d = radius_pairs(codes, radius, **kw)
    full = _brute(codes, codes)
    ei, ej = np.nonzero(np.triu(full <= radius, 1))
    assert np.array_equal(i, ei) and np.array_equal(j, ej)
    assert np.array_equal(d, full[ei, ej])
    assert (i < j).all()


DATASETS = {
    "random": lambda: _random(400, 0),
    "clustered": lambda: _clustered(40, 10, 10, 1),
    "duplicates": lambda: np.repeat(_clustered(30, 3, 4, 2), 3),
    "mixed": lambda: np.concatenate([_random(200, 3), _clustered(20, 8, 12, 4), np.zeros(5, np.uint64)]),
}


@pytest.mark.parametrize("name", sorted(DATASETS))
@pytest.mark.parametrize("radius", range(0, 13))
def test_radius_pairs_equals_brute_force(name, radius):
    _check_self(DATASETS[name](), radius)


@pytest.mark.parametrize("substrings", [3, 4, 5, 7, 13])
def test_any_substring_count_is_exact(substrings):
    codes = DATASETS["mixed"]()
    for radius in (1, 6, 12):
        _check_self(codes, radius, substrings=substrings, workers=2)


@pytest.mark.parametrize("radius", [0, 1, 5, 8, 12])
def test_radius_query_equals_brute_force(radius):
    queries = np.concatenate([_clustered(20, 5, 12, 7), _random(50, 8)])
    codes = np.concatenate([_clustered(20, 5, 12, 7)[::2], _random(80, 9), queries[:10]])
    i, j, d = radius_query(queries, codes, radius)
    full = _brute(queries, codes)
    ei, ej = np.nonzero(full <= radius)
    assert np.array_equal(i, ei) and np.array_equal(j, ej)
    assert np.array_equal(d, full[ei, ej])


def test_real_perceptual_hashes_of_drawn_images():
    """imagehash's phash of Pillow-drawn shapes (and shifted copies) as real codes."""
    imagehash = pytest.importorskip("imagehash")
    from PIL import Image, ImageDraw

    rng = np.random.default_rng(5)
    codes = []
    for k in range(60):
        img = Image.new("L", (64, 64), int(rng.integers(0, 255)))
        draw = ImageDraw.Draw(img)
        for _ in range(3):
            x, y = rng.integers(0, 48, 2)
            draw.ellipse([int(x), int(y), int(x) + int(rng.integers(8, 30)), int(y) + int(rng.integers(8, 30))],
                         fill=int(rng.integers(0, 255)))
        for shift in (0, 1, 3):
            moved = img.transform(img.size, Image.Transform.AFFINE, (1, 0, shift, 0, 1, 0))
            bits = imagehash.phash(moved).hash.ravel()  # imagehash 4.x: 8x8 bool array
            codes.append(int("".join("1" if b else "0" for b in bits), 2))
    codes = np.array(codes, dtype=np.uint64)
    for radius in (0, 4, 8, 12):
        _check_self(codes, radius)


def test_two_or_fewer_codes_and_empty_sets():
    assert all(len(x) == 0 for x in radius_pairs(np.zeros(0, np.uint64), 3))
    assert all(len(x) == 0 for x in radius_pairs(np.array([5], np.uint64), 3))
    assert all(len(x) == 0 for x in radius_query(np.zeros(0, np.uint64), np.array([1], np.uint64), 3))


def test_int64_bit_patterns_are_accepted():
    codes = np.array([-1, -1, 0], dtype=np.int64)
    i, j, d = radius_pairs(codes, 0)
    assert i.tolist() == [0] and j.tolist() == [1]


def test_bad_arguments_raise():
    with pytest.raises(ValueError, match="radius"):
        radius_pairs(np.zeros(3, np.uint64), 65)
    with pytest.raises(TypeError, match="radius"):
        radius_pairs(np.zeros(3, np.uint64), 2.5)
    with pytest.raises(TypeError, match="codes"):
        radius_pairs(np.zeros(3, float), 2)
    with pytest.raises(ValueError, match="1-D"):
        radius_pairs(np.zeros((3, 2), np.uint64), 2)
    with pytest.raises(ValueError, match="negative"):
        radius_pairs(np.array([-1, 2], np.int32), 2)
    with pytest.raises(ValueError, match="substrings"):
        radius_pairs(np.zeros(3, np.uint64), 2, substrings=1)
    with pytest.raises(ValueError, match="workers"):
        radius_pairs(np.zeros(3, np.uint64), 2, workers=0)


def test_hamming_distance_is_a_metric():
    a, b, c = _random(200, 11), _random(200, 12), _random(200, 13)
    assert (hamming_distance(a, a) == 0).all()
    assert np.array_equal(hamming_distance(a, b), hamming_distance(b, a))
    ab, bc, ac = (hamming_distance(x, y).astype(int) for x, y in ((a, b), (b, c), (a, c)))
    assert (ac <= ab + bc).all()
    assert np.array_equal(ab, np.diag(_brute(a, b)))  # SciPy cdist reference, as above


def test_choose_substrings_keeps_tables_small():
    for n in (10, 10_000, 10_000_000):
        for r in (1, 8, 12):
            assert 3 <= choose_substrings(n, r) <= 16
