"""The workspace store: creation, WAL mode, migrations, transactions."""

import sqlite3

import pytest

from curate.errors import WorkspaceError
from curate.report import Finding, IngestIssue
from curate.store import DB_NAME, MIGRATIONS, SCHEMA_VERSION, Workspace, record_problems


def test_create_is_idempotent_and_uses_wal(tmp_path):
    ws = Workspace.create(tmp_path / "ws")
    again = Workspace.create(tmp_path / "ws")
    assert ws.db_path == again.db_path
    assert ws.schema_version() == SCHEMA_VERSION
    # SQLite reports the journal mode of a WAL database as "wal" (sqlite.org/wal.html)
    assert ws.read_sql("PRAGMA journal_mode").iloc[0, 0] == "wal"


def test_open_refuses_a_folder_that_is_not_a_workspace(tmp_path):
    with pytest.raises(WorkspaceError, match="not a curate workspace"):
        Workspace.open(tmp_path)


def test_open_refuses_a_newer_schema(tmp_path):
    ws = Workspace.create(tmp_path)
    ws.set_meta("schema_version", str(SCHEMA_VERSION + 1))
    with pytest.raises(WorkspaceError, match="newer than this curate"):
        Workspace.open(tmp_path)


def test_migrations_are_numbered_from_one_without_gaps():
    assert sorted(MIGRATIONS) == list(range(1, SCHEMA_VERSION + 1))


def test_a_failed_transaction_leaves_nothing_behind(tmp_path):
    ws = Workspace.create(tmp_path)
    with pytest.raises(RuntimeError):
        with ws.transaction() as con:
            record_problems(con, "scan", [Finding("scan", IngestIssue.ZERO_BYTE, "x", file="a")])
            raise RuntimeError("boom")
    assert len(ws.problems()) == 0
    with ws.transaction() as con:
        record_problems(con, "scan", [Finding("scan", IngestIssue.ZERO_BYTE, "x", file="a", row=3)])
    p = ws.problems("scan")
    assert list(p["kind"]) == ["zero_byte"] and list(p["row"]) == [3]


def test_a_half_migrated_database_is_completed(tmp_path):
    # a database created by an older curate (version 0: empty) is brought up to date
    sqlite3.connect(tmp_path / DB_NAME).close()
    ws = Workspace.open(tmp_path)
    assert ws.schema_version() == SCHEMA_VERSION


def test_a_version_1_catalog_gets_the_covering_index_and_keeps_its_rows(tmp_path):
    from curate.store import _split_sql

    con = sqlite3.connect(tmp_path / DB_NAME)
    for statement in _split_sql(MIGRATIONS[1]):
        con.execute(statement)
    con.execute("INSERT INTO meta(key, value) VALUES ('schema_version', '1')")
    con.execute("INSERT INTO images(path, root, source, size, sha256, first_seen, last_seen) "
                "VALUES ('/d/a.jpg', '/d', 'c', 5, 'ab', 't', 't')")
    con.commit()
    con.close()
    ws = Workspace.open(tmp_path)
    assert ws.schema_version() == SCHEMA_VERSION >= 2
    # reference: SQLite's own catalogue (sqlite_master) and query planner
    indexes = set(ws.read_sql("SELECT name FROM sqlite_master WHERE type = 'index'")["name"])
    assert "images_copies" in indexes and "images_sha256" not in indexes
    plan = ws.read_sql("EXPLAIN QUERY PLAN SELECT COUNT(*) FROM images WHERE present = 1 AND size > 0 "
                       "AND sha256 IS NOT NULL GROUP BY sha256")
    assert plan["detail"].str.contains("COVERING INDEX images_copies").any()
    assert ws.catalog()["path"].tolist() == ["/d/a.jpg"]
