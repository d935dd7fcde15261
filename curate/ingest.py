"""Catalog ingest: take a folder of images (and its metadata CSV) into a workspace.

:func:`scan_folder` walks a folder for JPEG, PNG, TIFF, BMP and WebP files;
:func:`scan_metadata` takes the files a metadata CSV lists, without a walk.
Both record per file: path, size, modification time, SHA-256, pixel width and
height, Pillow mode and format, whether it decodes, and the metadata joined
by path (patient, lesion, raw diagnosis label, modality, body site, capture date).

A *source* (a clinic, an archive) is the unit of a scan; a file (a path)
belongs to the source that scanned it last. Scanning a source again:

- reuses the stored digest and image facts of every file whose path, size
  and ``mtime_ns`` are unchanged, so an unchanged tree costs one ``stat`` per
  file and no file is opened; a changed file is read again;
- marks the source's files that are gone ``present = 0`` (rows are never deleted);
- sets ``last_seen`` only on rows it writes (new, changed, moved, back, new
  metadata): an unchanged tree costs no row writes. The time of a source's
  last scan is in the ``meta`` table under ``last_scan:<source>``;
- replaces the source's previous ``scan`` rows in the ``problems`` table, so
  that table says what is wrong now;
- with metadata given, sets every file's metadata from it (a file the CSV no
  longer lists gets empty fields); without metadata, keeps what is stored.

Bad input never stops a scan and never drops a good row: every bad file or CSV
row becomes a finding (an :class:`~curate.report.IngestIssue` code) in the
result's report and in ``problems``. Only a metadata file that cannot be used
at all (unreadable, or missing a required or mapped column) raises
:class:`~curate.errors.CatalogError`; that problem is recorded and nothing
else of the source changes.

Caution: a file rewritten within the file system's time resolution with the
same size keeps its old digest until its size or time changes (common
practice for change detection by size and time).

curate curates data; it does not diagnose. Patient data handling follows local
law and institutional rules.
"""

from __future__ import annotations

import operator
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from curate import file_probe
from curate.errors import CatalogError
from curate.folder_walk import FileEntry, stat_entry, walk_images
from curate.metadata import FIELD_COLUMNS, MetadataRow, join_paths, read_metadata
from curate.report import Finding, IngestIssue, Report

CHECK = "scan"
BATCH_SIZE = 2000
META_COLUMNS = tuple(list(FIELD_COLUMNS.values())[1:])  # patient_id ... capture_date
FACT_COLUMNS = ("sha256", "width", "height", "mode", "format", "decodable", "scan_issue", "scan_message")
_ROW_COLUMNS = ("path", "root", "source", "size", "mtime_ns") + FACT_COLUMNS


@dataclass
class ScanResult:
    """What one scan did.

    Attributes
    ----------
    source, root : str
    files_seen : int
        Files found (walked, or listed and present).
    new : int
        Files read for the first time.
    redigested : int
        Known files whose size or time changed, read again.
    reused : int
        Unchanged files whose stored facts were reused without opening them.
    gone : int
        Files of this source known before and not found now (marked ``present = 0``).
    report : Report
        Every problem found; also stored in the ``problems`` table.
    exact_duplicate_groups, exact_duplicate_files : int
        Across the whole workspace after the scan: digests held by two or more
        present non-empty files, and how many files hold them.
    seconds : float
    """

    source: str
    root: str
    files_seen: int = 0
    new: int = 0
    redigested: int = 0
    reused: int = 0
    gone: int = 0
    report: Report = field(default_factory=Report)
    exact_duplicate_groups: int = 0
    exact_duplicate_files: int = 0
    seconds: float = 0.0

    def summary(self) -> str:
        """One line: counts, problems by kind, exact duplicates."""
        problems = (
            "no problems"
            if self.report.ok
            else f"{len(self.report)} problems ("
            + ", ".join(f"{n} {k}" for k, n in self.report.counts().items())
            + ")"
        )
        return (
            f"{self.source}: {self.files_seen} files ({self.new} new, {self.redigested} changed, "
            f"{self.reused} unchanged, {self.gone} gone); {problems}; "
            f"{self.exact_duplicate_files} files share a SHA-256 with another "
            f"({self.exact_duplicate_groups} groups)"
        )


