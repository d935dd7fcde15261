"""Folder scans: facts per file, every bad input, re-scan reuse, exact duplicates."""

from __future__ import annotations

import errno
import hashlib
import os
from collections import Counter

import pytest
from PIL import Image

from curate import file_probe, folder_walk
from curate.ingest import exact_duplicates, scan_folder
from curate.store import Workspace
from ingest_trees import GOOD_FILES, drawn_image, make_bad_files, make_good_tree, save


@pytest.fixture
def ws(tmp_path):
    return Workspace.create(tmp_path / "ws")


def _kinds(result) -> Counter:
    return Counter(f.as_dict()["reason"] for f in result.report)


def _by_name(catalog):
    return {os.path.relpath(p, catalog.attrs["root"]): row for p, row in catalog.set_index("path").iterrows()}


def test_good_tree_records_pillow_facts_and_hashlib_digests(ws, tmp_path):
    folder = make_good_tree(tmp_path / "data")
    result = scan_folder(ws, folder, source="north", progress=False)
    assert result.report.ok and result.files_seen == len(GOOD_FILES) == result.new
    cat = ws.catalog()
    cat.attrs["root"] = str(tmp_path / "data")
    rows = _by_name(cat)
    assert set(rows) == set(GOOD_FILES)  # notes.txt is not taken; B.JPEG is (case-insensitive)
    for rel, (w, h, mode, fmt) in GOOD_FILES.items():
        row = rows[rel]
        assert (row["width"], row["height"], row["mode"], row["format"]) == (w, h, mode, fmt), rel
        # reference: hashlib.sha256 of the whole file's bytes (Python standard library)
        assert row.sha256 == hashlib.sha256((tmp_path / "data" / rel).read_bytes()).hexdigest()
        assert (row["decodable"], row["source"], row["present"]) == (1, "north", 1)
        st = (tmp_path / "data" / rel).stat()
        assert (row["size"], row["mtime_ns"]) == (st.st_size, st.st_mtime_ns)
    assert (result.exact_duplicate_groups, result.exact_duplicate_files) == (1, 2)


def test_exact_duplicates_lists_the_byte_copies(ws, tmp_path):
    folder = make_good_tree(tmp_path / "data")
    scan_folder(ws, folder, progress=False)
    dups = exact_duplicates(ws)
    assert sorted(os.path.basename(p) for p in dups["path"]) == ["a.jpg", "a_copy.jpg"]
    assert dups["sha256"].nunique() == 1 and set(dups["copies"]) == {2}
    assert dups.equals(exact_duplicates(ws.catalog()))


def test_every_bad_file_is_a_problem_of_its_own_kind_and_good_rows_stay(ws, tmp_path):
    folder = make_good_tree(tmp_path / "data")
    expected = make_bad_files(folder / "bad")
    result = scan_folder(ws, folder, progress=False)
    found = {os.path.basename(f.file): f.as_dict()["reason"] for f in result.report}
    assert found == expected
    assert _kinds(result) == Counter(expected.values())
    cat = ws.catalog()
    good = cat[cat["decodable"] == 1]
    assert len(good) == len(GOOD_FILES)
    # bad files that exist are still catalogued (not decodable), so nothing is silently lost
    bad = cat[cat["decodable"] == 0]
    assert sorted(os.path.basename(p) for p in bad["path"]) == ["cut.jpg", "cut.png", "empty.jpg", "letter.png"]
    assert dict(zip(bad["path"].map(os.path.basename), bad["scan_issue"])) == {
        k: v for k, v in expected.items() if k in {"cut.jpg", "cut.png", "empty.jpg", "letter.png"}
    }
    # the problems table holds the same rows, under step "scan"
    stored = ws.problems("scan")
    assert Counter(stored["kind"]) == Counter(expected.values())
    # zero-byte files are not counted as copies of each other
    assert result.exact_duplicate_groups == 1


def test_a_second_zero_byte_file_is_not_an_exact_duplicate(ws, tmp_path):
    for name in ("x.jpg", "y.jpg"):
        (tmp_path / name).write_bytes(b"")
    result = scan_folder(ws, tmp_path, progress=False)
    assert _kinds(result) == {"zero_byte": 2}
    assert result.exact_duplicate_files == 0 and exact_duplicates(ws).empty


