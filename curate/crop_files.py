"""Run the crop check (:mod:`curate.crop_check`) on candidate pairs of image files.

The file layer of the second stage: it picks the ``possible`` pairs with crop or
orientation evidence (:func:`pairs_to_check`), decodes each file once, reduced and
upright (:func:`curate.hash_files.decode_for_hashing`; the pixels as they are, the
field-of-view surround included), and upgrades the pairs whose alignment is
confirmed to ``near``: ``crop = 1`` for a crop, ``crop = 0`` for the whole picture
turned or flipped. Used by :func:`curate.pair_store.find_pairs`,
:func:`curate.pair_store.find_near_duplicates` and the leakage check, so all three
judge crops the same way.
"""

from __future__ import annotations

import dataclasses
from typing import Mapping

import numpy as np
import pandas as pd

from curate.hashing import INVERSE_ORIENTATION
from curate.near_duplicates import MAX_CHECK_DISTANCE as MAX_CHECK_D_CROP
from curate.near_duplicates import MAX_CHECKS_PER_IMAGE, worth_checking

__all__ = ["pairs_to_check", "upgrade_crop_pairs", "check_chunk", "MAX_CHECK_D_CROP", "MAX_CHECKS_PER_IMAGE", "EVIDENCE_COLUMNS"]

# Which ``possible`` pairs are checked (MAX_CHECK_D_CROP, MAX_CHECKS_PER_IMAGE, imported above):
# see curate.near_duplicates.worth_checking.
#: Version of the answers of :func:`check_chunk` (the decode, :func:`curate.crop_check.check_crop`
#: and its constants, the second look with filled surrounds). Cached answers of another version
#: are not used (:mod:`curate.crop_check_store`): bump it whenever any of those changes.
CHECK_VERSION = 3
#: A confirmed alignment covering at least this share of the original's width is the whole
#: picture (turned or flipped), not a crop: the pair becomes ``near`` with ``crop = 0``.
WHOLE_PICTURE_SCALE = 0.97
#: Columns added to the pairs frame: evidence of the crop check (missing when not checked).
EVIDENCE_COLUMNS = ["crop_checked", "crop_ncc", "crop_scale", "crop_orientation", "crop_agreeing"]


def pairs_to_check(pairs: pd.DataFrame, *, max_d_crop: int = MAX_CHECK_D_CROP,
                   per_image: int | None = MAX_CHECKS_PER_IMAGE) -> np.ndarray:
    """Boolean mask of the pairs the crop check looks at: ``possible`` with ``d_crop`` or
    ``d_phash`` (DCT distance under the pair's orientation) at most ``max_d_crop``, and
    among the ``per_image`` closest such pairs (smaller of the two distances, then higher
    score) of either of its images (None: no limit).

    Examples
    --------
    >>> import pandas as pd
    >>> p = pd.DataFrame({"verdict": ["possible", "possible", "near", "possible"],
    ...                   "d_crop": [3, 20, 2, 20], "d_phash": [30, 30, 0, 6]})
    >>> pairs_to_check(p).tolist()
    [True, False, False, True]

    Image 0 has three close pairs; the farthest is no one's closest:

    >>> p = pd.DataFrame({"image_a": [0, 0, 0], "image_b": [1, 2, 3], "verdict": ["possible"] * 3,
    ...                   "d_crop": [2, 4, 6], "d_phash": [30, 30, 30], "score": [0.5, 0.5, 0.5]})
    >>> pairs_to_check(p, per_image=1).tolist()
    [True, True, True]
    >>> p["image_b"] = [1, 1, 1]
    >>> pairs_to_check(p, per_image=1).tolist()
    [True, False, False]
    """
    def column(name):
        return pairs[name] if name in pairs.columns else np.full(len(pairs), np.nan)

    if per_image is not None and not {"image_a", "image_b"} <= set(pairs.columns):
        per_image = None
    return worth_checking(column("image_a"), column("image_b"), pairs["verdict"], column("d_crop"),
                          column("d_phash"), column("score"), max_distance=max_d_crop, per_image=per_image)


def _decode(path: str):
    from curate.hash_files import HashError, decode_for_hashing

    try:
        with open(path, "rb") as f:
            return decode_for_hashing(f.read(), path=path)
    except (OSError, HashError):
        return None  # unreadable now: the pair stays as it was