def scan_folder(
    ws, root, *, source=None, metadata=None, columns=None, progress=True, workers=None
) -> ScanResult:
    """Walk ``root`` for image files and take them into the workspace catalog.

    Parameters
    ----------
    ws : Workspace
    root : str or path
        The folder to walk (symlinked folders are followed, loops are not).
    source : str, optional
        Name of the source; defaults to the folder's name.
    metadata : str or path, optional
        A CSV with one row per image; its paths are relative to ``root`` (or absolute).
        When neither the CSV (its SHA-256), the column mapping nor the tree (every
        file's size and modification time) changed since the last scan of this
        source, the join is not redone: the catalog holds its values, and its
        problems are carried over.
    columns : dict, optional
        Our field -> CSV column, see :func:`curate.metadata.parse_columns`.
    progress : bool
        Show progress bars (tqdm, on stderr).
    workers : int, optional
        Threads reading files (hashing and Pillow decoding release the GIL);
        default ``min(2, cpu count)``. The result does not depend on it.

    Returns
    -------
    ScanResult

    Raises
    ------
    FileNotFoundError, NotADirectoryError
        ``root`` is missing or not a folder.
    CatalogError
        The metadata file cannot be used at all (the problem is recorded first).

    Examples
    --------
    >>> import tempfile, os
    >>> from PIL import Image
    >>> from curate.store import Workspace
    >>> d = tempfile.mkdtemp()
    >>> Image.new("RGB", (8, 6), "tan").save(os.path.join(d, "a.png"))
    >>> Image.new("RGB", (8, 6), "tan").save(os.path.join(d, "copy.png"))
    >>> open(os.path.join(d, "empty.jpg"), "wb").close()
    >>> ws = Workspace.create(tempfile.mkdtemp())
    >>> r = scan_folder(ws, d, source="clinic", progress=False)
    >>> r.files_seen, r.new, r.report.counts(), r.exact_duplicate_files
    (3, 3, {'zero_byte': 1}, 2)
    >>> scan_folder(ws, d, source="clinic", progress=False).reused
    3
    """
    workers = _check_workers(workers)
    root = os.path.abspath(os.fspath(root))
    if not os.path.isdir(root):
        raise (NotADirectoryError if os.path.exists(root) else FileNotFoundError)(
            f"{root} is not a folder" if os.path.exists(root) else f"{root} does not exist"
        )
    source = source or os.path.basename(root.rstrip(os.sep)) or root
    started = time.perf_counter()
    entries, walk_findings = [], []
    for item in _progress(walk_images(root), progress, desc=f"listing {source}", unit=" files"):
        (entries if isinstance(item, FileEntry) else walk_findings).append(item)
    key = _join_key(source)
    if metadata is None:
        _forget_join(ws, source)  # this scan replaces the source's problems: the CSV's go
        return _scan(ws, source, root, entries, None, walk_findings, progress, started, workers)
    csv_path = os.path.abspath(os.fspath(metadata))
    signature = _metadata_signature(csv_path, columns, root)
    if signature is not None and ws.get_meta(key) == signature:
        known = _known_rows(ws, False, source, [e.path for e in entries])
        if _tree_unchanged(known, source, entries):
            # the CSV and the tree are as the last scan left them: its metadata values are in
            # the catalog already, and its findings about the CSV are carried over
            findings = _stored_findings(ws, source, csv_path) + walk_findings
            return _scan(ws, source, root, entries, None, findings, progress, started, workers, known=known)
    meta_rows, findings = _load_metadata(ws, metadata, columns, root, source)
    findings.extend(walk_findings)
    findings.extend(_unmatched_rows(meta_rows, {e.path for e in entries}, csv_path))
    result = _scan(ws, source, root, entries, meta_rows, findings, progress, started, workers)
    ws.set_meta(key, signature or "")
    return result


