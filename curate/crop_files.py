"""Run the crop check (:mod:`curate.crop_check`) on candidate pairs of image files.

The file layer of the second stage: it picks the ``possible`` pairs with crop
evidence (:func:`pairs_to_check`), decodes each file once, reduced and upright
(:func:`curate.hash_files.picture_for_hashing`, as the hashes saw it), and upgrades the pairs whose crop
is confirmed to ``near`` with ``crop = 1``. Used by :func:`curate.pair_store.find_pairs`,
:func:`curate.pair_store.find_near_duplicates` and the leakage check, so all three
judge crops the same way.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np
import pandas as pd

__all__ = ["pairs_to_check", "upgrade_crop_pairs", "MAX_CHECK_D_CROP", "EVIDENCE_COLUMNS"]

#: Only ``possible`` pairs whose best crop window is within this many bits (DCT hash) are checked.
MAX_CHECK_D_CROP = 8
#: Columns added to the pairs frame: evidence of the crop check (missing when not checked).
EVIDENCE_COLUMNS = ["crop_checked", "crop_ncc", "crop_scale", "crop_orientation", "crop_agreeing"]


def pairs_to_check(pairs: pd.DataFrame, *, max_d_crop: int = MAX_CHECK_D_CROP) -> np.ndarray:
    """Boolean mask of the pairs the crop check looks at: ``possible`` with ``d_crop <= max_d_crop``.

    Examples
    --------
    >>> import pandas as pd
    >>> p = pd.DataFrame({"verdict": ["possible", "possible", "near"], "d_crop": [3, 20, 2]})
    >>> pairs_to_check(p).tolist()
    [True, False, False]
    """
    d_crop = pd.to_numeric(pairs["d_crop"], errors="coerce").fillna(64).to_numpy()
    return (pairs["verdict"].to_numpy() == "possible") & (d_crop <= max_d_crop)


def _decode(path: str):
    from curate.hash_files import HashError, picture_for_hashing

    try:
        with open(path, "rb") as f:
            return picture_for_hashing(f.read(), path=path)
    except (OSError, HashError):
        return None  # unreadable now: the pair stays as it was


def upgrade_crop_pairs(pairs: pd.DataFrame, paths: Mapping, *, max_d_crop: int = MAX_CHECK_D_CROP,
                       progress: bool = True) -> pd.DataFrame:
    """Upgrade ``possible`` pairs to ``near`` (``crop = 1``) where the crop check confirms a crop.

    Parameters
    ----------
    pairs : DataFrame
        Output of :func:`curate.near_duplicates.score_pairs` (``image_a``,
        ``image_b``, ``verdict``, ``d_crop``, ``crop``, ``orientation``).
    paths : mapping
        ``image_id`` -> file path of every image in ``pairs``.
    max_d_crop : int
        Which pairs are checked (see :func:`pairs_to_check`).
    progress : bool
        Show a progress bar (tqdm) over the checked pairs.

    Returns
    -------
    DataFrame
        A copy of ``pairs`` with upgraded verdicts and the :data:`EVIDENCE_COLUMNS`
        (``crop_checked`` 0/1; NCC, scale, orientation and agreeing hash families of
        the best alignment for checked pairs). ``attrs["crop_checked"]`` holds the
        number of pairs checked.

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
    ...                          progress=False)
    >>> out[["verdict", "crop", "crop_checked"]].values.tolist()
    [['near', 1, 1]]
    """
    from tqdm.auto import tqdm

    from curate.crop_check import check_crop

    out = pairs.copy()
    out["crop_checked"] = 0
    for c in EVIDENCE_COLUMNS[1:]:
        out[c] = np.nan
    todo = np.flatnonzero(pairs_to_check(out, max_d_crop=max_d_crop)) if len(out) else np.zeros(0, int)
    out.attrs["crop_checked"] = int(todo.size)
    if not todo.size:
        return out
    ids = np.union1d(out["image_a"].to_numpy()[todo], out["image_b"].to_numpy()[todo])
    images = {}
    cols = {c: out.columns.get_loc(c) for c in ("verdict", "crop", *EVIDENCE_COLUMNS)}
    for k in tqdm(todo, desc="crop check", unit="pair", disable=not progress, leave=False):
        a, b = int(out["image_a"].iat[k]), int(out["image_b"].iat[k])
        for i in (a, b):
            if i not in images and i in ids:
                images[i] = _decode(str(paths[i])) if i in paths else None
        if images[a] is None or images[b] is None:
            continue
        m = check_crop(images[a], images[b])
        out.iloc[k, cols["crop_checked"]] = 1
        out.iloc[k, cols["crop_ncc"]] = m.ncc
        out.iloc[k, cols["crop_scale"]] = m.scale
        out.iloc[k, cols["crop_orientation"]] = m.orientation
        out.iloc[k, cols["crop_agreeing"]] = m.agreeing
        if m.confirmed:
            out.iloc[k, cols["verdict"]] = "near"
            out.iloc[k, cols["crop"]] = 1
    return out
