"""Metadata CSVs: column mapping, the join, metadata-only scans, and every bad-table case."""

from __future__ import annotations

import codecs
import os
from collections import Counter

import pandas as pd
import pytest

from curate.errors import CatalogError
from curate.ingest import scan_folder, scan_metadata
from curate.metadata import decode_text, parse_columns, read_metadata
from curate.store import Workspace
from ingest_trees import drawn_image, save

COLUMNS = {"path": "file", "patient": "pid", "lesion": "lid", "label": "dx",
           "modality": "kind", "body_site": "site", "capture_date": "taken"}


@pytest.fixture
def ws(tmp_path):
    return Workspace.create(tmp_path / "ws")


@pytest.fixture
def folder(tmp_path):
    root = tmp_path / "clinic"
    for i, name in enumerate(["a.jpg", "b.jpg", "sub/c.png"]):
        save(root / name, drawn_image(colour=(200, 100 + 30 * i, 90)))
    return root


def _write(path, text, encoding="utf-8"):
    path.write_bytes(text.encode(encoding))
    return path


def _problems(result):
    return sorted((f.as_dict()["reason"], f.row) for f in result.report)


def test_folder_scan_joins_mapped_columns(ws, folder, tmp_path):
    csv = _write(tmp_path / "meta.csv",
                 "file,pid,lid,dx,kind,site,taken,extra\n"
                 "a.jpg,P1,L1,Naevus ,dermoscopic,back,2021/3/4,x\n"
                 f"{folder / 'sub/c.png'},P2,L2,BCC,clinical,face,2020-11-30T10:00,y\n")
    result = scan_folder(ws, folder, metadata=csv, columns=COLUMNS, progress=False)
    assert result.report.ok
    cat = ws.catalog().set_index(ws.catalog()["path"].map(os.path.basename))
    assert cat.loc["a.jpg", ["patient_id", "lesion_id", "label", "modality", "body_site", "capture_date"]].tolist() == [
        "P1", "L1", "Naevus", "dermoscopic", "back", "2021-03-04"]
    assert cat.loc["c.png", ["patient_id", "capture_date"]].tolist() == ["P2", "2020-11-30"]
    # a walked file without a CSV row is catalogued with empty metadata
    assert cat.loc["b.jpg", ["patient_id", "label"]].isna().all()


def test_same_named_columns_need_no_mapping_and_rescan_updates_metadata(ws, folder, tmp_path):
    csv = _write(tmp_path / "meta.csv", "path;patient_id;label\na.jpg;P1;naevus\n")  # semicolons
    scan_folder(ws, folder, metadata=csv, progress=False)
    _write(csv, "path;patient_id;label\na.jpg;P9;melanoma\n")
    again = scan_folder(ws, folder, metadata=csv, progress=False)
    assert again.reused == 3 and again.report.ok
    row = ws.catalog().set_index("path").loc[str(folder / "a.jpg")]
    assert (row["patient_id"], row["label"]) == ("P9", "melanoma")
    # a scan without metadata keeps what is stored
    scan_folder(ws, folder, progress=False)
    assert ws.catalog().set_index("path").loc[str(folder / "a.jpg"), "label"] == "melanoma"


def test_bad_rows_each_become_a_problem_with_their_line(ws, folder, tmp_path):
    (tmp_path / "clinic" / "readme.md").write_text("not an image name")
    csv = _write(tmp_path / "meta.csv",
                 "path,patient_id,label,capture_date\n"   # line 1
                 "a.jpg,P1,naevus,2021-01-02\n"           # 2 good
                 "./a.jpg,P1,naevus,2021-01-02\n"         # 3 duplicate_path
                 "sub/../a.jpg,P1,melanoma,2021-01-02\n"  # 4 conflicting_metadata
                 "../elsewhere.jpg,P2,wart,\n"            # 5 outside_root
                 "gone.jpg,P3,wart,\n"                    # 6 path_not_found
                 "b.jpg,P4,\"wart, plantar\",04/05/2021\n"  # 7 bad_date (day/month ambiguous)
                 "sub/c.png,P5,wart,2021-01-02,oops\n"    # 8 malformed_row
                 ",P6,wart,\n"                            # 9 malformed_row (no path)
                 "readme.md,P7,wart,\n"                   # 10 metadata_without_file
                 "\n")
    result = scan_folder(ws, folder, metadata=csv, progress=False)
    assert _problems(result) == [
        ("bad_date", 7), ("conflicting_metadata", 4), ("duplicate_path", 3),
        ("malformed_row", 8), ("malformed_row", 9), ("metadata_without_file", 10),
        ("outside_root", 5), ("path_not_found", 6),
    ]
    assert all(f.file == str(csv) for f in result.report)
    # every walked image is still in the catalog; the first row for a.jpg counts
    cat = ws.catalog().set_index(ws.catalog()["path"].map(os.path.basename))
    assert sorted(cat.index) == ["a.jpg", "b.jpg", "c.png"]
    assert cat.loc["a.jpg", "label"] == "naevus" and cat.loc["b.jpg", "label"] == "wart, plantar"
    assert pd.isna(cat.loc["b.jpg", "capture_date"])
    stored = ws.problems("scan")
    assert sorted(zip(stored["kind"], stored["row"])) == _problems(result)