def upgrade_crop_pairs(pairs: pd.DataFrame, paths: Mapping, *, max_d_crop: int = MAX_CHECK_D_CROP,
                       workers: int | None = None, progress: bool = True, digests: Mapping | None = None,
                       cache=None) -> pd.DataFrame:
    """Upgrade ``possible`` pairs to ``near`` where the crop check confirms a crop (``crop = 1``)
    or the whole picture turned or flipped (``crop = 0``).

    Parameters
    ----------
    pairs : DataFrame
        Output of :func:`curate.near_duplicates.score_pairs` (``image_a``,
        ``image_b``, ``verdict``, ``d_crop``, ``crop``, ``orientation``).
    paths : mapping
        ``image_id`` -> file path of every image in ``pairs``.
    max_d_crop : int
        Which pairs are checked (see :func:`pairs_to_check`).
    workers : int, optional
        Processes running the checks (default: every core).
    progress : bool
        Show a progress bar (tqdm) over the checked pairs.
    digests, cache : mapping and Workspace, optional
        ``image_id`` -> SHA-256 of the file, and a workspace whose table
        ``crop_checks`` keeps answers by content (:mod:`curate.crop_check_store`):
        pairs answered before (at :data:`CHECK_VERSION`) are read back, not checked
        again, and new answers are kept. Both are needed for the cache to be used.

    Returns
    -------
    DataFrame
        A copy of ``pairs`` with upgraded verdicts and the :data:`EVIDENCE_COLUMNS`
        (``crop_checked`` 0/1; NCC, scale, orientation and agreeing hash families of
        the best alignment for checked pairs). ``attrs["crop_checked"]`` holds the
        number of pairs checked (read back from the cache included) and
        ``attrs["crop_cached"]`` how many of them were read back. Pairs of the same two
        contents (images sharing a digest) are checked once.

    Examples
    --------
    >>> import tempfile, os
    >>> import numpy as np, pandas as pd
    >>> from PIL import Image
    >>> d = tempfile.mkdtemp()
    >>> rng = np.random.default_rng(0)
    >>> big = Image.fromarray((rng.random((12, 16)) * 255).astype(np.uint8)).resize((160, 120))
    >>> big.save(os.path.join(d, "a.png")); big.crop((10, 8, 150, 113)).save(os.path.join(d, "b.png"))
    >>> pairs = pd.DataFrame({"image_a": [0], "image_b": [1], "verdict": ["possible"], "d_crop": [6],
    ...                       "crop": [0], "orientation": [0]})
    >>> out = upgrade_crop_pairs(pairs, {0: os.path.join(d, "a.png"), 1: os.path.join(d, "b.png")},
    ...                          workers=1, progress=False)
    >>> out[["verdict", "crop", "crop_checked"]].values.tolist()
    [['near', 1, 1]]
    """
    from curate.chunked_work import resolve_workers, run_chunks

    out = pairs.copy()
    checked = np.zeros(len(out), bool)
    confirmed = np.zeros(len(out), bool)
    evidence = np.full((len(out), 4), np.nan)  # ncc, scale, orientation, agreeing
    todo = np.flatnonzero(pairs_to_check(out, max_d_crop=max_d_crop)) if len(out) else np.zeros(0, int)
    out.attrs["crop_checked"] = int(todo.size)
    out.attrs["crop_cached"] = 0
    if not todo.size:
        return _with_evidence(out, checked, confirmed, evidence)

    def take(k, m):
        if m is not None:  # None: a file is unreadable now, the pair stays as it was
            checked[k], confirmed[k] = True, m[0]
            evidence[k] = m[1:]

    a_ids, b_ids = out["image_a"].to_numpy()[todo], out["image_b"].to_numpy()[todo]
    keys, repeats = None, []
    if cache is not None and digests is not None:
        keys = [(digests.get(a), digests.get(b)) for a, b in zip(a_ids, b_ids)]
        known = _cached(cache, keys)
        for k, key in zip(todo, keys):
            take(k, known.get(key))
        fresh = np.array([key not in known for key in keys], bool)
        out.attrs["crop_cached"] = int((~fresh).sum())
        # copies of one content pair (images sharing a digest) are checked once
        first = {}
        for i, key in enumerate(keys):
            if fresh[i] and None not in key:
                j = first.setdefault(key, i)
                if j != i:
                    repeats.append((todo[i], todo[j]))
                    fresh[i] = False
        todo, a_ids, b_ids = todo[fresh], a_ids[fresh], b_ids[fresh]
        keys = [key for key, f in zip(keys, fresh) if f]
    # pairs sharing an image go to the same chunk where possible, so it is decoded once per chunk
    order = np.lexsort((b_ids, a_ids))
    items = [(int(todo[k]), str(paths.get(a_ids[k], "")), str(paths.get(b_ids[k], ""))) for k in order]
    key_of = dict(zip(todo.tolist(), keys)) if keys is not None else {}
    answers = []
    for results in run_chunks(check_chunk, items, workers=resolve_workers(workers), progress=progress,
                              desc="crop check", unit="pair"):
        for k, m in results:
            take(k, m)
            if m is not None and None not in key_of.get(k, (None,)):
                answers.append((*key_of[k], m))
    for k, source in repeats:
        if checked[source]:
            checked[k], confirmed[k], evidence[k] = True, confirmed[source], evidence[source]
    if answers:
        from curate.crop_check_store import store_checks

        store_checks(cache, answers, CHECK_VERSION)
    return _with_evidence(out, checked, confirmed, evidence)