@pytest.mark.parametrize(
    "side, kind_of_limit",
    # Pillow (PIL/Image.py, _decompression_bomb_check): above MAX_IMAGE_PIXELS it warns
    # (DecompressionBombWarning), above twice that it raises DecompressionBombError
    [(40, "warning"), (60, "error")],
)
def test_images_over_the_decompression_bomb_limit(ws, tmp_path, monkeypatch, side, kind_of_limit):
    save(tmp_path / "big.png", drawn_image((side, side)))
    save(tmp_path / "small.png", drawn_image((20, 20)))
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 1000)  # 40*40 > 1000; 60*60 > 2000
    result = scan_folder(ws, tmp_path, progress=False)
    assert [(os.path.basename(f.file), f.as_dict()["reason"]) for f in result.report] == [
        ("big.png", "decompression_bomb")
    ]
    cat = ws.catalog().set_index(ws.catalog()["path"].map(os.path.basename))
    assert cat.loc["big.png", "decodable"] == 0 and cat.loc["small.png", "decodable"] == 1
    if kind_of_limit == "warning":  # the header was read, so the size is known
        assert (cat.loc["big.png", "width"], cat.loc["big.png", "height"]) == (side, side)
    else:  # Pillow refuses before handing out the image
        assert cat.loc["big.png", ["width", "height"]].isna().all()


def test_a_real_decompression_bomb_is_refused_without_decoding(ws, tmp_path):
    # 1-bit 20000 x 20000 PNG: tiny on disk, 400 million pixels, over twice Pillow's default
    # limit of 89,478,485 pixels (PIL.Image.MAX_IMAGE_PIXELS, Pillow 10-13, from its source)
    Image.new("1", (20000, 20000)).save(tmp_path / "bomb.png", optimize=False)
    result = scan_folder(ws, tmp_path, progress=False)
    assert _kinds(result) == {"decompression_bomb": 1}


@pytest.mark.skipif(os.geteuid() == 0, reason="root reads every file; covered by the monkeypatch test")
def test_unreadable_file_with_real_permissions(ws, tmp_path):
    save(tmp_path / "locked.jpg", drawn_image())
    os.chmod(tmp_path / "locked.jpg", 0)
    try:
        result = scan_folder(ws, tmp_path, progress=False)
    finally:
        os.chmod(tmp_path / "locked.jpg", 0o644)
    assert _kinds(result) == {"permission_denied": 1}


def test_unreadable_file_and_folder_via_monkeypatch(ws, tmp_path, monkeypatch):
    # CI runs as root, where chmod does not stop reads; raise what open()/scandir() raise
    # for a non-root user instead (EACCES)
    save(tmp_path / "locked.jpg", drawn_image())
    save(tmp_path / "fine.jpg", drawn_image(colour=(1, 2, 3)))
    save(tmp_path / "closed" / "inside.jpg", drawn_image())
    real_digest, real_scandir = file_probe.file_sha256, os.scandir

    def digest(path, **kw):
        if os.path.basename(path) == "locked.jpg":
            raise PermissionError(errno.EACCES, "Permission denied", str(path))
        return real_digest(path, **kw)

    def scandir(path):
        if os.path.basename(path) == "closed":
            raise PermissionError(errno.EACCES, "Permission denied", str(path))
        return real_scandir(path)

    monkeypatch.setattr(file_probe, "file_sha256", digest)
    monkeypatch.setattr(folder_walk.os, "scandir", scandir)
    result = scan_folder(ws, tmp_path, progress=False)
    found = sorted((os.path.basename(f.file), f.as_dict()["reason"]) for f in result.report)
    assert found == [("closed", "permission_denied"), ("locked.jpg", "permission_denied")]
    cat = ws.catalog()
    assert sorted(cat["path"].map(os.path.basename)) == ["fine.jpg", "locked.jpg"]
    # the unreadable file has no digest, so the next scan tries it again
    assert cat.set_index(cat["path"].map(os.path.basename))["sha256"].isna().to_dict() == {
        "fine.jpg": False,
        "locked.jpg": True,
    }
    monkeypatch.setattr(file_probe, "file_sha256", real_digest)
    again = scan_folder(ws, tmp_path, progress=False)
    assert (again.reused, again.redigested) == (1, 1)


def test_a_folder_reached_twice_through_links_is_listed_once(ws, tmp_path):
    save(tmp_path / "real" / "x.jpg", drawn_image())
    os.symlink(tmp_path / "real", tmp_path / "alias")
    result = scan_folder(ws, tmp_path, progress=False)
    assert result.report.ok and result.files_seen == 1


class _Counting:
    """Wraps a function and counts its calls."""

    def __init__(self, func):
        self.func, self.calls = func, []

    def __call__(self, path, *args, **kwargs):
        self.calls.append(os.path.basename(path))
        return self.func(path, *args, **kwargs)


