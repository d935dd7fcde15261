"""``check_leakage``: judge any manifest, table or split folder for leaks, reading the files.

This is the file-reading side of the leakage check and needs no workspace:
it loads the split table (:func:`curate.manifest_io.read_manifest`), re-digests
every file with :mod:`hashlib` (exact duplicates, missing and unreadable
files), hashes the readable images and searches for near-duplicate pairs
within a Hamming radius (perceptual hashes are cached in a workspace used
only as a hash cache), then hands everything to the pure
:func:`curate.leakage.find_leaks`.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Iterable, Mapping

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
        Folder of the workspace used as a perceptual-hash cache. None: the
        :func:`default_cache_dir`; False: no cache.
    ignore_ids : iterable of str
        Placeholder patient/lesion ids that never link images.
    patient_scope, lesion_scope : str, optional
        See :func:`curate.leakage.find_leaks`. Default: the scopes a frozen
        manifest's sidecar records, else ``"global"`` (one id space).
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
    parameters = {"root": str(base), "near_duplicates": bool(near_duplicates)}
    return find_leaks(
        table,
        problems=problems,
        ignore_ids=ignore_ids,
        patient_scope=patient_scope or "global",
        lesion_scope=lesion_scope or "global",
        source=source,
        parameters=parameters,
    )
