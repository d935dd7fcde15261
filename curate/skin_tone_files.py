"""Estimate skin tone (ITA) over a workspace's images and store it in table ``skin_tone``.

The I/O half of :mod:`curate.skin_tone`: it opens each distinct file (by
SHA-256), reduces it to a thumbnail and hands the pixels to
:func:`curate.skin_tone.estimate_ita`. Results are cached by SHA-256, so a
second run only reads new files. Unreadable files get a NULL ITA and bin.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from curate.skin_tone import estimate_ita, ita_bin
from curate.store import Workspace

__all__ = ["estimate_skin_tone", "image_ita", "ita_chunk"]


def image_ita(path, *, max_side: int = 256) -> float:
    """ITA of one image file (NaN when it cannot be read or holds too little skin)."""
    from PIL import Image

    try:
        with Image.open(path) as img:
            img.draft("RGB", (max_side, max_side))
            img = img.convert("RGB")
            img.thumbnail((max_side, max_side))
            pixels = np.asarray(img)
    except (OSError, ValueError, Image.DecompressionBombError):
        return float("nan")
    return estimate_ita(pixels)


def ita_chunk(items) -> list[tuple[int, float]]:
    """``(key, ITA)`` of ``(key, path, max_side)`` items, one per item; what a worker runs."""
    return [(key, image_ita(path, max_side=max_side)) for key, path, max_side in items]


def estimate_skin_tone(
    ws: Workspace, *, recompute: bool = False, max_side: int = 256, progress: bool = True,
    workers: int | None = None,
) -> pd.DataFrame:
    """Estimate and store the ITA of every decodable catalog file not yet in ``skin_tone``.

    ``workers`` processes read the files (default: every core). Returns the whole
    ``skin_tone`` table (sha256, ita, ita_bin).
    """
    from curate.chunked_work import resolve_workers, run_chunks

    catalog = ws.catalog()
    catalog = catalog[(catalog["decodable"] == 1) & catalog["sha256"].notna()]
    files = catalog.drop_duplicates("sha256")[["sha256", "path"]]
    if not recompute:
        done = set(ws.read_sql("SELECT sha256 FROM skin_tone")["sha256"])
        files = files[~files["sha256"].isin(done)]
    items = [(k, path, max_side) for k, path in enumerate(files["path"])]
    values = np.full(len(items), np.nan)
    for results in run_chunks(ita_chunk, items, workers=resolve_workers(workers), progress=progress,
                              desc="skin tone", unit="image"):  # chunks arrive as they finish
        for k, value in results:
            values[k] = value
    rows = []
    for sha, value in zip(files["sha256"], values):
        label = ita_bin(value)[0]
        rows.append((sha, None if np.isnan(value) else value, label))
    with ws.transaction() as con:
        con.executemany("INSERT OR REPLACE INTO skin_tone(sha256, ita, ita_bin) VALUES (?, ?, ?)", rows)
    return ws.read_sql("SELECT sha256, ita, ita_bin FROM skin_tone ORDER BY sha256")