def _join_key(source: str) -> str:
    return f"metadata_signature:{source}"


def _forget_join(ws, source: str) -> None:
    """The next scan of ``source`` with a metadata CSV joins it again."""
    if ws.get_meta(_join_key(source)):
        ws.set_meta(_join_key(source), "")


def _metadata_signature(csv_path: str, columns, root: str) -> str | None:
    """What a metadata join depends on: the CSV's SHA-256 (its bytes, not its modification
    time, whose clock ticks too coarsely to tell two quick writes apart), the column mapping
    and the root; None when the CSV cannot be read (the join then reports it)."""
    import hashlib
    import json

    try:
        digest = hashlib.sha256(Path(csv_path).read_bytes()).hexdigest()
    except OSError:
        return None
    return json.dumps([csv_path, digest, sorted((columns or {}).items()), root])


def _tree_unchanged(known: dict, source: str, entries) -> bool:
    """True when every walked file is in the catalog (``known``: :func:`_known_rows`) under
    ``source`` with the same size and modification time and a digest, and no file of
    ``source`` present before is missing."""
    for e in entries:
        old = known.get(e.path)
        if old is None or not old[3] or not old[4] or old[5] != source or old[1] != e.size or old[2] != e.mtime_ns:
            return False
    walked = {e.path for e in entries}
    return not any(old[5] == source and old[4] and path not in walked for path, old in known.items())


def _stored_findings(ws, source: str, csv_path: str) -> list[Finding]:
    """The findings about ``csv_path`` that the last scan of ``source`` recorded."""
    rows = ws.read_sql("SELECT file, row, kind, message FROM problems WHERE step = ? AND source = ? AND file = ? "
                       "ORDER BY problem_id", (CHECK, source, csv_path))
    return [Finding(CHECK, IngestIssue(kind), message or "", file=file, row=None if pd.isna(row) else int(row))
            for file, row, kind, message in rows.itertuples(index=False)]


def scan_metadata(
    ws, csv_path, *, source, columns=None, root=None, progress=True, workers=None
) -> ScanResult:
    """Take the files a metadata CSV lists into the catalog, without walking a folder.

    Parameters
    ----------
    ws : Workspace
    csv_path : str or path
        The metadata CSV; its ``path`` column names the files.
    source : str
        Name of the source.
    columns : dict, optional
        Our field -> CSV column, see :func:`curate.metadata.parse_columns`.
    root : str or path, optional
        Folder that relative paths start from, and that every path must lie
        under; defaults to the CSV's folder.
    progress : bool
        Show progress bars (tqdm, on stderr).
    workers : int, optional
        Threads reading files; default ``min(2, cpu count)``.

    Returns
    -------
    ScanResult

    Examples
    --------
    >>> import tempfile, os
    >>> from PIL import Image
    >>> from curate.store import Workspace
    >>> d = tempfile.mkdtemp()
    >>> Image.new("RGB", (8, 6), "tan").save(os.path.join(d, "a.png"))
    >>> with open(os.path.join(d, "meta.csv"), "w") as f:
    ...     _ = f.write("file,dx\\na.png,naevus\\nmissing.png,wart\\n")
    >>> ws = Workspace.create(tempfile.mkdtemp())
    >>> r = scan_metadata(ws, os.path.join(d, "meta.csv"), source="archive",
    ...                   columns={"path": "file", "label": "dx"}, progress=False)
    >>> r.files_seen, r.report.counts(), list(ws.catalog()["label"])
    (1, {'path_not_found': 1}, ['naevus'])
    """
    if not source:
        raise ValueError("source must be a non-empty name")
    workers = _check_workers(workers)
    csv_path = os.path.abspath(os.fspath(csv_path))
    root = os.path.abspath(os.fspath(root)) if root is not None else os.path.dirname(csv_path)
    started = time.perf_counter()
    meta_rows, findings = _load_metadata(ws, csv_path, columns, root, source)
    entries = []
    for path, row in meta_rows.items():
        item = stat_entry(path)
        if isinstance(item, FileEntry):
            entries.append(item)
        else:
            findings.append(_at_row(item, csv_path, row))
    _forget_join(ws, source)  # a folder scan of this source joins its CSV again next time
    return _scan(ws, source, root, entries, meta_rows, findings, progress, started, workers)


