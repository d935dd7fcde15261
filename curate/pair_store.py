"""Near-duplicate pairs of a workspace (table ``pairs``) and of plain files or folders.

The I/O layer over :mod:`curate.near_duplicates`: it reads the catalog and the
cached hashes, hashes what is missing (:mod:`curate.hash_files`), and writes
the ``pairs`` table in one transaction.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd

from curate.content_pair_store import score_pairs_kept
from curate.crop_files import upgrade_crop_pairs
from curate.near_duplicates import DEFAULT_RADIUS, PAIR_COLUMNS, pair_conflicts

__all__ = ["find_pairs", "load_pairs", "add_found_pairs", "find_near_duplicates", "pairs_for_output",
           "IMAGE_SUFFIXES"]

#: File name endings treated as images when a folder is given.
IMAGE_SUFFIXES = (".jpg", ".jpeg", ".png", ".tif", ".tiff", ".bmp", ".webp", ".gif")


def _sql_value(value):
    """A DataFrame cell as a value SQLite takes (None for missing, Python int/float)."""
    if value is None or value is pd.NA or (isinstance(value, float) and np.isnan(value)):
        return None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    return value


def find_pairs(ws, *, radius: int = DEFAULT_RADIUS, workers: int | None = None,
               progress: bool = True) -> pd.DataFrame:
    """Find exact and near-duplicate pairs in a workspace and store them in table ``pairs``.

    Images whose content has no cached hashes are hashed first. The previous
    contents of ``pairs`` are replaced in one transaction.

    Parameters
    ----------
    ws : Workspace
    radius : int
        Candidate radius in bits (inclusive), see :func:`curate.near_duplicates.score_pairs`.
    workers : int, optional
        Processes for hashing and threads for the search.
    progress : bool
        Show progress bars while hashing.

    Returns
    -------
    DataFrame
        The stored pairs plus ``path_a``, ``path_b``, ``source_a``, ``source_b``,
        sorted by score (highest first). ``attrs["crop_checked"]``: pairs the
        crop check answered, ``attrs["crop_cached"]``: how many of those answers
        were kept from an earlier run (table ``crop_checks``),
        ``attrs["pairs_read_back"]``: whether the radius search and scoring were
        read back (:mod:`curate.content_pair_store`).

    Examples
    --------
    >>> import tempfile
    >>> from curate.store import Workspace
    >>> len(find_pairs(Workspace.create(tempfile.mkdtemp()), progress=False))
    0
    """
    from curate.hash_files import hash_workspace, load_hashes

    catalog = ws.catalog()
    if len(catalog) and catalog["decodable"].astype(bool).any():
        hash_workspace(ws, workers=workers, progress=progress)
    hashes = load_hashes(ws)
    pairs = score_pairs_kept(catalog, hashes, radius=radius, workers=workers, cache=ws, progress=progress)
    read_back = pairs.attrs["pairs_read_back"]
    pairs = upgrade_crop_pairs(pairs, dict(zip(catalog["image_id"], catalog["path"])), workers=workers,
                               progress=progress, digests=dict(zip(catalog["image_id"], catalog["sha256"])),
                               cache=ws)
    rows = [tuple(_sql_value(v) for v in rec) for rec in pairs[PAIR_COLUMNS].astype(object).itertuples(index=False)]
    with ws.transaction() as con:
        con.execute("DELETE FROM pairs")
        con.executemany(
            f"INSERT INTO pairs({', '.join(PAIR_COLUMNS)}) VALUES ({', '.join('?' * len(PAIR_COLUMNS))})", rows
        )
    out = _with_paths(pairs, catalog)
    out.attrs.update(crop_checked=pairs.attrs.get("crop_checked", 0), crop_cached=pairs.attrs.get("crop_cached", 0),
                     pairs_read_back=read_back)
    return out


def add_found_pairs(ws, leaks: pd.DataFrame) -> int:
    """Store the near-duplicate pairs a leakage check found as ``near`` pairs of the workspace.

    The check looks at pairs across splits with its own budget of crop checks, so it
    can confirm copies that :func:`find_pairs` left ``possible`` or never kept. Stored,
    they join leakage groups like any other ``near`` pair (the next
    :func:`curate.split_store.build_groups` or :func:`curate.split_store.mend_split`).
    A pair already in table ``pairs`` is replaced. Running :func:`find_pairs` again
    replaces the whole table, these pairs included.

    Parameters
    ----------
    ws : Workspace
    leaks : DataFrame
        :attr:`curate.leakage.LeakageReport.leaks` (or its ``to_frame()``) of a check
        of this workspace's images; only rows of kind ``near_duplicate`` are used,
        with the engine's columns (``d_phash``, ``score`` ...) from ``evidence``.

    Returns
    -------
    int
        Pairs stored.

    Raises
    ------
    ValueError
        A pair names a file that is not in the workspace's catalog (the first such
        path is named); nothing is stored then.
    """
    import json

    from curate.hashing import INVERSE_ORIENTATION

    near = leaks[leaks["kind"] == "near_duplicate"]
    if near.empty:
        return 0
    catalog = ws.catalog()
    id_of = pd.Series(catalog["image_id"].to_numpy(), index=catalog["path"].to_numpy())
    a, b = near["path_a"].map(id_of), near["path_b"].map(id_of)
    unknown = a.isna() | b.isna()
    if unknown.any():
        row = near[unknown].iloc[0]
        path = row["path_a"] if pd.isna(a[unknown].iloc[0]) else row["path_b"]
        raise ValueError(f"{int(unknown.sum())} found pair(s) name files that are not in the catalog of "
                         f"{ws.path}, for example {path}; nothing was stored")
    evidence = pd.DataFrame([json.loads(e) if isinstance(e, str) else dict(e or {}) for e in near["evidence"]])
    a, b = a.to_numpy(np.int64), b.to_numpy(np.int64)
    rows = pd.DataFrame({"image_a": np.minimum(a, b), "image_b": np.maximum(a, b)})
    for column in PAIR_COLUMNS[2:]:
        rows[column] = evidence[column].to_numpy(object) if column in evidence.columns else None
    rows["d_phash"] = rows["d_phash"].where(rows["d_phash"].notna(), near["distance"].to_numpy(object))
    swapped = (a > b) & rows["orientation"].notna().to_numpy()
    rows.loc[swapped, "orientation"] = [INVERSE_ORIENTATION[int(o)] for o in rows.loc[swapped, "orientation"]]
    rows["crop"] = rows["crop"].fillna(0)
    rows["score"] = rows["score"].fillna(0.0)
    rows["verdict"] = rows["verdict"].fillna("near")
    rows["conflict"] = pair_conflicts(catalog, rows["image_a"], rows["image_b"])
    rows = rows.drop_duplicates(["image_a", "image_b"])
    values = [tuple(_sql_value(v) for v in rec) for rec in rows[PAIR_COLUMNS].itertuples(index=False)]
    with ws.transaction() as con:
        con.executemany(f"INSERT OR REPLACE INTO pairs({', '.join(PAIR_COLUMNS)}) "
                        f"VALUES ({', '.join('?' * len(PAIR_COLUMNS))})", values)
    return len(values)


def load_pairs(ws) -> pd.DataFrame:
    """The stored ``pairs`` table with paths and sources, sorted by score (highest first)."""
    pairs = ws.read_sql(f"SELECT {', '.join(PAIR_COLUMNS)} FROM pairs")
    pairs["d_dhash"] = pairs["d_dhash"].astype("Int64")
    pairs = pairs.sort_values(["score", "image_a", "image_b"], ascending=[False, True, True], kind="stable")
    return _with_paths(pairs.reset_index(drop=True), ws.catalog(include_missing=True))


def _with_paths(pairs: pd.DataFrame, catalog: pd.DataFrame) -> pd.DataFrame:
    out = pairs.copy()
    meta = catalog.set_index("image_id")
    for side in ("a", "b"):
        ids = out[f"image_{side}"]
        out[f"path_{side}"] = meta["path"].reindex(ids).to_numpy() if "path" in meta else None
        out[f"source_{side}"] = meta["source"].reindex(ids).to_numpy() if "source" in meta else None
    return out


def pairs_for_output(pairs: pd.DataFrame) -> pd.DataFrame:
    """Columns in the order written to CSV: paths, verdict and score first."""
    first = ["path_a", "path_b", "verdict", "score", "conflict", "source_a", "source_b"]
    rest = [c for c in pairs.columns if c not in first]
    return pairs[[c for c in first if c in pairs.columns] + rest]


def _list_images(folder: Path) -> list[str]:
    found = []
    for root, dirs, files in os.walk(folder):
        dirs.sort()
        for name in sorted(files):
            if name.lower().endswith(IMAGE_SUFFIXES):
                found.append(os.path.join(root, name))
    return found


def _as_table(paths_or_dataframe) -> pd.DataFrame:
    if isinstance(paths_or_dataframe, pd.DataFrame):
        if "path" not in paths_or_dataframe.columns:
            raise ValueError("the DataFrame needs a 'path' column naming image files")
        table = paths_or_dataframe.copy()
    elif isinstance(paths_or_dataframe, (str, os.PathLike)):
        p = Path(paths_or_dataframe)
        if p.is_dir():
            table = pd.DataFrame({"path": _list_images(p)})
        elif p.is_file():
            table = pd.DataFrame({"path": [str(p)]})
        else:
            raise FileNotFoundError(f"{p} is neither a folder nor a file")
    else:
        try:
            paths = [os.fspath(x) for x in paths_or_dataframe]
        except TypeError:
            raise TypeError(
                "paths_or_dataframe must be a folder, a list of files or a DataFrame with a 'path' column"
            ) from None
        table = pd.DataFrame({"path": paths})
    table["path"] = [os.path.abspath(os.fspath(p)) for p in table["path"]]
    return table.reset_index(drop=True)


def find_near_duplicates(paths_or_dataframe, *, radius: int = DEFAULT_RADIUS, workers: int | None = None,
                         cache=None, progress: bool = True) -> pd.DataFrame:
    """Exact and near-duplicate pairs among image files, with no workspace.

    Parameters
    ----------
    paths_or_dataframe : folder, list of paths, or DataFrame
        A folder (searched recursively for image files), a list of image files,
        or a DataFrame with a ``path`` column (``label`` and ``patient_id``
        columns, if present, are used to mark conflicts).
    radius : int
        Candidate radius in bits (inclusive).
    workers : int, optional
        Processes for hashing, threads for the search.
    cache : Workspace or path, optional
        A workspace whose ``hashes`` and ``crop_checks`` tables and
        ``content_pairs`` folder serve as caches of the hashes, the crop check's
        answers and the scored pairs (created if a path to a missing folder is given).
    progress : bool
        Show a progress bar while hashing.

    Returns
    -------
    DataFrame
        One row per pair: ``path_a``, ``path_b``, ``verdict``, ``score``,
        ``conflict``, the distances, ``orientation``, ``crop`` and ``image_a``,
        ``image_b`` (row positions in the input), sorted by score (highest
        first). Files that could not be hashed are listed in
        ``frame.attrs["report"]``.

    Examples
    --------
    >>> import tempfile, os, shutil
    >>> from PIL import Image
    >>> d = tempfile.mkdtemp()
    >>> Image.radial_gradient("L").save(os.path.join(d, "a.png"))
    >>> Image.linear_gradient("L").save(os.path.join(d, "b.png"))
    >>> shutil.copy(os.path.join(d, "a.png"), os.path.join(d, "copy.png"))  # doctest: +ELLIPSIS
    '...'
    >>> pairs = find_near_duplicates(d, workers=1, progress=False)
    >>> [(os.path.basename(a), os.path.basename(b), v) for a, b, v in
    ...  zip(pairs["path_a"], pairs["path_b"], pairs["verdict"])]
    [('a.png', 'copy.png', 'exact')]
    """
    from curate.hash_files import hash_files
    from curate.store import Workspace

    table = _as_table(paths_or_dataframe)
    if cache is not None and not isinstance(cache, Workspace):
        cache = Workspace.create(cache)
    hashes = hash_files(table["path"].tolist(), workspace=cache, workers=workers, progress=progress)
    report = hashes.attrs.get("report")
    by_path = hashes.drop_duplicates("path").set_index("path")["sha256"]
    catalog = table.assign(image_id=np.arange(len(table), dtype=np.int64),
                           sha256=by_path.reindex(table["path"]).to_numpy())
    pairs = score_pairs_kept(catalog, hashes.drop(columns=["path"]), radius=radius, workers=workers, cache=cache,
                             progress=progress)
    pairs = upgrade_crop_pairs(pairs, dict(zip(catalog["image_id"], catalog["path"])), workers=workers,
                               progress=progress, digests=dict(zip(catalog["image_id"], catalog["sha256"])),
                               cache=cache)
    out = pairs_for_output(_with_paths(pairs, catalog))
    out.attrs["report"] = report
    return out
