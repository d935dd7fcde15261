"""Scored content pairs kept in a workspace, by content.

The radius search and scoring (:func:`curate.near_duplicates.score_content_pairs`) are
most of the work of the pairs step and of the leakage check at scale (about 11 minutes
for 100,000 images on 2 cores). Their answer depends only on the set of contents, their
hash codes, the settings and the code that computes it, never on file names, images or
splits. So a workspace keeps each answer as a Parquet file under ``WS/content_pairs/``,
named by a SHA-256 over all of those (the code by the bytes of
:mod:`curate.near_duplicates` and :mod:`curate.hamming_index`), and a second question
with the same contents (the leakage check after the pairs step, a training script
checking the same manifest again, a check after mending a split) reads it back. Any
change to a content, a code, a setting or that code asks a new question. The newest
:data:`KEEP_FILES` answers are kept.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import numpy as np
import pandas as pd

from curate import hamming_index, near_duplicates
from curate.near_duplicates import (
    DEFAULT_RADIUS,
    MAX_CHECKS_PER_IMAGE,
    MAX_POSSIBLE_PER_IMAGE,
    content_hashes,
    score_content_pairs,
    score_pairs,
)

__all__ = ["cached_content_pairs", "score_pairs_kept", "content_fingerprint", "FOLDER", "KEEP_FILES"]

#: Folder of the workspace holding the answers.
FOLDER = "content_pairs"
#: How many answers are kept (newest by use); at 100,000 images one is about 44 MB.
KEEP_FILES = 4
#: Columns of a hash frame that are not codes.
NOT_CODES = ("sha256", "path", "crop_hashes")


def _code_digest() -> str:
    d = hashlib.sha256()
    for module in (near_duplicates, hamming_index):
        d.update(Path(module.__file__).read_bytes())
    return d.hexdigest()


def content_fingerprint(hashes: pd.DataFrame, settings: dict) -> str:
    """SHA-256 (hex) over the settings, the scoring code, the sorted contents and every code.

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> h = pd.DataFrame({"sha256": ["b", "a"], "phash": np.array([1, 2], np.uint64)})
    >>> content_fingerprint(h, {"radius": 8}) == content_fingerprint(h.iloc[::-1], {"radius": 8})
    True
    >>> content_fingerprint(h, {"radius": 8}) == content_fingerprint(h, {"radius": 6})
    False
    """
    h = content_hashes(hashes)
    d = hashlib.sha256()
    d.update(json.dumps(settings, sort_keys=True).encode())
    d.update(_code_digest().encode())
    d.update("\n".join(h["sha256"].astype(str)).encode())
    for column in sorted(c for c in h.columns if c not in NOT_CODES):
        d.update(column.encode())
        d.update(np.ascontiguousarray(h[column].to_numpy().astype(np.uint64)).tobytes())
    if "crop_hashes" in h.columns:
        for codes in h["crop_hashes"]:
            codes = np.asarray(codes if codes is not None else [], np.uint64).ravel()
            d.update(np.int64(codes.size).tobytes())
            d.update(codes.tobytes())
    return d.hexdigest()


def cached_content_pairs(ws, hashes: pd.DataFrame, *, radius: int = DEFAULT_RADIUS,
                         max_possible: int | None = MAX_POSSIBLE_PER_IMAGE,
                         max_checks: int = MAX_CHECKS_PER_IMAGE, workers: int | None = None,
                         progress: bool = False) -> pd.DataFrame:
    """:func:`curate.near_duplicates.score_content_pairs`, read back from the workspace when
    it was asked before with the same contents, codes and settings.

    Parameters
    ----------
    ws : Workspace
        Where the answers are kept (``WS/content_pairs/``).
    hashes, radius, max_possible, max_checks, workers, progress
        As for :func:`~curate.near_duplicates.score_content_pairs` (``workers``
        and ``progress`` do not change the answer).

    Returns
    -------
    DataFrame
        The answer; ``attrs["read_back"]`` is True when it was read back.
    """
    settings = {"radius": int(radius), "max_possible": max_possible, "max_checks": int(max_checks)}
    key = content_fingerprint(hashes, settings)
    folder = Path(ws.path) / FOLDER
    path = folder / f"{key}.parquet"
    if path.is_file():
        try:
            out = pd.read_parquet(path)
        except (OSError, ValueError):
            out = None  # a damaged file is computed again and replaced
        if out is not None:
            os.utime(path)
            out.attrs["read_back"] = True
            return out
    out = score_content_pairs(hashes, radius=radius, max_possible=max_possible, max_checks=max_checks,
                              workers=workers, progress=progress)
    folder.mkdir(parents=True, exist_ok=True)
    temporary = folder / f".{key}.{os.getpid()}.tmp"
    out.to_parquet(temporary, index=False)
    os.replace(temporary, path)
    kept = sorted(folder.glob("*.parquet"), key=lambda p: p.stat().st_mtime, reverse=True)
    for old in kept[KEEP_FILES:]:
        old.unlink(missing_ok=True)
    out.attrs["read_back"] = False
    return out


def score_pairs_kept(catalog: pd.DataFrame, hashes: pd.DataFrame, *, radius: int = DEFAULT_RADIUS,
                     workers: int | None = None, cache=None, progress: bool = False) -> pd.DataFrame:
    """:func:`curate.near_duplicates.score_pairs` with its content pairs kept in ``cache``
    (a Workspace; None computes them without keeping). ``attrs["pairs_read_back"]`` says
    whether they were read back."""
    content = None
    if cache is not None:
        content = cached_content_pairs(cache, hashes, radius=radius, workers=workers, progress=progress)
    pairs = score_pairs(catalog, hashes, radius=radius, workers=workers, content_pairs=content,
                        progress=progress)
    pairs.attrs["pairs_read_back"] = bool(content is not None and content.attrs.get("read_back"))
    return pairs