def exact_duplicates(catalog) -> pd.DataFrame:
    """Files whose SHA-256 another present, non-empty file shares.

    Parameters
    ----------
    catalog : DataFrame or Workspace
        A catalog frame (columns ``image_id``, ``path``, ``sha256``, ``size``,
        optionally ``source`` and ``present``) or a workspace.

    Returns
    -------
    DataFrame
        Columns ``sha256``, ``copies`` (files in the group), ``image_id``,
        ``path``, ``source``; sorted by digest then ``image_id``.

    Examples
    --------
    >>> cat = pd.DataFrame({"image_id": [1, 2, 3, 4], "path": list("abcd"),
    ...                     "sha256": ["x", "y", "x", None], "size": [5, 5, 5, 0]})
    >>> exact_duplicates(cat)[["sha256", "copies", "image_id"]].values.tolist()
    [['x', 2, 1], ['x', 2, 3]]
    """
    if not isinstance(catalog, pd.DataFrame):
        catalog = catalog.catalog()
    cat = catalog
    if "present" in cat:
        cat = cat[cat["present"] == 1]
    cat = cat[cat["sha256"].notna() & (cat["size"] > 0)]
    copies = cat.groupby("sha256")["image_id"].transform("size")
    out = cat.assign(copies=copies)[copies > 1]
    if "source" not in out:
        out = out.assign(source=None)
    out = out[["sha256", "copies", "image_id", "path", "source"]]
    return out.sort_values(["sha256", "image_id"]).reset_index(drop=True)


# --- the shared core ---------------------------------------------------------------


def _scan(ws, source, root, entries, meta_rows, findings, progress, started, workers, known=None) -> ScanResult:
    from curate.store import record_problems, utc_now

    result = ScanResult(source=source, root=root, files_seen=len(entries))
    now = utc_now()
    with_meta = meta_rows is not None
    if known is None or with_meta:
        known = _known_rows(ws, with_meta, source, [e.path for e in entries])
    to_read, reused = [], []
    for entry in entries:
        old = known.get(entry.path)
        # old: (image_id, size, mtime_ns, has digest, present, source, root, *metadata)
        if old is None or not old[3] or old[1] != entry.size or old[2] != entry.mtime_ns:
            to_read.append(entry)
        else:
            reused.append((entry, old))
    result.reused = len(reused)
    result.redigested = sum(1 for e in to_read if e.path in known)
    result.new = len(to_read) - result.redigested

    read = {}
    batch = []
    probed = _probe_all(to_read, workers)
    for entry, facts in _progress(probed, progress, total=len(to_read), desc=f"reading {source}", unit=" files"):
        read[entry.path] = facts
        batch.append(_row(entry, facts, root, source, meta_rows))
        if len(batch) >= BATCH_SIZE:
            _write_rows(ws, batch, with_meta, now)
            batch = []
    _write_rows(ws, batch, with_meta, now)

    updates = []
    for entry, old in reused:
        meta = _meta_values(meta_rows, entry.path) if with_meta else ()
        if not old[4] or old[5] != source or old[6] != root or (with_meta and meta != old[7:]):
            updates.append((root, source, now) + meta + (old[0],))

    stored_issues = _stored_issues(ws) if reused else {}
    for entry in entries:
        facts = read.get(entry.path)
        issue, message = (
            (facts.issue, facts.message) if facts is not None else stored_issues.get(entry.path, (None, None))
        )
        if issue:
            findings.append(Finding(CHECK, IngestIssue(issue), message or "", file=entry.path))

    seen = {e.path for e in entries}
    gone = [(old[0],) for path, old in known.items() if old[5] == source and old[4] and path not in seen]
    result.gone = len(gone)
    meta_set = "".join(f", {c} = ?" for c in META_COLUMNS) if with_meta else ""
    with ws.transaction() as con:
        con.executemany(
            f"UPDATE images SET root = ?, source = ?, present = 1, last_seen = ?{meta_set} WHERE image_id = ?",
            updates,
        )
        con.executemany("UPDATE images SET present = 0 WHERE image_id = ?", gone)
        con.execute(
            "INSERT OR REPLACE INTO meta(key, value) VALUES (?, ?)", (f"last_scan:{source}", now)
        )
        con.execute("DELETE FROM problems WHERE step = ? AND source = ?", (CHECK, source))
        record_problems(con, CHECK, findings, source=source)
        groups, files = con.execute(
            "SELECT COUNT(*), COALESCE(SUM(n), 0) FROM (SELECT COUNT(*) AS n FROM images "
            "WHERE present = 1 AND size > 0 AND sha256 IS NOT NULL GROUP BY sha256 HAVING n > 1)"
        ).fetchone()
    if to_read or updates or gone:
        _checkpoint(ws)  # fold the write-ahead log into the database now, not in the next step
    result.report = Report(list(findings))
    result.exact_duplicate_groups, result.exact_duplicate_files = groups, files
    result.seconds = time.perf_counter() - started
    return result


