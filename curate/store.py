"""The workspace: one folder holding one SQLite database that every step reads and writes.

A workspace keeps the catalog, ingest problems, cached hashes, candidate pairs,
review decisions, groups, splits and the manifests made. The database runs in
WAL mode so a notebook can read while a command writes, and every write goes
through :meth:`Workspace.transaction`, so a step either lands whole or not at
all. No step ever rewrites a user's image files.

The schema is versioned. ``MIGRATIONS[v]`` takes a database from version
``v - 1`` to ``v``; opening a workspace applies the missing ones in order, each
in its own transaction, and refuses a database newer than this package.
"""

from __future__ import annotations

import contextlib
import os
import sqlite3
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterable, Iterator

import pandas as pd

from curate.errors import WorkspaceError
from curate.report import Finding

DB_NAME = "curate.sqlite"

# --- schema, one block per concern -------------------------------------------------

_CATALOG_SQL = """
CREATE TABLE images (
    image_id      INTEGER PRIMARY KEY AUTOINCREMENT,
    path          TEXT NOT NULL UNIQUE,   -- absolute path as found (symlinks not resolved)
    root          TEXT NOT NULL,          -- the folder scanned, or the metadata file's folder
    source        TEXT NOT NULL,          -- which clinic or archive the file came from
    size          INTEGER,                -- bytes
    mtime_ns      INTEGER,
    sha256        TEXT,                   -- hex digest of the file's bytes
    width         INTEGER,
    height        INTEGER,
    mode          TEXT,                   -- Pillow mode, e.g. RGB
    format        TEXT,                   -- Pillow format, e.g. JPEG
    decodable     INTEGER NOT NULL DEFAULT 0,
    scan_issue    TEXT,                   -- IngestIssue code from the file's last reading, NULL if fine
    scan_message  TEXT,
    patient_id    TEXT,
    lesion_id     TEXT,
    label         TEXT,                   -- raw diagnosis text as the source gave it
    modality      TEXT,                   -- clinical, dermoscopic, ...
    body_site     TEXT,
    capture_date  TEXT,
    present       INTEGER NOT NULL DEFAULT 1,
    first_seen    TEXT NOT NULL,
    last_seen     TEXT NOT NULL           -- last scan that wrote this row (meta last_scan:<source>: last scan)
);
CREATE INDEX images_sha256 ON images(sha256);
CREATE INDEX images_source ON images(source);

CREATE TABLE problems (
    problem_id  INTEGER PRIMARY KEY AUTOINCREMENT,
    step        TEXT NOT NULL,            -- scan, hash, taxonomy, ...
    source      TEXT,
    file        TEXT,
    row         INTEGER,                  -- 1-based line in a table file (header = 1)
    kind        TEXT NOT NULL,            -- a reason code
    message     TEXT NOT NULL,
    created_at  TEXT NOT NULL
);
CREATE INDEX problems_step ON problems(step, source);
"""

_HASHES_SQL = """
CREATE TABLE hashes (
    sha256        TEXT PRIMARY KEY,       -- cache key: file content
    ahash         INTEGER NOT NULL,       -- 64-bit codes stored as signed int64
    dhash         INTEGER NOT NULL,
    phash         INTEGER NOT NULL,
    whash         INTEGER NOT NULL,
    colorhash     INTEGER NOT NULL,       -- 56-bit colour code (imagehash colorhash, binbits=4)
    phash_dihedral BLOB NOT NULL,         -- 8 little-endian uint64: DCT hash of each rotation/flip
                                          -- (curate.hashing.DIHEDRAL_TRANSFORMS order)
    crop_hashes   BLOB,                   -- little-endian uint64 DCT hashes of sub-windows
                                          -- (curate.hashing.CROP_WINDOWS order)
    thumb_width   INTEGER,                -- size of the reduced decode the hashes came from
    thumb_height  INTEGER,
    hash_version  INTEGER NOT NULL,       -- curate.hash_files.HASH_VERSION; others are recomputed
    hashed_at     TEXT NOT NULL
);
"""