def _with_evidence(out: pd.DataFrame, checked, confirmed, evidence) -> pd.DataFrame:
    """``out`` with the evidence columns and the upgraded verdicts, set once (a cell at a time
    through pandas costs more than the check itself)."""
    out["crop_checked"] = checked.astype(np.int64)
    for j, c in enumerate(EVIDENCE_COLUMNS[1:]):
        out[c] = evidence[:, j]
    if confirmed.any():
        scale = evidence[:, 1]
        out["verdict"] = np.where(confirmed, "near", out["verdict"].to_numpy(object))
        out["crop"] = np.where(confirmed, (scale < WHOLE_PICTURE_SCALE).astype(np.int64), out["crop"].to_numpy())
    return out


def _cached(cache, keys) -> dict:
    from curate.crop_check_store import cached_checks

    return cached_checks(cache, [k for k in keys if None not in k], CHECK_VERSION)


def check_chunk(items) -> list[tuple]:
    """Run the crop check on ``(row, path_a, path_b)`` items; what a worker process runs.

    Each file is decoded once per chunk. Returns ``(row, evidence)`` per item, where
    evidence is ``(confirmed, ncc, scale, orientation, agreeing)`` (orientation: the
    code turning the picture at ``path_b`` onto the one at ``path_a``), or None when a
    file cannot be read or decoded.
    """
    from curate.crop_check import check_crop
    from curate.field_of_view import fill_surround

    pictures: dict = {}
    out = []
    for k, path_a, path_b in items:
        for p in (path_a, path_b):
            if p not in pictures:
                pictures[p] = _decode(p) if p else None
        a, b = pictures[path_a], pictures[path_b]
        if a is None or b is None:
            out.append((k, None))
            continue
        m = check_crop(a, b)
        if m.confirmed and m.scale >= WHOLE_PICTURE_SCALE:
            # a whole dermoscopic picture lines up with another through their shared round
            # field of view; with the surrounds filled the skin and lesion must line up too
            # (at one size: surrounds found on two pixel grids differ along the rim, and a
            # 68-pixel copy of a 128-pixel picture then failed the second look)
            a, b = _at_one_size(a, b)
            filled_a, filled_b = fill_surround(a), fill_surround(b)
            if filled_a is not a or filled_b is not b:
                if not check_crop(filled_a, filled_b).confirmed:
                    m = dataclasses.replace(m, confirmed=False)
        # the check turns whichever picture is the crop; stored, the code turns b onto a
        # (as the pairs' orientation), so a tie between the two directions gives one answer
        turn = INVERSE_ORIENTATION[m.orientation] if m.crop_is_a else m.orientation
        out.append((k, (bool(m.confirmed), m.ncc, m.scale, int(turn), m.agreeing)))
    return out


def _at_one_size(a, b):
    """The two pictures with the larger one reduced to the smaller one's long side (a picture
    already that small is returned as it is)."""
    from PIL import Image

    side = min(max(a.size), max(b.size))

    def reduced(p):
        f = side / max(p.size)
        if f >= 1:
            return p
        return p.resize((max(1, round(p.width * f)), max(1, round(p.height * f))), Image.Resampling.LANCZOS)

    return reduced(a), reduced(b)