def _load_metadata(ws, csv_path, columns, root, source):
    """Read and join a metadata CSV; on unusable input record the problem and re-raise."""
    from curate.store import record_problems

    csv_path = os.path.abspath(os.fspath(csv_path))
    try:
        try:
            data = Path(csv_path).read_bytes()
        except OSError as exc:
            f = Finding(CHECK, IngestIssue.UNREADABLE_METADATA, f"cannot read: {exc.strerror or exc}", file=csv_path)
            raise CatalogError(f"{csv_path}: cannot read: {exc.strerror or exc}", findings=(tuple(f.as_dict().values()),))
        table = read_metadata(data, file=csv_path, columns=columns)
    except CatalogError as exc:
        with ws.transaction() as con:
            record_problems(con, CHECK, [Finding(*row) for row in exc.findings], source=source)
        raise
    rows, findings = join_paths(table, root)
    return rows, table.findings + findings


def _unmatched_rows(meta_rows: dict[str, MetadataRow], walked: set, csv_path: str) -> list[Finding]:
    """Findings for CSV rows that name no walked image file."""
    out = []
    for path, row in meta_rows.items():
        if path in walked:
            continue
        item = stat_entry(path)
        if isinstance(item, FileEntry):
            item = Finding(
                CHECK,
                IngestIssue.METADATA_WITHOUT_FILE,
                "the file exists but the walk did not take it (not an image name, or under a "
                "folder reached twice)",
                file=path,
            )
        out.append(_at_row(item, csv_path, row))
    return out


def _at_row(f: Finding, csv_path: str, row: MetadataRow) -> Finding:
    """Re-address a file finding to the CSV row that named the file."""
    return Finding(f.check, f.reason, f"{row.path!r}: {f.message}", file=csv_path, row=row.row)