_PAIRS_SQL = """
CREATE TABLE pairs (
    image_a     INTEGER NOT NULL,         -- image_a < image_b
    image_b     INTEGER NOT NULL,
    d_ahash     INTEGER,
    d_dhash     INTEGER,
    d_phash     INTEGER,
    d_whash     INTEGER,
    d_colorhash INTEGER,
    d_crop      INTEGER,                  -- best crop window of one against the other (DCT hash)
    orientation INTEGER,                  -- 0..7, the dihedral transform that best aligns b to a
    crop        INTEGER NOT NULL DEFAULT 0,
    score       REAL NOT NULL,
    verdict     TEXT NOT NULL,            -- exact, near, possible
    conflict    TEXT,                     -- label, patient, label+patient or NULL
    PRIMARY KEY (image_a, image_b)
);

CREATE TABLE decisions (
    decision_id INTEGER PRIMARY KEY AUTOINCREMENT,
    image_a     INTEGER NOT NULL,
    image_b     INTEGER NOT NULL,
    decision    TEXT NOT NULL,
    reviewer    TEXT NOT NULL,
    decided_at  TEXT NOT NULL,
    undone      INTEGER NOT NULL DEFAULT 0
);
CREATE INDEX decisions_pair ON decisions(image_a, image_b);
"""

_TAXONOMY_SQL = """
CREATE TABLE image_nodes (
    image_id        INTEGER PRIMARY KEY,
    node            TEXT,                 -- taxonomy node the raw label maps to (NULL: unmapped)
    training_class  TEXT
);

CREATE TABLE skin_tone (
    sha256   TEXT PRIMARY KEY,
    ita      REAL,                        -- Individual Typology Angle, degrees
    ita_bin  TEXT
);
"""

_SPLITS_SQL = """
CREATE TABLE groups (
    image_id  INTEGER PRIMARY KEY,
    group_id  TEXT NOT NULL
);

CREATE TABLE splits (
    image_id  INTEGER PRIMARY KEY,
    split     TEXT NOT NULL
);

CREATE TABLE manifests (
    name         TEXT PRIMARY KEY,
    path         TEXT NOT NULL,
    fingerprint  TEXT NOT NULL,
    created_at   TEXT NOT NULL,
    parameters   TEXT NOT NULL           -- JSON
);
"""

_META_SQL = """
CREATE TABLE meta (
    key    TEXT PRIMARY KEY,
    value  TEXT NOT NULL
);
"""

#: ``MIGRATIONS[v]`` upgrades a database from version ``v - 1`` to ``v``.
MIGRATIONS: dict[int, str] = {
    1: _META_SQL + _CATALOG_SQL + _HASHES_SQL + _PAIRS_SQL + _TAXONOMY_SQL + _SPLITS_SQL,
    # 2: the count of byte-identical files after every scan reads the index alone (sha256,
    # present, size) instead of one table row per file; it serves sha256 lookups too
    2: """
CREATE INDEX images_copies ON images(sha256, present, size);
DROP INDEX images_sha256;
""",
    # 3: crop check results by the two files' contents (curate.crop_check_store), so the pairs
    # step, the leakage check and repeated checks of one manifest check each pair once
    3: """
CREATE TABLE crop_checks (
    sha_a         TEXT NOT NULL,          -- sha_a < sha_b
    sha_b         TEXT NOT NULL,
    check_version INTEGER NOT NULL,       -- curate.crop_files.CHECK_VERSION; others are checked again
    confirmed     INTEGER NOT NULL,       -- 0/1
    ncc           REAL,
    scale         REAL,
    orientation   INTEGER,                -- 0..7, the code turning the picture of sha_b onto sha_a
    agreeing      INTEGER,
    PRIMARY KEY (sha_a, sha_b)
);
""",
}
SCHEMA_VERSION = max(MIGRATIONS)


def utc_now() -> str:
    """The current time as an ISO 8601 string in UTC, to the second."""
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat()


