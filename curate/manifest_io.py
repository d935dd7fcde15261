"""Read split tables and frozen manifests from disk, digest the files they list, write manifests.

Accepted inputs (:func:`read_manifest`):

- a CSV (``.csv``, or ``.tsv`` / ``.txt`` tab-separated) or Parquet (``.parquet``,
  ``.pq``) table with a path column and a split column (optional patient, lesion
  and SHA-256 columns; spellings in :data:`curate.manifest_table.COLUMN_ALIASES`);
- a frozen manifest's sidecar ``NAME.manifest.json`` (its table is read);
- a folder laid out as one subfolder per split (``train/``, ``test/`` ...), every
  image file below a subfolder belonging to that split.

Relative paths in a table are relative to a root: ``--root`` when given, else
the root recorded in a sidecar when that folder exists here, else the table's
own folder. Writes (:func:`write_manifest`) go to a temporary file in the same
folder that is then renamed into place with :func:`os.replace`, so a reader never
sees half a file; an existing manifest name is never overwritten.
"""

from __future__ import annotations

import io
import json
import os
import tempfile
from pathlib import Path

import pandas as pd

from curate.errors import ManifestError
from curate.file_probe import IMAGE_EXTENSIONS, file_sha256
from curate.folder_walk import FileEntry, walk_images
from curate.manifest import Manifest, ManifestCheck, compare_manifest
from curate.manifest_table import standard_columns
from curate.report import LeakReason

SIDECAR_SUFFIX = ".manifest.json"
CSV_SUFFIXES = {".csv": ",", ".tsv": "\t", ".txt": "\t"}
PARQUET_SUFFIXES = {".parquet", ".pq"}


# --- reading ------------------------------------------------------------------------


def sidecar_path(path: str | os.PathLike) -> Path:
    """The sidecar belonging to a manifest table (``NAME.csv`` -> ``NAME.manifest.json``)."""
    p = Path(path)
    if p.name.endswith(SIDECAR_SUFFIX):
        return p
    return p.with_name(p.stem + SIDECAR_SUFFIX)