def _known_rows(ws, with_meta: bool, source: str, paths) -> dict[str, tuple]:
    """path -> (image_id, size, mtime_ns, has digest, present, source, root[, *metadata]) of
    the rows of ``source`` and of any other row whose path is in ``paths``.

    Only these rows matter to a scan of ``source``, and reading the whole catalog for each
    source made a re-scan of 4 sources of a 100,000-image catalog read 400,000 rows."""
    meta = "".join(f", {c}" for c in META_COLUMNS) if with_meta else ""
    select = f"SELECT path, image_id, size, mtime_ns, sha256 IS NOT NULL, present, source, root{meta} FROM images"
    con = ws.connect()
    try:
        known = {r[0]: r[1:] for r in con.execute(select + " WHERE source = ?", (source,))}
        missing = [(p,) for p in paths if p not in known]
        if missing:  # files seen first now, or last scanned under another source
            con.execute("CREATE TEMP TABLE wanted_paths(path TEXT PRIMARY KEY)")
            con.executemany("INSERT OR IGNORE INTO temp.wanted_paths VALUES (?)", missing)
            known.update((r[0], r[1:]) for r in con.execute(
                select + " WHERE path IN (SELECT path FROM temp.wanted_paths)"))
        return known
    finally:
        con.close()


def _stored_issues(ws) -> dict[str, tuple]:
    """path -> (scan_issue, scan_message) of files whose last reading found a problem."""
    con = ws.connect()
    try:
        cur = con.execute("SELECT path, scan_issue, scan_message FROM images WHERE scan_issue IS NOT NULL")
        return {r[0]: r[1:] for r in cur}
    finally:
        con.close()


_META_GETTER = operator.itemgetter(*META_COLUMNS)


def _meta_values(meta_rows, path) -> tuple:
    row = meta_rows.get(path)
    return _META_GETTER(row.values) if row else (None,) * len(META_COLUMNS)


def _row(entry: FileEntry, facts: file_probe.FileFacts, root, source, meta_rows) -> tuple:
    """One catalog row (``_ROW_COLUMNS`` then, with metadata, ``META_COLUMNS``)."""
    base = (
        entry.path, root, source, entry.size, entry.mtime_ns, facts.sha256, facts.width, facts.height,
        facts.mode, facts.format, int(facts.decodable), facts.issue.value if facts.issue else None,
        facts.message or None,
    )
    return base + (_meta_values(meta_rows, entry.path) if meta_rows is not None else ())


def _checkpoint(ws) -> None:
    con = ws.connect()
    try:
        con.execute("PRAGMA wal_checkpoint(PASSIVE)")
    finally:
        con.close()


def _write_rows(ws, rows, with_metadata, now) -> None:
    if rows:
        with ws.transaction() as con:
            _upsert(con, rows, with_metadata, now)


def _upsert(con, rows, with_metadata, now) -> None:
    if not rows:
        return
    columns = _ROW_COLUMNS + (META_COLUMNS if with_metadata else ())
    updates = ", ".join(f"{c} = excluded.{c}" for c in columns[1:])
    con.executemany(
        f"INSERT INTO images ({', '.join(columns)}, present, first_seen, last_seen) "
        f"VALUES ({', '.join('?' * len(columns))}, 1, ?, ?) "
        f"ON CONFLICT(path) DO UPDATE SET {updates}, present = 1, last_seen = excluded.last_seen",
        [row + (now, now) for row in rows],
    )


def _check_workers(workers) -> int:
    if workers is None:
        return max(1, min(2, os.cpu_count() or 1))
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ValueError(f"workers must be a positive int or None, got {workers!r}")
    return workers


def _probe_all(entries, workers):
    """Yield ``(entry, facts)`` in order, reading files in ``workers`` threads."""
    with file_probe.bomb_warnings_silenced():
        if workers == 1 or len(entries) < 2:
            for entry in entries:
                yield entry, file_probe.probe_file(entry.path, entry.size)
            return
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(workers, thread_name_prefix="curate-scan") as pool:
            yield from zip(entries, pool.map(lambda e: file_probe.probe_file(e.path, e.size), entries))


def _progress(iterable, enabled, **kwargs):
    if not enabled:
        return iterable
    from tqdm.auto import tqdm

    return tqdm(iterable, disable=not enabled, leave=False, mininterval=0.5, **kwargs)


__all__ = ["ScanResult", "scan_folder", "scan_metadata", "exact_duplicates"]