class Workspace:
    """A curate workspace folder.

    Use :meth:`create` to make one (idempotent) and :meth:`open` for an
    existing one.

    Examples
    --------
    >>> import tempfile
    >>> ws = Workspace.create(tempfile.mkdtemp())
    >>> ws.schema_version() == SCHEMA_VERSION
    True
    >>> len(ws.catalog())
    0
    """

    def __init__(self, path: str | os.PathLike):
        self.path = Path(path).absolute()
        self.db_path = self.path / DB_NAME
        if not self.db_path.is_file():
            raise WorkspaceError(
                f"{self.path} is not a curate workspace (no {DB_NAME}); run `curate init {path}` first"
            )
        self._migrate()

    def __repr__(self) -> str:
        return f"Workspace({str(self.path)!r})"

    @classmethod
    def create(cls, path: str | os.PathLike) -> "Workspace":
        """Create the folder and database if needed, and return the workspace."""
        p = Path(path)
        if p.exists() and not p.is_dir():
            raise WorkspaceError(f"{p} exists and is not a folder")
        p.mkdir(parents=True, exist_ok=True)
        db = p / DB_NAME
        if not db.exists():
            con = sqlite3.connect(db)
            try:
                con.execute("PRAGMA journal_mode=WAL")
            finally:
                con.close()
        return cls(p)

    @classmethod
    def open(cls, path: str | os.PathLike) -> "Workspace":
        return cls(path)

    # --- connections ---------------------------------------------------------------

    def connect(self) -> sqlite3.Connection:
        """A new connection in WAL mode. Writes should use :meth:`transaction`."""
        con = sqlite3.connect(self.db_path, timeout=30.0, isolation_level=None)
        con.execute("PRAGMA journal_mode=WAL")
        con.execute("PRAGMA synchronous=NORMAL")
        con.execute("PRAGMA foreign_keys=ON")
        return con

    @contextlib.contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """A connection inside ``BEGIN IMMEDIATE``: committed on success, rolled back on error."""
        con = self.connect()
        try:
            con.execute("BEGIN IMMEDIATE")
            try:
                yield con
            except BaseException:
                con.execute("ROLLBACK")
                raise
            con.execute("COMMIT")
        finally:
            con.close()

    def read_sql(self, sql: str, params: Iterable = ()) -> pd.DataFrame:
        """Run a query and return the rows as a DataFrame."""
        con = self.connect()
        try:
            return pd.read_sql_query(sql, con, params=tuple(params))
        finally:
            con.close()

    # --- schema --------------------------------------------------------------------

    def schema_version(self) -> int:
        con = self.connect()
        try:
            return _schema_version(con)
        finally:
            con.close()

    def _migrate(self) -> None:
        con = self.connect()
        try:
            current = _schema_version(con)
            if current > SCHEMA_VERSION:
                raise WorkspaceError(
                    f"{self.db_path} has schema version {current}, newer than this curate "
                    f"({SCHEMA_VERSION}); upgrade curate"
                )
            for version in range(current + 1, SCHEMA_VERSION + 1):
                con.execute("BEGIN IMMEDIATE")
                try:
                    if _schema_version(con) < version:  # another process may have migrated
                        for statement in _split_sql(MIGRATIONS[version]):
                            con.execute(statement)
                        con.execute(
                            "INSERT OR REPLACE INTO meta(key, value) VALUES ('schema_version', ?)",
                            (str(version),),
                        )
                    con.execute("COMMIT")
                except BaseException:
                    con.execute("ROLLBACK")
                    raise
        finally:
            con.close()

    # --- common reads --------------------------------------------------------------

    def catalog(self, *, include_missing: bool = False) -> pd.DataFrame:
        """The catalog: one row per image file known to the workspace, by ``image_id``."""
        where = "" if include_missing else "WHERE present = 1"
        return self.read_sql(f"SELECT * FROM images {where} ORDER BY image_id")

    def problems(self, step: str | None = None) -> pd.DataFrame:
        """Recorded problems, optionally of one step only."""
        if step is None:
            return self.read_sql("SELECT * FROM problems ORDER BY problem_id")
        return self.read_sql("SELECT * FROM problems WHERE step = ? ORDER BY problem_id", (step,))

    def get_meta(self, key: str, default: str | None = None) -> str | None:
        con = self.connect()
        try:
            row = con.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        finally:
            con.close()
        return default if row is None else row[0]

    def set_meta(self, key: str, value: str) -> None:
        with self.transaction() as con:
            con.execute("INSERT OR REPLACE INTO meta(key, value) VALUES (?, ?)", (key, value))


def record_problems(
    con: sqlite3.Connection, step: str, findings: Iterable[Finding], *, source: str | None = None
) -> int:
    """Insert findings into the ``problems`` table inside the caller's transaction."""
    now = utc_now()
    rows = [
        (step, source, f.file, f.row, f.as_dict()["reason"], f.message, now) for f in findings
    ]
    con.executemany(
        "INSERT INTO problems(step, source, file, row, kind, message, created_at) "
        "VALUES (?, ?, ?, ?, ?, ?, ?)",
        rows,
    )
    return len(rows)


def _schema_version(con: sqlite3.Connection) -> int:
    has_meta = con.execute(
        "SELECT 1 FROM sqlite_master WHERE type='table' AND name='meta'"
    ).fetchone()
    if not has_meta:
        return 0
    row = con.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
    return int(row[0]) if row else 0


def _split_sql(script: str) -> list[str]:
    """Split a migration script into statements (our scripts hold no ';' inside literals)."""
    lines = [line.split("--", 1)[0] for line in script.splitlines()]
    return [s.strip() for s in "\n".join(lines).split(";") if s.strip()]