@pytest.mark.parametrize("missing", ["path", "label"])
def test_missing_columns_refuse_the_source_but_keep_earlier_data(ws, folder, tmp_path, missing):
    good = _write(tmp_path / "good.csv", "file,dx\na.jpg,naevus\n")
    scan_folder(ws, folder, source="north", metadata=good, columns={"path": "file", "label": "dx"}, progress=False)
    before = ws.catalog()
    header = "dx\n" if missing == "path" else "file\n"
    bad = _write(tmp_path / "bad.csv", header + "a.jpg\n")
    (folder / "a.jpg").unlink()  # a change the refused scan must not record
    with pytest.raises(CatalogError, match="missing column") as info:
        scan_folder(ws, folder, source="north", metadata=bad, columns={"path": "file", "label": "dx"},
                    progress=False)
    assert [row[1] for row in info.value.findings] == ["missing_columns"]
    assert ws.catalog().equals(before)
    stored = ws.problems("scan")
    assert list(stored["kind"]) == ["missing_columns"] and list(stored["row"]) == [1]


def test_metadata_only_scan_resolves_against_the_csv_folder_or_a_root(ws, folder, tmp_path):
    csv = _write(folder / "list.csv", "file,dx\na.jpg,naevus\nsub/c.png,bcc\n../x.jpg,wart\n")
    result = scan_metadata(ws, csv, source="archive", columns={"path": "file", "label": "dx"}, progress=False)
    assert result.files_seen == 2 and _problems(result) == [("outside_root", 4)]
    assert sorted(ws.catalog()["label"]) == ["bcc", "naevus"]
    # the same list read from elsewhere, with --root
    elsewhere = tmp_path / "lists"
    elsewhere.mkdir()
    moved = _write(elsewhere / "list.csv", "file,dx\nb.jpg,naevus\n")
    r2 = scan_metadata(ws, moved, source="archive2", columns={"path": "file", "label": "dx"},
                       root=folder, progress=False)
    assert r2.report.ok and r2.files_seen == 1 and r2.exact_duplicate_files == 0


def test_metadata_only_scan_reports_files_that_are_missing_or_bad(ws, folder, tmp_path):
    (folder / "empty.jpg").write_bytes(b"")
    csv = _write(folder / "list.csv", "path\na.jpg\nempty.jpg\nno_such.jpg\n")
    result = scan_metadata(ws, csv, source="archive", progress=False)
    kinds = sorted((f.as_dict()["reason"], os.path.basename(f.file), f.row) for f in result.report)
    assert kinds == [("path_not_found", "list.csv", 4), ("zero_byte", "empty.jpg", None)]
    again = scan_metadata(ws, csv, source="archive", progress=False)
    assert again.reused == 2 and sorted(again.report.counts()) == ["path_not_found", "zero_byte"]


def test_undecodable_bytes_are_reported_by_line_and_offset_and_the_row_is_kept(ws, folder, tmp_path):
    text = "path,label\na.jpg,naevus\nb.jpg,n\u00e6vus caf\u00e9\n"
    csv = _write(tmp_path / "meta.csv", text, encoding="cp1252")  # \xe6 and \xe9 are not UTF-8 here
    result = scan_folder(ws, folder, metadata=csv, progress=False)
    assert _problems(result) == [("bad_encoding", 3)]
    assert "byte offset 31" in result.report.findings[0].message  # 11 + 13 + 7 bytes before the 'æ'
    # decoded with the documented Windows-1252 fallback, so the row is not lost
    assert ws.catalog().set_index(ws.catalog()["path"].map(os.path.basename)).loc["b.jpg", "label"] == "n\u00e6vus caf\u00e9"


