"""``check_leakage``: judge any manifest, table or split folder for leaks, reading the files.

This is the file-reading side of the leakage check and needs no workspace:
it loads the split table (:func:`curate.manifest_io.read_manifest`), re-digests
every file with :mod:`hashlib` (exact duplicates, missing and unreadable
files), hashes the readable images and searches for near-duplicate pairs
within a Hamming radius (perceptual hashes and crop check answers are cached in a
workspace used only as a cache), then hands everything to the pure
:func:`curate.leakage.find_leaks`.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Iterable, Mapping

import numpy as np
import pandas as pd

from curate.leakage import LeakageReport, find_leaks
from curate.manifest_io import (
    absolute_paths,
    digest_files,
    read_manifest,
    read_sidecar,
    resolve_root,
)
from curate.manifest_table import standard_columns

#: environment variable naming the default hash-cache folder
CACHE_ENV = "CURATE_CACHE_DIR"
#: verdicts of the near-duplicate engine that count as a leak (``exact`` ones are
#: found on the digests; ``possible`` pairs need a person's look, not a verdict)
NEAR_VERDICTS = ("near",)


def default_cache_dir() -> Path:
    """Where ``check_leakage`` keeps its hash cache when none is given.

    ``$CURATE_CACHE_DIR`` when set, else ``$XDG_CACHE_HOME/curate/hash-cache``,
    else ``~/.cache/curate/hash-cache``.
    """
    if os.environ.get(CACHE_ENV):
        return Path(os.environ[CACHE_ENV])
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "curate" / "hash-cache"


def check_leakage(
    manifest,
    *,
    root: str | os.PathLike | None = None,
    columns: Mapping[str, str] | None = None,
    near_duplicates: bool = True,
    radius: int | None = None,
    cache: str | os.PathLike | bool | None = None,
    ignore_ids: Iterable[str] = (),
    patient_scope: str | None = None,
    lesion_scope: str | None = None,
    workers: int | None = None,
    progress: bool = True,
) -> LeakageReport:
    """Every cross-split leak in a manifest: shared files, near-duplicates, patients, lesions.

    Parameters
    ----------
    manifest : str, path or DataFrame
        A CSV/TSV or Parquet split table (a path column and a split column;
        optional patient, lesion and SHA-256 columns), a frozen manifest's
        sidecar, a folder with one subfolder per split, or a DataFrame with
        those columns.
    root : str or path, optional
        Folder relative paths start from. Default: the root recorded in a
        frozen manifest's sidecar when it exists here, else the manifest's own
        folder (for a DataFrame: the current folder).
    columns : mapping, optional
        Our field -> the table's column name, for unusual spellings.
    near_duplicates : bool
        Hash the images and look for near-duplicates across splits.
    radius : int, optional
        Largest Hamming distance in bits (inclusive) for a near-duplicate;
        default: the near-duplicate engine's own default.
    cache : str, path, bool or None
        Folder of the workspace used as a cache of perceptual hashes and of the
        crop check's answers (both by file content). None: the
        :func:`default_cache_dir`; False: no cache.
    ignore_ids : iterable of str
        Placeholder patient/lesion ids that never link images.
    patient_scope, lesion_scope : str, optional
        See :func:`curate.leakage.find_leaks`. Default: the scopes a frozen
        manifest's sidecar records, else ``"global"`` (one id space).
    workers : int, optional
        Processes for hashing; default one per core.
    progress : bool
        Show progress bars.

    Returns
    -------
    LeakageReport
        Digests are always recomputed from the bytes on disk; a ``sha256``
        column in the manifest is not trusted (``curate verify`` compares it).

    Examples
    --------
    >>> import tempfile, os
    >>> from PIL import Image
    >>> d = tempfile.mkdtemp()
    >>> for split in ("train", "test"):
    ...     os.makedirs(os.path.join(d, split))
    ...     Image.new("RGB", (8, 8), "red").save(os.path.join(d, split, "x.png"))
    >>> check_leakage(d, near_duplicates=False, progress=False).counts()
    {'exact_duplicate': 1}
    """
    if isinstance(manifest, pd.DataFrame):
        table = standard_columns(manifest, columns=columns, source="table")
        base = Path(root).absolute() if root is not None else Path.cwd()
        source = None
    else:
        table = read_manifest(manifest, columns=columns)
        base = resolve_root(manifest, root)
        source = str(manifest)
        if not Path(manifest).is_dir():
            recorded = (read_sidecar(manifest) or {}).get("leak_check") or {}
            scopes = {k: recorded[k] for k in ("patient_scope", "lesion_scope") if k in recorded}
            scopes.update({k: v for k, v in (("patient_scope", patient_scope),
                                             ("lesion_scope", lesion_scope)) if v is not None})
            patient_scope, lesion_scope = scopes.get("patient_scope"), scopes.get("lesion_scope")
    files = digest_files(absolute_paths(table["path"], base), progress=progress)
    files["path"] = table["path"].to_numpy()
    table = table.drop(columns=["sha256"], errors="ignore").assign(
        sha256=files["sha256"].to_numpy()
    )
    problems = files.loc[files["problem"].notna(), ["path", "problem", "message"]].rename(
        columns={"problem": "reason"}
    )
    pairs = review = None
    if near_duplicates:
        pairs, review, unhashable = near_duplicate_pairs(
            table, base, radius=radius, cache=cache, workers=workers, progress=progress
        )
        problems = pd.concat([problems, unhashable], ignore_index=True)
    parameters = {"root": str(base), "near_duplicates": bool(near_duplicates)}
    if near_duplicates:
        parameters.update(radius=pairs.attrs["radius"], verdicts=list(NEAR_VERDICTS),
                          cache=pairs.attrs["cache"], scored_pairs_read_back=pairs.attrs["pairs_read_back"])
    return find_leaks(
        table,
        pairs=pairs,
        review_pairs=review,
        problems=problems,
        ignore_ids=ignore_ids,
        patient_scope=patient_scope or "global",
        lesion_scope=lesion_scope or "global",
        source=source,
        parameters=parameters,
    )


def near_duplicate_pairs(
    table: pd.DataFrame,
    base: Path,
    *,
    radius: int | None = None,
    cache=None,
    workers: int | None = None,
    progress: bool = True,
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Hash the table's readable files; near-duplicate pairs by path, unsure pairs, unhashable files.

    Returns
    -------
    pairs : DataFrame
        ``path_a``, ``path_b`` (as in the table), ``distance`` (DCT hash bits,
        best orientation) and the engine's other columns as evidence; only
        pairs with a verdict in :data:`NEAR_VERDICTS`.
    review : DataFrame
        The same for pairs with verdict ``possible`` (for a person to look at).
    unhashable : DataFrame
        ``path``, ``reason`` (``unreadable_file``), ``message``: files whose
        bytes were read but which could not be decoded as images.
    """
    from curate.crop_files import upgrade_crop_pairs
    from curate.hash_files import hash_files
    from curate.content_pair_store import score_pairs_kept
    from curate.near_duplicates import DEFAULT_RADIUS
    from curate.report import LeakReason
    from curate.store import Workspace

    radius = DEFAULT_RADIUS if radius is None else int(radius)
    if not 0 <= radius <= 64:
        raise ValueError(f"radius must be between 0 and 64 bits, got {radius}")
    ws = None
    if cache is not False:
        ws = Workspace.create(default_cache_dir() if cache is None else cache)
    readable = table[table["sha256"].notna()].reset_index(drop=True)
    absolute = [os.path.abspath(p) for p in absolute_paths(readable["path"], base)]
    hashes = hash_files(absolute, workspace=ws, workers=workers, progress=progress)
    report = hashes.attrs["report"]
    table_path = dict(zip(absolute, readable["path"]))
    absolute_of = dict(zip(readable["path"], absolute))
    unhashable = pd.DataFrame(
        [(table_path.get(f.file, f.file), LeakReason.UNREADABLE_FILE.value,
          f"not readable as an image ({f.as_dict()['reason']}): {f.message}") for f in report],
        columns=["path", "reason", "message"],
    )
    hashed = readable[readable["sha256"].isin(set(hashes["sha256"]))].reset_index(drop=True)
    catalog = pd.DataFrame({"image_id": range(len(hashed)), "sha256": hashed["sha256"]})
    codes = hashes.drop(columns=["path"]).drop_duplicates("sha256")
    scored = score_pairs_kept(catalog, codes, radius=radius, workers=workers, cache=ws, progress=progress)
    read_back = scored.attrs["pairs_read_back"]
    # second stage: confirmed crops become near (the same check as curate.pair_store uses), on
    # the pairs that could leak: two images in different splits (a pair inside one split is no leak)
    cross = np.ones(len(scored), bool)
    if "split" in hashed.columns:
        split = hashed["split"].astype(str).to_numpy()
        cross = split[scored["image_a"].to_numpy()] != split[scored["image_b"].to_numpy()]
    checked = upgrade_crop_pairs(scored[cross], dict(enumerate(absolute_of[p] for p in hashed["path"])),
                                 workers=workers, progress=progress, digests=dict(enumerate(hashed["sha256"])),
                                 cache=ws)
    scored = pd.concat([checked, scored[~cross]], ignore_index=True) if (~cross).any() else checked
    path = hashed["path"].to_numpy()
    by_path = scored.drop(columns=["image_a", "image_b", "conflict"]).assign(
        path_a=path[scored["image_a"].to_numpy()],
        path_b=path[scored["image_b"].to_numpy()],
        distance=scored["d_phash"].to_numpy(),
    )
    pairs = by_path[by_path["verdict"].isin(NEAR_VERDICTS)].reset_index(drop=True)
    review = by_path[by_path["verdict"] == "possible"].reset_index(drop=True)
    pairs.attrs.update(radius=radius, cache=None if ws is None else str(ws.path),
                       pairs_read_back=read_back)
    return pairs, review, unhashable
