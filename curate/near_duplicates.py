"""Near-duplicate pairs from perceptual hashes: candidates, distances, scores, verdicts, clusters.

Pure: takes a catalog and a hash frame (DataFrames) and returns DataFrames; it
never opens images, reads files or prints. The workspace layer is
:mod:`curate.pair_store`.

How a pair is judged (the rule is written out in ``docs/near_duplicates.md``):

1. **Candidates** are pairs of distinct image contents (SHA-256) that come within
   ``radius`` bits on at least one of: average, difference, DCT or wavelet hash
   (as stored); the DCT hash of any of the 8 rotations/flips of one image against
   the other's DCT hash; the DCT hash of a crop window of one image against the
   other's DCT hash, within ``radius +`` :data:`WINDOW_EXTRA_RADIUS` bits. Found
   exactly with :mod:`curate.hamming_index`. A candidate is kept when its DCT hash
   is within ``radius`` as stored or turned, or a crop window within the wider
   radius, or at least 3 of the 4 structural hashes are within ``radius``; one
   coarse hash alone is not enough.
2. **Alignment.** Each candidate is compared three ways: as stored (orientation
   0), under its best rotation/flip (the ``t`` minimising the DCT hash distance),
   and as a crop (best window). Under a rotation/flip the average and wavelet
   hashes are compared after permuting their 8x8 bit grid the same way (both are
   thresholded 8x8 grids of a square thumbnail, so a rotation of the image
   rotates the grid); the difference hash compares neighbouring pixels in one
   direction, so it is only compared unrotated. The colour hash (hue and
   saturation histogram) does not change under rotation.
3. **Verdict.** ``exact`` when the files have the same SHA-256. ``near`` when
   several hash families agree (thresholds in :data:`NEAR_THRESHOLDS`) and the
   colour hashes are within :data:`COLOUR_TOLERANCE`: as stored, the DCT and the
   difference hash agree and so does the average or the wavelet hash (3 or 4 of
   4 families); under a rotation/flip, the DCT (within
   :data:`TURNED_PHASH_THRESHOLD`), average and wavelet (within
   :data:`TURNED_WHASH_THRESHOLD`) hashes all agree (3 of 3) and add up to at
   most :data:`TURNED_TOTAL`. Everything else found is ``possible``: a person
   should look. A crop is never ``near`` on hashes alone: a pair whose best
   alignment is a crop window gets ``crop = 1`` and stays ``possible`` until
   the pixel-level crop check (:mod:`curate.crop_check`, run by the file layer
   on ``possible`` pairs) confirms it. On a 5,000-image demo a window match alone
   (within :data:`CROP_NEAR_DISTANCE` bits, colour and layout compatible) named 3
   pairs of different lesions near; the crop check rejected all 3 and confirmed
   all 63 true crops among the same pairs.
4. **Score** in [0, 1]: one minus the mean distance of the compared structural
   hashes over 32 bits (the expected distance of unrelated codes), for the best
   of the three alignments; 1 for exact copies.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from curate.hamming_index import hamming_distance, radius_pairs, radius_query
from curate.file_probe import copy_digests
from curate.hashing import INVERSE_ORIENTATION

__all__ = [
    "DEFAULT_RADIUS",
    "score_pairs",
    "duplicate_clusters",
    "conflict_of",
    "PAIR_COLUMNS",
    "worth_checking",
    "MAX_CHECK_DISTANCE",
    "MAX_CHECKS_PER_IMAGE",
]

#: Default search radius in bits (inclusive) for candidates on any hash.
DEFAULT_RADIUS = 8
#: ``possible`` pairs kept per image content: its best ones by score (see score_pairs). On a
#: 5,000-image demo, 5 kept 69 of the 71 crop and combination copies among 28,600 candidates.
MAX_POSSIBLE_PER_IMAGE = 5
#: Candidate pairs scored at a time. Scoring holds some 70 x 8 bytes per pair at once (the
#: crop windows against each orientation), so 14 million candidates of a 100,000-image demo
#: scored in one go took 21 GB; in chunks, a chunk's pairs that are not among the best of
#: either image within the chunk cannot be among the best overall and are dropped at once.
SCORE_CHUNK_PAIRS = 200_000
#: Structural hash families, as stored.
STRUCTURAL = ("ahash", "dhash", "phash", "whash")
#: families searched for candidates (see _candidate_hash_pairs for why two suffice)
CANDIDATE_FAMILIES = ("dhash", "phash")
#: Largest distance (bits, inclusive) at which a structural hash counts as agreeing (stored
#: orientation). Tuned on the demo scenario (see docs/near_duplicates.md).
NEAR_THRESHOLDS = {"ahash": 4, "dhash": 6, "phash": 6, "whash": 4}
#: Under a rotation/flip the difference hash cannot be compared, so the DCT hash must be tighter.
TURNED_PHASH_THRESHOLD = 4
#: The wavelet hash's bit grid follows a rotation less exactly than the average hash's
#: (measured: up to 8 bits on drawn test images), so it gets a wider allowance when rotated.
TURNED_WHASH_THRESHOLD = 8
#: Under a rotation/flip the DCT, average and wavelet distances must also add up to at most this.
TURNED_TOTAL = 10
#: Largest colour hash distance (bits) for colour-compatible images.
COLOUR_TOLERANCE = 8
#: Largest crop-window DCT hash distance (bits) for a close crop match (marks ``crop = 1``) ...
CROP_NEAR_DISTANCE = 3
#: ... with colour hashes at most this far apart (a crop keeps the colour mix) ...
CROP_COLOUR_TOLERANCE = 2
#: ... and the average or wavelet hash (as stored) within this many bits.
CROP_LAYOUT_DISTANCE = 8
#: Crop windows are searched this many bits wider than ``radius``: a crop's offset and size
#: fall between the windows, so its best window is further from it than a whole copy's hash.
#: On a 5,000-image demo the 4 crops (keeping 79-93% of each side) that were not candidates at
#: 8 bits were at 10. DCT hashes have 32 bits set of 64, so their distances are even: 2 more
#: bits is the next step.
WINDOW_EXTRA_RADIUS = 2
#: A ``possible`` pair is worth the pixel-level crop check (:mod:`curate.crop_check`) when its
#: best crop window, or whole picture under its best rotation/flip, is within this many bits
#: (DCT hash) ...
MAX_CHECK_DISTANCE = DEFAULT_RADIUS + WINDOW_EXTRA_RADIUS
#: ... and it is among the 3 closest such pairs (that distance, then score) of either of its
#: images. On a 5,000-image demo 3 rather than 2 per image found 3 more of the 62 planted
#: crops, for 3,700 more checks (11,900).
MAX_CHECKS_PER_IMAGE = 3
#: Expected Hamming distance of unrelated 64-bit codes, used to scale the score.
UNRELATED_BITS = 32.0

PAIR_COLUMNS = [
    "image_a", "image_b", "d_ahash", "d_dhash", "d_phash", "d_whash", "d_colorhash",
    "d_crop", "orientation", "crop", "score", "verdict", "conflict",
]


# --- bit-grid permutations for the 8 rotations/flips ------------------------------------


def _dihedral_permutations() -> np.ndarray:
    """``perm[t][p]``: which bit of the 8x8 grid lands at position ``p`` under transform ``t``.

    Same transform order as :data:`curate.hashing.DIHEDRAL_TRANSFORMS` (numpy.rot90 turns).
    """
    g = np.arange(64).reshape(8, 8)
    grids = [g, np.rot90(g, 1), np.rot90(g, 2), np.rot90(g, 3), g[:, ::-1], g[::-1, :], g.T,
             g[::-1, ::-1].T]
    return np.stack([x.ravel() for x in grids])


_PERMS = _dihedral_permutations()


def transform_codes(codes: np.ndarray, transforms: np.ndarray) -> np.ndarray:
    """Apply a rotation/flip (0..7) to the 8x8 bit grid of each 64-bit code.

    Bits are read row-major, first bit most significant (imagehash's order).

    Examples
    --------
    >>> import numpy as np
    >>> top_left = np.array([1 << 63], dtype=np.uint64)  # bit at row 0, column 0
    >>> int(transform_codes(top_left, np.array([4]))[0])  # mirrored left-right -> column 7
    72057594037927936
    """
    codes = np.asarray(codes, dtype=np.uint64)
    bits = np.unpackbits(codes.astype(">u8").view(np.uint8).reshape(-1, 8), axis=1)
    moved = np.take_along_axis(bits, _PERMS[np.asarray(transforms, dtype=np.int64)], axis=1)
    return np.packbits(moved, axis=1).view(">u8").ravel().astype(np.uint64)


# --- helpers -----------------------------------------------------------------------------


def _normalise(values: pd.Series) -> pd.Series:
    text = values.astype("string").str.strip().str.casefold().str.replace(r"\s+", " ", regex=True)
    return text.mask(text == "")


def conflict_of(label_a, label_b, patient_a, patient_b) -> pd.Series:
    """Which metadata two paired images disagree on: ``label``, ``patient``, ``label+patient`` or None.

    Labels compare after trimming, collapsing spaces and case-folding; a missing
    value never conflicts.

    Examples
    --------
    >>> conflict_of(["Melanoma", "naevus"], [" melanoma", "BCC"], ["p1", "p1"], ["p2", None]).tolist()
    ['patient', 'label']
    """
    la, lb = _normalise(pd.Series(label_a)), _normalise(pd.Series(label_b))
    pa, pb = _normalise(pd.Series(patient_a)), _normalise(pd.Series(patient_b))
    label = (la != lb).fillna(False).to_numpy(bool) & la.notna().to_numpy() & lb.notna().to_numpy()
    patient = (pa != pb).fillna(False).to_numpy(bool) & pa.notna().to_numpy() & pb.notna().to_numpy()
    out = np.where(label & patient, "label+patient", np.where(label, "label", np.where(patient, "patient", None)))
    return pd.Series(out, dtype=object)


def pair_conflicts(catalog: pd.DataFrame, image_a, image_b) -> np.ndarray:
    """:func:`conflict_of` for pairs of catalog images by ``image_id`` (its ``label`` and
    ``patient_id`` columns; a missing column conflicts with nothing)."""
    meta = catalog.set_index("image_id")

    def column(name, ids):
        return meta[name].reindex(ids).to_numpy() if name in meta.columns else [None] * len(ids)

    return conflict_of(column("label", image_a), column("label", image_b),
                       column("patient_id", image_a), column("patient_id", image_b)).to_numpy()


def _check_frames(catalog: pd.DataFrame, hashes: pd.DataFrame) -> None:
    if not isinstance(catalog, pd.DataFrame) or not isinstance(hashes, pd.DataFrame):
        raise TypeError("catalog and hashes must be pandas DataFrames")
    missing = [c for c in ("image_id", "sha256") if c not in catalog.columns]
    if missing:
        raise ValueError(f"catalog lacks required column(s): {', '.join(missing)}")
    need = ["sha256", *STRUCTURAL, "colorhash"] + [f"phash_t{t}" for t in range(8)]
    missing = [c for c in need if c not in hashes.columns]
    if missing:
        raise ValueError(f"hash frame lacks required column(s): {', '.join(missing)}")
    if catalog["image_id"].duplicated().any():
        dup = catalog.loc[catalog["image_id"].duplicated(), "image_id"].iloc[0]
        raise ValueError(f"catalog has repeated image_id {dup}")


def _codes(frame: pd.DataFrame, column: str) -> np.ndarray:
    col = frame[column]
    if col.dtype == np.uint64:
        return col.to_numpy()
    return col.to_numpy(dtype=np.int64).view(np.uint64) if col.dtype == np.int64 else col.to_numpy(np.uint64)


def _crop_table(hashes: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """All crop-window codes stacked, with the hash row each belongs to."""
    if "crop_hashes" not in hashes.columns:
        return np.zeros(0, np.uint64), np.zeros(0, np.int64)
    arrays = [np.asarray(a if a is not None else [], dtype=np.uint64).ravel()
              for a in hashes["crop_hashes"].tolist()]
    counts = np.array([a.size for a in arrays], dtype=np.int64)
    codes = np.concatenate(arrays) if arrays else np.zeros(0, np.uint64)
    return codes, np.repeat(np.arange(len(arrays), dtype=np.int64), counts)


def _pair_keys(a: np.ndarray, b: np.ndarray, n: int) -> np.ndarray:
    """Sorted unique keys ``p * n + q`` (p < q) of the pairs (a[i], b[i]), a row with itself left out."""
    keep = a != b
    return np.unique(np.minimum(a[keep], b[keep]) * n + np.maximum(a[keep], b[keep]))


def _bar(total: int, desc: str, progress: bool, unit: str = "step"):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit=unit, disable=not progress, leave=False)


def _candidate_hash_pairs(h: pd.DataFrame, radius: int, workers,
                          progress: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Pairs (p < q) of hash rows within ``radius`` on any family / orientation / crop window,
    and the pairs found only by a crop window up to :data:`WINDOW_EXTRA_RADIUS` bits further."""
    n = len(h)
    crops, crop_owner = _crop_table(h)
    bar = _bar(len(CANDIDATE_FAMILIES) + 1 + (8 if crops.size else 0), "radius search", progress)
    # Only the difference and DCT hashes generate candidates. This loses no pair that
    # scoring keeps: a kept pair has its DCT hash within the radius under some alignment
    # (found by the DCT, rotation and crop queries below), or 3 of the 4 structural families
    # within the radius, and 3 of 4 always include the difference or the DCT hash. The
    # coarse average and wavelet hashes put most look-alike skin photographs within a few
    # bits of each other, so searching on them grows the candidate set roughly with n**2.
    found = []  # keys of the pairs within the radius
    for family in CANDIDATE_FAMILIES:
        i, j, _ = radius_pairs(_codes(h, family), radius, workers=workers)
        found.append(_pair_keys(i, j, n))
        bar.update()
    phash = _codes(h, "phash")
    turned = [_codes(h, f"phash_t{t}") for t in range(1, 8)]
    i, j, _ = radius_query(np.concatenate(turned), phash, radius, workers=workers)
    found.append(_pair_keys(i % n, j, n))
    bar.update()
    wide = []
    if crops.size:
        # a crop window of one image against any rotation/flip of the other (crop + rotation).
        # The index is built on the windows (69 per image) and the whole-image codes look them
        # up (2.7 times faster than the other way round on a 5,000-image demo), one rotation/flip
        # at a time so that the raw hits of a 100,000-image collection stay small
        for codes in [phash, *turned]:
            i, j, d = radius_query(codes, crops, radius + WINDOW_EXTRA_RADIUS, workers=workers)
            near = d <= radius
            found.append(_pair_keys(crop_owner[j[near]], i[near], n))
            wide.append(_pair_keys(crop_owner[j[~near]], i[~near], n))
            bar.update()
    bar.close()
    key = np.unique(np.concatenate(found))
    wide = np.setdiff1d(np.unique(np.concatenate(wide)), key, assume_unique=True) if wide else key[:0]
    return tuple(np.stack([k // n, k % n], axis=1) for k in (key, wide))


def _crop_window_table(h: pd.DataFrame) -> np.ndarray | None:
    """The crop-window codes of every hash row, ``(n, windows)`` uint64, or None when the
    rows have none (or differing numbers of windows)."""
    if "crop_hashes" not in h.columns:
        return None
    crops = h["crop_hashes"].tolist()
    widths = {np.asarray(c).size for c in crops if c is not None}
    if len(widths) != 1 or 0 in widths:
        return None
    return np.stack([np.asarray(c, dtype=np.uint64) for c in crops])


def _best_crop_distance(h: pd.DataFrame, p: np.ndarray, q: np.ndarray, table: np.ndarray | None) -> np.ndarray:
    """Smallest DCT distance between a crop window of one image and the other's whole image.

    The other image is taken in each of its 8 rotations/flips, so a crop that was
    also turned is matched. ``table``: :func:`_crop_window_table` of ``h``.
    """
    best = np.full(p.shape[0], 64, dtype=np.int64)
    if table is None or p.size == 0:
        return best
    phash = _codes(h, "phash")
    w = table.shape[1]
    for t in range(8):
        turned = phash if t == 0 else _codes(h, f"phash_t{t}")
        for own, other in ((p, q), (q, p)):
            d = hamming_distance(table[own].ravel(), np.repeat(turned[other], w)).reshape(-1, w)
            best = np.minimum(best, d.min(axis=1))
    return best


def _score_hash_pairs(h: pd.DataFrame, pq: np.ndarray, radius: int, crop_table: np.ndarray | None) -> pd.DataFrame:
    """Distances, best orientation, crop flag, score and verdict for hash-row pairs
    (``crop_table``: :func:`_crop_window_table` of ``h``)."""
    p, q = pq[:, 0], pq[:, 1]
    code = {f: _codes(h, f) for f in (*STRUCTURAL, "colorhash")}
    d = {f: hamming_distance(code[f][p], code[f][q]).astype(np.int64) for f in code}
    # best rotation/flip: DCT hash of transform t of image p against q's DCT hash
    turned = np.stack([_codes(h, f"phash_t{t}")[p] for t in range(8)], axis=1)
    d_turn = np.stack([hamming_distance(turned[:, t], code["phash"][q]) for t in range(8)], axis=1)
    best_t = np.argmin(d_turn, axis=1)  # ties -> lowest t, so identity wins a tie
    d_phash_t = d_turn[np.arange(len(p)), best_t].astype(np.int64)
    d_ahash_t = hamming_distance(transform_codes(code["ahash"][p], best_t), code["ahash"][q]).astype(np.int64)
    d_whash_t = hamming_distance(transform_codes(code["whash"][p], best_t), code["whash"][q]).astype(np.int64)
    d_crop = _best_crop_distance(h, p, q, crop_table)
    colour_ok = d["colorhash"] <= COLOUR_TOLERANCE

    # alignment 0: as stored, 4 structural hashes
    mean0 = np.mean([d[f] for f in STRUCTURAL], axis=0)
    # alignment t: best rotation/flip, 3 comparable hashes
    mean_t = (d_ahash_t + d_phash_t + d_whash_t) / 3.0
    # crop: the window match, plus the closest other family as a second opinion
    second = np.minimum.reduce([d["ahash"], d["whash"], d_phash_t])
    mean_c = (d_crop + second) / 2.0

    # stored: the two gradient-sensitive hashes (DCT, difference) agree and at least one of the
    # two brightness-layout hashes (average, wavelet) too: 3 or 4 of 4 families
    th = NEAR_THRESHOLDS
    near_stored = ((d["phash"] <= th["phash"]) & (d["dhash"] <= th["dhash"])
                   & ((d["ahash"] <= th["ahash"]) | (d["whash"] <= th["whash"])) & colour_ok)
    rotated = best_t != 0
    # rotated/flipped: all 3 comparable families agree, the DCT hash more tightly
    near_turned = (rotated & (d_phash_t <= TURNED_PHASH_THRESHOLD) & (d_ahash_t <= th["ahash"])
                   & (d_whash_t <= TURNED_WHASH_THRESHOLD)
                   & (d_phash_t + d_ahash_t + d_whash_t <= TURNED_TOTAL) & colour_ok)
    # crop: a tight window match, compatible colour, and the coarse brightness layout (average
    # or wavelet hash as stored) still roughly the same; flagged, confirmed later by the crop check
    near_crop = ((d_crop <= CROP_NEAR_DISTANCE) & (d["colorhash"] <= CROP_COLOUR_TOLERANCE)
                 & ((d["ahash"] <= CROP_LAYOUT_DISTANCE) | (d["whash"] <= CROP_LAYOUT_DISTANCE)))
    score = np.clip(1.0 - np.minimum.reduce([mean0, np.where(rotated, mean_t, mean0), mean_c])
                    / UNRELATED_BITS, 0.0, 1.0)
    use_turn = rotated & ~near_stored & (mean_t < mean0)
    use_crop = ~near_stored & ~near_turned & (near_crop | ((mean_c < mean0) & (mean_c < np.where(rotated, mean_t, np.inf))))
    orientation = np.where(use_turn, best_t, 0)
    out = pd.DataFrame({
        "p": p, "q": q,
        "d_ahash": np.where(use_turn, d_ahash_t, d["ahash"]),
        "d_dhash": pd.array(np.where(use_turn, -1, d["dhash"]), dtype="Int64"),
        "d_phash": np.where(use_turn, d_phash_t, d["phash"]),
        "d_whash": np.where(use_turn, d_whash_t, d["whash"]),
        "d_colorhash": d["colorhash"],
        "d_crop": d_crop,
        "orientation": orientation.astype(np.int64),
        "crop": use_crop.astype(np.int64),
        "score": score,
        "verdict": np.where(near_stored | near_turned, "near", "possible"),
    })
    # a candidate found on one coarse hash alone is dropped: keep it when the DCT hash is within
    # the radius under some alignment (stored, rotated/flipped, crop window) or 3 families are
    within = sum((d[f] <= radius).astype(int) for f in STRUCTURAL)
    out = out[(d_phash_t <= radius) | (d_crop <= radius + WINDOW_EXTRA_RADIUS) | (within >= 3)]
    out.loc[out["d_dhash"] == -1, "d_dhash"] = pd.NA  # not comparable under a rotation/flip
    return out


def among_best_of_either(end_a, end_b, keys, ascending, limit: int) -> np.ndarray:
    """Boolean mask of the pairs ``(end_a[i], end_b[i])`` that are among the ``limit`` first
    pairs of either end, ordering each end's pairs by ``keys`` (one array per key, with its
    ``ascending`` flag) and then by position.

    Examples
    --------
    Pair 0 (ends 0 and 1, key 9) is neither end's best: end 0 has pair 2 (key 1), end 1
    has pair 3 (key 0). Pair 1 is end 2's only pair.

    >>> among_best_of_either([0, 0, 0, 1], [1, 2, 3, 3], [[9, 5, 1, 0]], [True], 1).tolist()
    [False, True, True, True]
    """
    n = len(end_a)
    columns = {f"key{k}": np.tile(np.asarray(v), 2) for k, v in enumerate(keys)}
    ends = pd.DataFrame({"pair": np.tile(np.arange(n), 2),
                         "end": np.concatenate([np.asarray(end_a), np.asarray(end_b)]), **columns})
    ends = ends.sort_values(["end", *columns, "pair"], ascending=[True, *ascending, True], kind="stable")
    rank = ends.groupby("end", sort=False).cumcount().to_numpy()
    keep = np.zeros(n, bool)
    keep[ends["pair"].to_numpy()[rank < limit]] = True
    return keep


def worth_checking(end_a, end_b, verdict, d_crop, d_phash, score, *, max_distance: int = MAX_CHECK_DISTANCE,
                   per_image: int | None = MAX_CHECKS_PER_IMAGE) -> np.ndarray:
    """Boolean mask of the pairs worth the pixel-level crop check: ``possible``, with ``d_crop``
    or ``d_phash`` (missing counts as 64) at most ``max_distance``, and among the ``per_image``
    closest such pairs (smaller of the two distances, then higher score) of either end (None:
    no limit).

    Examples
    --------
    One per end: end 0's best is its first pair, but each of ends 1, 2 and 3 has its own
    best among the others; the ``near`` pair is never checked:

    >>> worth_checking([0, 0, 0, 1], [1, 2, 3, 2], ["possible"] * 3 + ["near"], [2, 4, 6, 0],
    ...                [30, 30, 30, 0], [0.5] * 4, per_image=1).tolist()
    [True, True, True, False]

    No limit per end, but at most ``max_distance`` (10) bits:

    >>> worth_checking([0, 0, 0], [1, 1, 1], ["possible"] * 3, [2, 4, 11], [30, 30, 30], [0.5] * 3,
    ...                per_image=None).tolist()
    [True, True, False]
    """
    def bits(values):
        return pd.to_numeric(pd.Series(values), errors="coerce").fillna(64).to_numpy(float)

    closest = np.minimum(bits(d_crop), bits(d_phash))
    # compared by pandas: an Arrow-backed string column is not copied into Python objects
    todo = pd.Series(verdict).eq("possible").to_numpy(dtype=bool) & (closest <= max_distance)
    if per_image is None or not todo.any():
        return todo
    rows = np.flatnonzero(todo)
    keep = among_best_of_either(np.asarray(end_a)[rows], np.asarray(end_b)[rows],
                                [closest[rows], -bits(score)[rows]], [True, True], per_image)
    todo[rows[~keep]] = False
    return todo


def _best_possible(pairs: pd.DataFrame, limit: int | None, checks: int) -> pd.DataFrame:
    """Keep every ``near`` pair, and a ``possible`` pair when it is among the ``limit`` best
    (score, then smallest crop-window distance) of either of its two contents, or among the
    ``checks`` pairs of either worth the crop check (:func:`worth_checking`)."""
    if limit is None:
        return pairs
    possible = np.flatnonzero(pairs["verdict"].to_numpy() == "possible")
    if possible.size == 0:
        return pairs
    sub = pairs.iloc[possible]
    keep = np.ones(len(pairs), bool)
    keep[possible] = among_best_of_either(sub["p"].to_numpy(), sub["q"].to_numpy(),
                                          [sub["score"].to_numpy(), sub["d_crop"].to_numpy()],
                                          [False, True], limit)
    if checks:
        keep[possible] |= worth_checking(sub["p"], sub["q"], sub["verdict"], sub["d_crop"], sub["d_phash"],
                                         sub["score"], per_image=checks)
    return pairs[keep]


def _score_in_chunks(h: pd.DataFrame, pq: np.ndarray, wide: np.ndarray, radius: int, limit: int | None,
                     checks: int, progress: bool = False) -> pd.DataFrame:
    """:func:`_best_possible` of :func:`_score_hash_pairs` over all of ``pq``, scored
    :data:`SCORE_CHUNK_PAIRS` at a time, and over the ``wide`` pairs (found only by a crop
    window beyond ``radius``) that may be worth the crop check.

    The same pairs come out as from one pass: within a chunk a pair ranks no lower than
    among all pairs (same order, fewer rivals), so what a chunk drops the whole would drop
    too. A wide pair is at least ``radius + 1`` bits from its closest alignment, so it can be
    among the ``checks`` pairs of a content worth the crop check (:func:`worth_checking`)
    only when that content has fewer than ``checks`` ``possible`` pairs within ``radius``;
    the others are not scored (a 100,000-image demo has several times more wide pairs than
    pairs within the radius). With ``limit`` None every wide pair is scored.
    """
    table = _crop_window_table(h)
    parts = []
    within = np.zeros(len(h), np.int64)  # per content: possible pairs within the radius
    bar = _bar(0, "scoring", progress, unit="pair")

    def score(pairs):
        bar.total += len(pairs)
        bar.refresh()
        for start in range(0, len(pairs), SCORE_CHUNK_PAIRS):
            chunk = _score_hash_pairs(h, pairs[start:start + SCORE_CHUNK_PAIRS], radius, table)
            close = chunk[(chunk["verdict"].to_numpy() == "possible")
                          & (np.minimum(chunk["d_crop"], chunk["d_phash"]).to_numpy() <= radius)]
            np.add.at(within, close["p"].to_numpy(), 1)
            np.add.at(within, close["q"].to_numpy(), 1)
            parts.append(_best_possible(chunk, limit, checks))
            bar.update(len(chunk))

    score(pq)
    if len(wide) and (limit is None or checks):
        few = within < checks
        score(wide if limit is None else wide[few[wide[:, 0]] | few[wide[:, 1]]])
    bar.close()
    if len(parts) == 1:
        return parts[0]
    return _best_possible(pd.concat(parts, ignore_index=True), limit, checks)


def _expand_to_images(hash_pairs: pd.DataFrame, members: pd.DataFrame) -> pd.DataFrame:
    """Hash-row pairs -> image pairs (every image holding either content)."""
    m = members[["row", "image_id"]]
    x = hash_pairs.merge(m.rename(columns={"row": "p", "image_id": "ia"}), on="p")
    x = x.merge(m.rename(columns={"row": "q", "image_id": "ib"}), on="q")
    return x.drop(columns=["p", "q"])


def _exact_pairs(catalog: pd.DataFrame) -> pd.DataFrame:
    c = catalog.loc[copy_digests(catalog["sha256"]).notna(), ["image_id", "sha256"]]
    codes = pd.factorize(c["sha256"])[0].astype(np.uint64)
    i, j, _ = radius_pairs(codes, 0)
    ids = c["image_id"].to_numpy()
    return pd.DataFrame({"ia": ids[i], "ib": ids[j]})


def content_hashes(hashes: pd.DataFrame) -> pd.DataFrame:
    """The hash frame with one row per ``sha256``, sorted by it: the order
    :func:`score_content_pairs` works in, so its answer depends on the contents alone."""
    return hashes.drop_duplicates("sha256").sort_values("sha256", kind="stable").reset_index(drop=True)


def score_content_pairs(hashes: pd.DataFrame, *, radius: int = DEFAULT_RADIUS,
                        max_possible: int | None = MAX_POSSIBLE_PER_IMAGE,
                        max_checks: int = MAX_CHECKS_PER_IMAGE, workers: int | None = None,
                        progress: bool = False) -> pd.DataFrame:
    """The first half of :func:`score_pairs`: scored candidate pairs of distinct contents.

    Same parameters as :func:`score_pairs` (``hashes`` alone: images do not matter
    here); ``progress`` shows bars (tqdm) over the radius search and the scoring.
    Returns one row per pair of contents, ``sha_p < sha_q`` (SHA-256), with the
    distance, ``orientation`` (the transform turning content p onto content q),
    ``crop``, ``score`` and ``verdict`` columns; caps applied per content. The
    answer depends on the set of contents and their codes only, not on their order,
    so it can be kept by content (:mod:`curate.content_pair_store`).
    """
    h = content_hashes(hashes)
    pq, wide = (_candidate_hash_pairs(h, radius, workers, progress) if len(h) >= 2
                else (np.zeros((0, 2), np.int64),) * 2)
    if len(pq) or len(wide):
        scored = _score_in_chunks(h, pq, wide, radius, max_possible, max_checks, progress)
    else:
        scored = _score_hash_pairs(h, pq, radius, None)
    sha = h["sha256"].to_numpy(object)
    return scored.assign(sha_p=sha[scored["p"].to_numpy()], sha_q=sha[scored["q"].to_numpy()]).drop(
        columns=["p", "q"]).reset_index(drop=True)


def score_pairs(catalog: pd.DataFrame, hashes: pd.DataFrame, *, radius: int = DEFAULT_RADIUS,
                max_possible: int | None = MAX_POSSIBLE_PER_IMAGE, max_checks: int = MAX_CHECKS_PER_IMAGE,
                workers: int | None = None, content_pairs: pd.DataFrame | None = None,
                progress: bool = False) -> pd.DataFrame:
    """Exact and near-duplicate pairs of catalog images, scored and judged.

    Parameters
    ----------
    catalog : DataFrame
        Columns ``image_id`` and ``sha256``; optional ``label`` and ``patient_id``
        (for conflicts) and any others (ignored).
    hashes : DataFrame
        The hash frame (one row per ``sha256``: uint64 ``ahash dhash phash whash
        colorhash phash_t0 .. phash_t7``, object ``crop_hashes``).
    radius : int
        Candidate radius in bits (inclusive) on any hash family or orientation
        (crop windows: :data:`WINDOW_EXTRA_RADIUS` more); default
        :data:`DEFAULT_RADIUS`.
    max_possible : int or None
        Keep a ``possible`` pair only when it is among the ``max_possible`` best
        (by score) of one of its two images' contents; default
        :data:`MAX_POSSIBLE_PER_IMAGE`. ``exact`` and ``near`` pairs are always
        kept. None keeps every candidate (their number grows with the square of
        the collection among look-alike photographs).
    max_checks : int
        With ``max_possible``, also keep a ``possible`` pair when it is among the
        ``max_checks`` pairs of one of its contents worth the crop check
        (:func:`worth_checking`), so the crop check chooses from the same pairs as
        without the cap; default :data:`MAX_CHECKS_PER_IMAGE`, 0 for none.
    workers : int, optional
        Threads for the radius search.
    content_pairs : DataFrame, optional
        :func:`score_content_pairs` of these hashes with these settings, computed
        before (kept by content); computed here when None.
    progress : bool
        Progress bars (tqdm) over the radius search and the scoring.

    Returns
    -------
    DataFrame
        One row per pair with ``image_a < image_b``: :data:`PAIR_COLUMNS`
        (distances in bits; ``d_dhash`` is missing under a rotation/flip,
        ``orientation`` 0..7 in :data:`curate.hashing.DIHEDRAL_TRANSFORMS` order,
        ``crop`` 0/1, ``score`` 0..1, ``verdict`` exact/near/possible,
        ``conflict`` label/patient/label+patient or None), sorted by score
        descending, then ids.

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> cols = ["ahash", "dhash", "phash", "whash", "colorhash"] + [f"phash_t{t}" for t in range(8)]
    >>> rng = np.random.default_rng(0)
    >>> base = rng.integers(0, 2**63, size=(2, len(cols))).astype(np.uint64)
    >>> near = base[0] ^ np.uint64(0b101)  # 2 bits off on every hash
    >>> hashes = pd.DataFrame(np.vstack([base, near]), columns=cols)
    >>> hashes["phash_t0"] = hashes["phash"]
    >>> hashes.insert(0, "sha256", ["s1", "s2", "s3"])
    >>> catalog = pd.DataFrame({"image_id": [1, 2, 3, 4], "sha256": ["s1", "s2", "s3", "s1"],
    ...                         "label": ["naevus", "bcc", "Naevus", "bcc"]})
    >>> score_pairs(catalog, hashes)[["image_a", "image_b", "verdict", "conflict"]]
       image_a  image_b verdict conflict
    0        1        4   exact    label
    1        1        3    near     None
    2        3        4    near    label
    """
    _check_frames(catalog, hashes)
    h = content_hashes(hashes)
    members = catalog[["image_id", "sha256"]].merge(
        h[["sha256"]].reset_index().rename(columns={"index": "row"}), on="sha256"
    )
    parts = []
    exact = _exact_pairs(catalog)
    if len(exact):
        exact = exact.assign(d_ahash=0, d_dhash=0, d_phash=0, d_whash=0, d_colorhash=0, d_crop=0,
                             orientation=0, crop=0, score=1.0, verdict="exact")
        exact["d_dhash"] = exact["d_dhash"].astype("Int64")
        parts.append(exact)
    if len(h) >= 2:
        if content_pairs is None:
            content_pairs = score_content_pairs(h, radius=radius, max_possible=max_possible,
                                                max_checks=max_checks, workers=workers, progress=progress)
        if len(content_pairs):
            row = pd.Series(np.arange(len(h)), index=h["sha256"].to_numpy())
            scored = content_pairs.assign(p=row.reindex(content_pairs["sha_p"]).to_numpy(),
                                          q=row.reindex(content_pairs["sha_q"]).to_numpy())
            scored = scored[scored["p"].notna() & scored["q"].notna()].drop(columns=["sha_p", "sha_q"])
            parts.append(_expand_to_images(scored.astype({"p": np.int64, "q": np.int64}), members))
    if not parts:
        return _empty_pairs()
    x = pd.concat(parts, ignore_index=True)
    x["image_a"] = np.minimum(x["ia"], x["ib"])
    x["image_b"] = np.maximum(x["ia"], x["ib"])
    # scoring found transform t turning image ia onto ib; the stored code turns b onto a, so
    # where ia is image a the inverse transform is stored (quarter turns differ from theirs)
    x["orientation"] = np.where(x["ia"] < x["ib"], np.asarray(INVERSE_ORIENTATION)[x["orientation"]],
                                x["orientation"])
    x["conflict"] = pd.Series(pair_conflicts(catalog, x["image_a"], x["image_b"]), index=x.index, dtype=object)
    x = x[PAIR_COLUMNS].sort_values(["score", "image_a", "image_b"], ascending=[False, True, True],
                                    kind="stable")
    return x.reset_index(drop=True)


def _empty_pairs() -> pd.DataFrame:
    out = pd.DataFrame({c: pd.Series(dtype=np.int64) for c in PAIR_COLUMNS})
    out["d_dhash"] = out["d_dhash"].astype("Int64")
    out["score"] = out["score"].astype(float)
    out["verdict"] = out["verdict"].astype(object)
    out["conflict"] = out["conflict"].astype(object)
    return out


def duplicate_clusters(pairs: pd.DataFrame, image_ids=None, *,
                       verdicts=("exact", "near")) -> pd.Series:
    """Clusters of copies: connected components over pairs with the given verdicts.

    Parameters
    ----------
    pairs : DataFrame
        Columns ``image_a``, ``image_b``, ``verdict``.
    image_ids : array-like, optional
        Every image to label (images without pairs get a cluster of their own);
        default: the images in ``pairs``.
    verdicts : tuple of str
        Which verdicts join images.

    Returns
    -------
    Series
        Cluster number (0, 1, ... in order of each cluster's smallest image id),
        indexed by ``image_id``.

    Examples
    --------
    >>> import pandas as pd
    >>> pairs = pd.DataFrame({"image_a": [1, 2, 5], "image_b": [2, 3, 6],
    ...                       "verdict": ["near", "exact", "possible"]})
    >>> duplicate_clusters(pairs, [1, 2, 3, 4, 5, 6]).tolist()
    [0, 0, 0, 1, 2, 3]
    """
    missing = [c for c in ("image_a", "image_b", "verdict") if c not in pairs.columns]
    if missing:
        raise ValueError(f"pairs lacks required column(s): {', '.join(missing)}")
    if image_ids is None:
        image_ids = np.union1d(pairs["image_a"].to_numpy(), pairs["image_b"].to_numpy())
    ids = np.unique(np.asarray(image_ids))
    use = pairs[pairs["verdict"].isin(list(verdicts))]
    a = np.searchsorted(ids, use["image_a"].to_numpy())
    b = np.searchsorted(ids, use["image_b"].to_numpy())
    ok = (a < ids.size) & (b < ids.size)
    ok[ok] &= (ids[a[ok]] == use["image_a"].to_numpy()[ok]) & (ids[b[ok]] == use["image_b"].to_numpy()[ok])
    if not ok.all():
        bad = use.loc[~ok].iloc[0]
        raise ValueError(f"pair ({bad['image_a']}, {bad['image_b']}) names an image not in image_ids")
    graph = coo_matrix((np.ones(a.size), (a, b)), shape=(ids.size, ids.size))
    _, labels = connected_components(graph, directed=False)
    # renumber by first appearance so numbers follow the smallest image id
    _, first = np.unique(labels, return_index=True)
    rank = np.empty(first.size, np.int64)
    rank[np.argsort(first)] = np.arange(first.size)
    return pd.Series(rank[labels], index=pd.Index(ids, name="image_id"), name="cluster")