def test_utf8_with_bom_and_utf16_decode_cleanly():
    text = "path,label\na.jpg,n\u00e6vus\n"
    for data in (codecs.BOM_UTF8 + text.encode("utf-8"), text.encode("utf-16")):
        decoded, encoding, findings = decode_text(data)
        assert decoded == text and findings == [] and encoding in {"utf-8", "utf-16"}


def test_undecodable_bytes_outside_windows_1252_fall_back_to_latin_1():
    decoded, encoding, findings = decode_text(b"path\n\x81.jpg\n")
    assert (decoded, encoding, [f.row for f in findings]) == ("path\n\x81.jpg\n", "latin-1", [2])


def test_an_unreadable_or_empty_csv_refuses_the_source(ws, folder, tmp_path):
    with pytest.raises(CatalogError, match="cannot read"):
        scan_folder(ws, folder, metadata=tmp_path / "missing.csv", progress=False)
    with pytest.raises(CatalogError, match="empty"):
        scan_folder(ws, folder, metadata=_write(tmp_path / "e.csv", ""), progress=False)
    assert Counter(ws.problems("scan")["kind"]) == {"unreadable_metadata": 2}
    assert ws.catalog().empty


@pytest.mark.parametrize(
    "text, message",
    [("path", "expected field=column"), ("path=a,path=b", "given twice"), ("site=x", "unknown field")],
)
def test_bad_column_mappings_are_value_errors(text, message):
    with pytest.raises(ValueError, match=message):
        parse_columns(text)


def test_mapping_to_a_column_the_csv_lacks_names_it():
    with pytest.raises(CatalogError, match="label=diagnosis"):
        read_metadata(b"path,dx\na.jpg,x\n", file="m.csv", columns={"label": "diagnosis"})


def test_a_relative_metadata_path_is_reported_absolute(ws, folder, tmp_path, monkeypatch):
    _write(tmp_path / "meta.csv", "path\na.jpg\nnot_there.jpg\na.jpg\n")
    monkeypatch.chdir(tmp_path)
    result = scan_folder(ws, folder, metadata="meta.csv", progress=False)
    assert _problems(result) == [("duplicate_path", 4), ("path_not_found", 3)]
    assert {f.file for f in result.report} == {str(tmp_path / "meta.csv")}


def test_unchanged_tree_and_csv_rescan_skips_the_join_but_keeps_its_problems(ws, folder, tmp_path, monkeypatch):
    import curate.ingest as ingest

    csv = _write(tmp_path / "meta.csv", "path,patient_id,label\na.jpg,P1,naevus\ngone.jpg,P2,wart\n")
    first = scan_folder(ws, folder, metadata=csv, progress=False)
    assert _problems(first) == [("path_not_found", 3)]
    calls = []
    original = ingest._load_metadata

    def counting(*args, **kwargs):
        calls.append(args)
        return original(*args, **kwargs)

    monkeypatch.setattr(ingest, "_load_metadata", counting)
    again = scan_folder(ws, folder, metadata=csv, progress=False)
    assert calls == [] and again.reused == 3
    assert _problems(again) == _problems(first)  # the CSV's problems are carried over
    stored = ws.problems("scan")
    assert sorted(zip(stored["kind"], stored["row"])) == [("path_not_found", 3)]
    # same size, new content, written at once: the join runs again (the digest tells them apart)
    _write(csv, "path,patient_id,label\na.jpg,P1,melano\ngone.jpg,P2,wart\n")
    scan_folder(ws, folder, metadata=csv, progress=False)
    assert len(calls) == 1
    assert ws.catalog().set_index("path").loc[str(folder / "a.jpg"), "label"] == "melano"
    # a new image in the tree: the join runs again, and the new file gets its row's values
    save(folder / "d.jpg", drawn_image(colour=(90, 60, 50)))
    _write(csv, "path,patient_id,label\na.jpg,P1,melano\nd.jpg,P3,wart\n")
    scan_folder(ws, folder, metadata=csv, progress=False)
    assert len(calls) == 2
    assert ws.catalog().set_index("path").loc[str(folder / "d.jpg"), "patient_id"] == "P3"
    # a scan without the CSV replaces the source's problems; the next scan with it joins again
    _write(csv, "path,patient_id,label\na.jpg,P1,melano\nd.jpg,P3,wart\ngone.jpg,P2,wart\n")
    scan_folder(ws, folder, metadata=csv, progress=False)
    scan_folder(ws, folder, progress=False)
    back = scan_folder(ws, folder, metadata=csv, progress=False)
    assert len(calls) == 4 and _problems(back) == [("path_not_found", 4)]