def read_sidecar(path: str | os.PathLike) -> dict | None:
    """The sidecar mapping next to a table (or the sidecar itself); None when there is none."""
    side = sidecar_path(path)
    if not side.is_file():
        return None
    try:
        record = json.loads(side.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ManifestError(f"{side}: not valid JSON ({exc})") from None
    if not isinstance(record, dict):
        raise ManifestError(f"{side}: expected a JSON object, got {type(record).__name__}")
    return record


def table_path(path: str | os.PathLike) -> Path:
    """The table file to read for ``path`` (a sidecar points at its CSV, else its Parquet)."""
    p = Path(path)
    if p.name.endswith(SIDECAR_SUFFIX):
        stem = p.name[: -len(SIDECAR_SUFFIX)]
        for suffix in (".csv", ".parquet"):
            if (p.parent / (stem + suffix)).is_file():
                return p.parent / (stem + suffix)
        raise ManifestError(f"{p}: no {stem}.csv or {stem}.parquet beside the sidecar")
    return p


def read_table(path: str | os.PathLike) -> pd.DataFrame:
    """A CSV/TSV or Parquet file as a DataFrame of text columns, as stored (no renaming).

    Raises :class:`~curate.errors.ManifestError` naming the file for an unknown
    suffix, bad encoding or a table that cannot be parsed.
    """
    p = Path(path)
    suffix = p.suffix.lower()
    if not p.exists():
        raise FileNotFoundError(f"{p}: no such file or folder")
    try:
        if suffix in CSV_SUFFIXES:
            return pd.read_csv(
                p, sep=CSV_SUFFIXES[suffix], dtype=str, keep_default_na=False, encoding="utf-8"
            )
        if suffix in PARQUET_SUFFIXES:
            return pd.read_parquet(p)
    except UnicodeDecodeError as exc:
        raise ManifestError(f"{p}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise ManifestError(f"{p}: cannot read as a table: {exc}") from None
    except (OSError, ValueError) as exc:  # pyarrow's errors subclass these
        raise ManifestError(f"{p}: cannot read as a table: {exc}") from None
    raise ManifestError(
        f"{p}: unknown manifest type {suffix or '(no suffix)'!r}; use .csv, .tsv, .parquet, "
        f"a {SIDECAR_SUFFIX} sidecar, or a folder with one subfolder per split"
    )


def read_split_folders(folder: str | os.PathLike) -> pd.DataFrame:
    """A folder with one subfolder per split, as a table of ``path`` (relative) and ``split``.

    Examples
    --------
    >>> import tempfile, os
    >>> d = tempfile.mkdtemp()
    >>> for split, name in [("train", "a.png"), ("test", "x/b.jpg")]:
    ...     os.makedirs(os.path.dirname(os.path.join(d, split, name)), exist_ok=True)
    ...     open(os.path.join(d, split, name), "wb").close()
    >>> read_split_folders(d).values.tolist()
    [['test/x/b.jpg', 'test'], ['train/a.png', 'train']]
    """
    root = Path(folder)
    if not root.is_dir():
        raise NotADirectoryError(f"{root}: not a folder")
    loose = sorted(
        e.name for e in os.scandir(root) if e.is_file() and Path(e.name).suffix.lower() in IMAGE_EXTENSIONS
    )
    if loose:
        raise ManifestError(
            f"{root}: image files directly in the folder belong to no split "
            f"({', '.join(loose[:5])}{' ...' if len(loose) > 5 else ''}); put each image in a "
            "subfolder named after its split"
        )
    rows = []
    subs = sorted((e for e in os.scandir(root) if e.is_dir() and not e.name.startswith(".")),
                  key=lambda e: e.name)
    for sub in subs:
        for entry in walk_images(sub.path):
            if isinstance(entry, FileEntry):
                rows.append((_relative(entry.path, root), sub.name))
    if not rows:
        raise ManifestError(f"{root}: no image files in any subfolder; expected one subfolder per split")
    return pd.DataFrame(rows, columns=["path", "split"])


def read_manifest(
    path: str | os.PathLike, *, columns: dict | None = None
) -> pd.DataFrame:
    """Load any split table or frozen manifest into a DataFrame with our column names.

    Parameters
    ----------
    path : str or path
        CSV/TSV, Parquet, a ``.manifest.json`` sidecar, or a folder with one
        subfolder per split.
    columns : dict, optional
        Our field -> the table's column name, for unusual spellings.

    Returns
    -------
    DataFrame
        ``path`` and ``split`` first, then whichever of ``patient_id``,
        ``lesion_id``, ``sha256`` and the table's other columns exist.

    Examples
    --------
    >>> import tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "split.csv")
    >>> _ = open(p, "w").write("file,fold,patient\\na.png,train,P1\\nb.png,test,P2\\n")
    >>> read_manifest(p).columns.tolist()
    ['path', 'split', 'patient_id']
    """
    p = Path(path)
    if p.is_dir():
        return standard_columns(read_split_folders(p), source=str(p))
    return standard_columns(read_table(table_path(p)), columns=columns, source=str(p))


def load_manifest(path: str | os.PathLike) -> Manifest:
    """A frozen manifest (table + sidecar) as a :class:`~curate.manifest.Manifest`.

    ``path`` is the sidecar or either table file; the sidecar must exist.
    """
    record = read_sidecar(path)
    if record is None:
        raise ManifestError(
            f"{path}: no sidecar {sidecar_path(path).name}; only a frozen manifest can be "
            "verified (`curate check` takes any split table)"
        )
    return Manifest.from_dict(record, read_manifest(path))


def resolve_root(path: str | os.PathLike, root: str | os.PathLike | None) -> Path:
    """The folder relative paths of ``path`` are taken from (see module notes)."""
    if root is not None:
        r = Path(root)
        if not r.is_dir():
            raise NotADirectoryError(f"--root {r}: not a folder")
        return r.absolute()
    p = Path(path)
    if p.is_dir():
        return p.absolute()
    record = read_sidecar(p)
    if record and record.get("root") and Path(record["root"]).is_dir():
        return Path(record["root"]).absolute()
    return p.absolute().parent


def absolute_paths(paths: pd.Series, root: Path) -> list[str]:
    """Each path made absolute against ``root`` (absolute ones kept as they are)."""
    return [str(p) if os.path.isabs(p) else str(root / p) for p in paths]


def digest_files(paths, *, progress: bool = True) -> pd.DataFrame:
    """SHA-256 of each file with :mod:`hashlib`; unreadable and missing files are rows too.

    Returns
    -------
    DataFrame
        ``path`` (as given), ``sha256`` (None when not read), ``problem``
        (None, ``missing_file`` or ``unreadable_file``) and ``message``.
    """
    from tqdm.auto import tqdm

    rows = []
    for path in tqdm(list(paths), desc="digest", unit="file", disable=not progress):
        try:
            rows.append((path, file_sha256(path), None, ""))
        except FileNotFoundError:
            rows.append((path, None, LeakReason.MISSING_FILE.value, "no such file"))
        except (IsADirectoryError, NotADirectoryError) as exc:
            rows.append((path, None, LeakReason.UNREADABLE_FILE.value, f"not a file: {exc}"))
        except OSError as exc:
            rows.append((path, None, LeakReason.UNREADABLE_FILE.value, f"cannot read: {exc}"))
    return pd.DataFrame(rows, columns=["path", "sha256", "problem", "message"])


# --- writing ------------------------------------------------------------------------


def manifest_files(folder: str | os.PathLike, name: str) -> dict[str, Path]:
    """The three files a manifest ``name`` occupies in ``folder``."""
    folder = Path(folder)
    return {
        "csv": folder / f"{name}.csv",
        "parquet": folder / f"{name}.parquet",
        "sidecar": folder / f"{name}{SIDECAR_SUFFIX}",
    }


def table_bytes(table: pd.DataFrame) -> dict[str, bytes]:
    """The table as CSV bytes (UTF-8, ``\\n`` line ends) and Parquet bytes."""
    csv = table.to_csv(index=False, lineterminator="\n").encode("utf-8")
    buffer = io.BytesIO()
    table.astype(object).where(table.notna(), None).to_parquet(buffer, index=False)
    return {"csv": csv, "parquet": buffer.getvalue()}


def write_manifest(manifest: Manifest, folder: str | os.PathLike) -> dict[str, Path]:
    """Write ``NAME.csv``, ``NAME.parquet`` and ``NAME.manifest.json`` into ``folder``.

    Each file is written to a temporary file in ``folder`` and renamed into
    place; the sidecar comes last, so a manifest with a sidecar is complete.
    The sidecar records the SHA-256 of both table files.

    Raises
    ------
    ManifestError
        Any of the three files already exists (nothing is overwritten).
    """
    import hashlib
    from dataclasses import replace

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    targets = manifest_files(folder, manifest.name)
    taken = [str(p) for p in targets.values() if p.exists()]
    if taken:
        raise ManifestError(
            f"manifest {manifest.name!r} already exists ({', '.join(taken)}); manifests are never "
            "overwritten, choose another name"
        )
    data = table_bytes(manifest.table)
    digests = {fmt: hashlib.sha256(b).hexdigest() for fmt, b in data.items()}
    record = replace(manifest, table_digests=digests).to_dict()
    data["sidecar"] = (json.dumps(record, indent=2, sort_keys=True) + "\n").encode("utf-8")
    written: list[Path] = []
    try:
        for key in ("csv", "parquet", "sidecar"):
            atomic_write(targets[key], data[key])
            written.append(targets[key])
    except BaseException:
        for p in written:
            p.unlink(missing_ok=True)
        raise
    return targets


def atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to a temporary file beside ``path``, then rename it into place.

    Refuses to replace an existing file (:class:`~curate.errors.ManifestError`).
    """
    if path.exists():
        raise ManifestError(f"{path} already exists; not overwritten")
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes it private; give it the usual mode
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


# --- verifying ----------------------------------------------------------------------


def verify_manifest(
    path: str | os.PathLike,
    *,
    root: str | os.PathLike | None = None,
    unexpected: bool = True,
    progress: bool = True,
) -> ManifestCheck:
    """Re-digest every file a frozen manifest lists and compare with the manifest.

    Parameters
    ----------
    path : str or path
        The manifest's sidecar or one of its table files.
    root : str or path, optional
        Folder the manifest's relative paths start from (see module notes).
    unexpected : bool
        Also list image files under the root that the manifest does not name
        (and did not record as excluded).
    progress : bool
        Show a progress bar while digesting.

    Returns
    -------
    ManifestCheck
        Missing, unreadable, changed and unexpected files, a fingerprint
        mismatch (the split or digest columns were edited) and a changed table
        file, each a finding with a :class:`~curate.manifest.ManifestIssue` code.
    """
    manifest = load_manifest(path)
    base = resolve_root(path, root)
    observed = digest_files(absolute_paths(manifest.table["path"], base), progress=progress)
    observed["path"] = manifest.table["path"].to_numpy()
    present = None
    if unexpected:
        present = [
            _relative(e.path, base) for e in walk_images(base) if isinstance(e, FileEntry)
        ]
        own = {str(p.absolute()) for p in manifest_files(Path(path).parent, manifest.name).values()}
        present = [p for p in present if str(base / p) not in own]
    table_file = table_path(path)
    fmt = "csv" if table_file.suffix.lower() in CSV_SUFFIXES else "parquet"
    return compare_manifest(
        manifest, observed, present=present, table_digest=(fmt, file_sha256(table_file))
    )


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _relative(path: str, root: Path) -> str:
    return Path(os.path.relpath(path, root)).as_posix()