@pytest.fixture
def counting(monkeypatch):
    digest = _Counting(file_probe.file_sha256)
    opened = _Counting(file_probe.Image.open)
    monkeypatch.setattr(file_probe, "file_sha256", digest)
    monkeypatch.setattr(file_probe.Image, "open", opened)
    return digest, opened


def test_rescan_of_an_unchanged_tree_opens_no_file(ws, tmp_path, counting):
    digest, opened = counting
    folder = make_good_tree(tmp_path / "data")
    make_bad_files(folder / "bad")
    first = scan_folder(ws, folder, progress=False)
    assert len(digest.calls) == len(GOOD_FILES) + 3  # the empty file is never read
    digest.calls.clear()
    opened.calls.clear()
    second = scan_folder(ws, folder, progress=False)
    assert digest.calls == [] and opened.calls == []
    assert ws.get_meta("last_scan:clinic") is not None  # the source's scan time, not a row write
    assert (second.new, second.redigested, second.reused) == (0, 0, first.files_seen)
    # the stored problems of unchanged files are reported again, not lost
    assert second.report.counts() == first.report.counts()
    assert Counter(ws.problems("scan")["kind"]) == Counter(first.report.counts())


def test_changed_file_is_read_again_and_gone_file_is_kept_as_absent(ws, tmp_path, counting):
    digest, _ = counting
    folder = make_good_tree(tmp_path / "data")
    scan_folder(ws, folder, progress=False)
    before = ws.catalog().set_index("path")
    changed = folder / "e.bmp"
    save(changed, drawn_image((16, 12), (5, 5, 5)), "BMP")  # same size in bytes: BMP is raw
    st = changed.stat()
    os.utime(changed, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000_000))
    (folder / "f.webp").unlink()
    save(folder / "new.png", drawn_image((9, 9)))
    digest.calls.clear()
    result = scan_folder(ws, folder, progress=False)
    assert sorted(digest.calls) == ["e.bmp", "new.png"]
    assert (result.new, result.redigested, result.gone) == (1, 1, 1)
    after = ws.catalog(include_missing=True).set_index("path")
    assert after.loc[str(changed), "sha256"] != before.loc[str(changed), "sha256"]
    assert after.loc[str(changed), "image_id"] == before.loc[str(changed), "image_id"]
    gone = str(folder / "f.webp")
    assert after.loc[gone, "present"] == 0 and gone not in set(ws.catalog()["path"])
    # the file comes back under the same path: same row, present again, read again
    save(folder / "f.webp", drawn_image((30, 20)), "WEBP")
    back = scan_folder(ws, folder, progress=False)
    assert back.redigested == 1 and ws.catalog().set_index("path").loc[gone, "present"] == 1


def test_missing_root_is_an_error(ws, tmp_path):
    with pytest.raises(FileNotFoundError):
        scan_folder(ws, tmp_path / "nope", progress=False)
    (tmp_path / "file.jpg").write_bytes(b"x")
    with pytest.raises(NotADirectoryError):
        scan_folder(ws, tmp_path / "file.jpg", progress=False)


def test_chunked_digest_matches_whole_file_digest(tmp_path):
    data = os.urandom(3 * 1024 + 17)
    (tmp_path / "blob").write_bytes(data)
    # reference: hashlib over the bytes in one call (Python standard library)
    assert file_probe.file_sha256(tmp_path / "blob", chunk_size=1000) == hashlib.sha256(data).hexdigest()
    with pytest.raises(ValueError, match="chunk_size"):
        file_probe.file_sha256(tmp_path / "blob", chunk_size=0)


def test_threads_give_the_same_catalog_as_one_reader(tmp_path):
    folder = make_good_tree(tmp_path / "data")
    make_bad_files(folder / "bad")
    frames = []
    for workers in (1, 3):
        ws = Workspace.create(tmp_path / f"ws{workers}")
        result = scan_folder(ws, folder, progress=False, workers=workers)
        frames.append((result.report.to_frame(), ws.catalog().drop(columns=["first_seen", "last_seen"])))
    assert frames[0][0].equals(frames[1][0]) and frames[0][1].equals(frames[1][1])


@pytest.mark.parametrize("workers", [0, -1, 1.5, True])
def test_bad_worker_counts_are_refused(ws, tmp_path, workers):
    with pytest.raises(ValueError, match="workers"):
        scan_folder(ws, tmp_path, progress=False, workers=workers)
