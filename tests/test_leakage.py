"""The leakage check: pure find_leaks, the file-reading check_leakage, and `curate check`."""

import hashlib
import json
import os
import pickle
import shutil

import pandas as pd
import pytest
from click.testing import CliRunner

from curate.cli import main
from curate.errors import LeakageError, ManifestError
from curate.leakage import LEAK_COLUMNS, find_leaks, split_order
from curate.leakage_check import check_leakage
from curate.manifest_io import read_manifest

from leakage_data import blob_image, save, split_tree, write_csv

# --- pure ----------------------------------------------------------------------------


def table(**columns):
    return pd.DataFrame(columns)


def test_clean_table_has_no_leaks_and_every_check_ran():
    t = table(path=["a", "b", "c"], split=["train", "val", "test"], sha256=["1", "2", "3"],
              patient_id=["P1", "P2", "P3"], lesion_id=["L1", "L2", "L3"])
    r = find_leaks(t, pairs=pd.DataFrame(columns=["path_a", "path_b"]))
    assert r.ok and len(r) == 0
    assert all(r.checks.values())
    assert r.split_counts == {"train": 1, "val": 1, "test": 1}
    r.raise_if_leaking()  # clean: no error


def test_each_image_outside_the_main_split_is_listed_once():
    # patient P1: 3 images in train, 2 in test, 1 in val -> train is main, 3 leaks
    t = table(path=[f"p{i}" for i in range(6)],
              split=["train", "train", "train", "test", "test", "val"],
              patient_id=["P1"] * 6)
    r = find_leaks(t)
    f = r.to_frame()
    assert r.counts() == {"same_patient": 3}
    assert set(f["path_b"]) == {"p3", "p4", "p5"}
    assert set(f["split_a"]) == {"train"} and set(f["path_a"]) == {"p0"}
    assert f["evidence"][0]["images_per_split"] == {"train": 3, "val": 1, "test": 2}


def test_exact_same_lesion_and_patient_codes():
    t = table(path=["a", "b", "c", "d", "e", "f"],
              split=["train", "test", "train", "test", "train", "val"],
              sha256=["x", "x", "y", "z", "u", "v"],
              patient_id=["P1", "P2", "P3", "P4", "P5", "P5"],
              lesion_id=["L1", "L2", "L3", "L3", None, None])
    r = find_leaks(t)
    assert r.counts() == {"exact_duplicate": 1, "same_lesion": 1, "same_patient": 1}
    f = r.to_frame().set_index("kind")
    assert (f.loc["exact_duplicate", "path_a"], f.loc["exact_duplicate", "path_b"]) == ("a", "b")
    assert f.loc["same_lesion", "value"] == "L3"
    assert (f.loc["same_patient", "split_a"], f.loc["same_patient", "split_b"]) == ("train", "val")


def test_ids_are_case_folded_and_placeholders_link_nothing():
    t = table(path=list("abcdef"), split=["train", "test"] * 3,
              patient_id=["P7", " p7", "unknown", "Unknown", "0", "0"])
    r = find_leaks(t)
    assert r.counts() == {"same_patient": 1}
    ignored = r.ignored.set_index("value")
    assert sorted(ignored.index) == ["0", "unknown"]
    assert ignored.loc["unknown", "images"] == 2
    assert ignored.loc["unknown", "splits"] == ["test", "train"]
    r2 = find_leaks(t, ignore_ids=["P7"])
    assert r2.ok


def test_source_scope_keeps_equal_ids_of_two_sources_apart():
    t = table(path=list("abc"), split=["train", "test", "test"], source=["s1", "s2", "s1"],
              patient_id=["P1", "P1", "P1"])
    # one id space: P1 has 2 images in test (main split) and 1 in train
    assert find_leaks(t).to_frame()["path_b"].tolist() == ["a"]
    # per source: s1's P1 is in train (a) and test (c); s2's P1 only in test
    r = find_leaks(t, patient_scope="source")
    assert r.counts() == {"same_patient": 1}
    assert r.to_frame()["path_b"].tolist() == ["c"]
    with pytest.raises(ValueError, match="patient_scope"):
        find_leaks(t, patient_scope="clinic")


def test_near_duplicate_pairs_only_across_splits_and_not_when_identical():
    t = table(path=list("abcd"), split=["train", "test", "train", "train"],
              sha256=["1", "2", "3", "1"])
    pairs = pd.DataFrame({"path_a": ["b", "a", "a"], "path_b": ["a", "c", "d"],
                          "distance": [5, 2, 0], "orientation": [1, 0, 0]})
    r = find_leaks(t, pairs=pairs)
    f = r.to_frame()
    assert r.counts() == {"near_duplicate": 1}
    # oriented train -> test, distance and the extra columns kept as evidence (the orientation
    # undone the other way: a quarter turn one way is three the other)
    assert (f["path_a"][0], f["split_a"][0], f["path_b"][0]) == ("a", "train", "b")
    assert f["distance"][0] == 5 and f["evidence"][0]["orientation"] == 3
    with pytest.raises(ValueError, match="path_a"):
        find_leaks(t, pairs=pd.DataFrame({"a": [1]}))


def test_missing_split_or_path_column_is_a_manifest_error_naming_rows():
    with pytest.raises(ManifestError, match="no split"):
        find_leaks(table(path=["a"], patient=["P1"]))
    with pytest.raises(ManifestError, match=r"row\(s\) 2"):
        find_leaks(table(path=["a", "b"], split=["train", " "]))


def test_split_order_puts_the_conventional_names_first():
    assert split_order(["zeta", "test", "train", "validation"]) == ["train", "validation", "test", "zeta"]


def test_json_shape_and_round_trip():
    t = table(path=["a", "b"], split=["train", "test"], sha256=["x", "x"])
    d = json.loads(find_leaks(t, source="m.csv").to_json())
    assert set(d) == {"format_version", "source", "ok", "n_images", "split_counts", "checks",
                      "parameters", "counts", "leaks", "ignored_ids", "to_review"}
    assert d["ok"] is False and d["counts"] == {"exact_duplicate": 1}
    (leak,) = d["leaks"]
    assert set(leak) == set(LEAK_COLUMNS)
    assert leak["distance"] is None and leak["evidence"]["sha256"] == "x"


def test_raise_if_leaking_gives_a_readable_picklable_error():
    t = table(path=["a.png", "b.png"], split=["train", "test"], patient_id=["P1", "P1"])
    with pytest.raises(LeakageError, match="same_patient") as info:
        find_leaks(t).raise_if_leaking()
    assert "a.png" in str(info.value) and "b.png" in str(info.value)
    again = pickle.loads(pickle.dumps(info.value))
    assert str(again) == str(info.value)


def test_as_report_uses_the_reason_codes():
    t = table(path=["a", "b"], split=["train", "test"], lesion_id=["L", "L"])
    rep = find_leaks(t).as_report()
    assert rep.counts() == {"same_lesion": 1}


# --- reading files ---------------------------------------------------------------------


def test_byte_identical_file_in_two_split_folders(tmp_path):
    split_tree(tmp_path, {"train": [1, 2], "test": [3]})
    shutil.copy(tmp_path / "train/img1.png", tmp_path / "test/copy.png")
    r = check_leakage(tmp_path, near_duplicates=False, progress=False)
    assert r.counts() == {"exact_duplicate": 1}
    f = r.to_frame()
    assert (f["path_a"][0], f["path_b"][0]) == ("train/img1.png", "test/copy.png")
    # reference: hashlib's SHA-256 of the bytes (Python standard library)
    expected = hashlib.sha256((tmp_path / "train/img1.png").read_bytes()).hexdigest()
    assert f["value"][0] == expected


def test_folder_layout_reads_every_subfolder_as_a_split(tmp_path):
    split_tree(tmp_path, {"train": [1, 2], "val": [3], "test": [4]})
    (tmp_path / "train" / "deeper").mkdir()
    save(blob_image(9), tmp_path / "train" / "deeper" / "x.png")
    (tmp_path / "notes.txt").write_text("not an image")
    t = read_manifest(tmp_path)
    assert t.groupby("split").size().to_dict() == {"test": 1, "train": 3, "val": 1}
    assert check_leakage(tmp_path, near_duplicates=False, progress=False).ok


def test_folder_with_loose_images_or_no_subfolders_is_unusable(tmp_path):
    save(blob_image(1), tmp_path / "a.png")
    with pytest.raises(ManifestError, match="belong to no split"):
        read_manifest(tmp_path)
    empty = tmp_path / "empty"
    empty.mkdir()
    with pytest.raises(ManifestError, match="no image files"):
        read_manifest(empty)


def test_csv_with_other_spellings_missing_and_unreadable_files(tmp_path):
    split_tree(tmp_path, {"train": [1], "test": [2]})
    (tmp_path / "test" / "folder.png").mkdir()  # a folder named like an image: not readable
    rows = [
        {"File": "train/img1.png", "fold": "train", "Patient": "A"},
        {"File": "test/img2.png", "fold": "test", "Patient": "B"},
        {"File": "test/gone.png", "fold": "test", "Patient": "C"},
        {"File": "test/folder.png", "fold": "test", "Patient": "A"},
    ]
    m = write_csv(tmp_path / "split.csv", rows)
    r = check_leakage(m, near_duplicates=False, progress=False)
    assert r.counts() == {"same_patient": 1, "missing_file": 1, "unreadable_file": 1}
    f = r.to_frame().set_index("kind")
    assert f.loc["missing_file", "path_a"] == "test/gone.png"
    assert f.loc["missing_file", "split_a"] == "test"
    assert pd.isna(f.loc["missing_file", "path_b"])


def test_parquet_and_explicit_column_mapping_and_root(tmp_path):
    data = tmp_path / "data"
    split_tree(data, {"a": [1], "b": [1]})  # the same picture saved twice -> identical bytes
    m = tmp_path / "elsewhere" / "split.parquet"
    m.parent.mkdir()
    pd.DataFrame({"img": ["a/img1.png", "b/img1.png"], "part": ["a", "b"]}).to_parquet(m)
    r = check_leakage(m, root=data, columns={"path": "img", "split": "part"},
                      near_duplicates=False, progress=False)
    assert r.counts() == {"exact_duplicate": 1}


def test_a_sha256_column_in_the_manifest_is_not_trusted(tmp_path):
    split_tree(tmp_path, {"train": [1], "test": [2]})
    shutil.copy(tmp_path / "train/img1.png", tmp_path / "test/img2.png")
    m = write_csv(tmp_path / "s.csv", [
        {"path": "train/img1.png", "split": "train", "sha256": "a" * 64},
        {"path": "test/img2.png", "split": "test", "sha256": "b" * 64},
    ])
    assert check_leakage(m, near_duplicates=False, progress=False).counts() == {"exact_duplicate": 1}


def test_dataframe_input_resolves_relative_paths_against_root(tmp_path):
    split_tree(tmp_path, {"train": [1], "test": [1]})
    t = pd.DataFrame({"path": ["train/img1.png", str(tmp_path / "test/img1.png")],
                      "split": ["train", "test"]})
    r = check_leakage(t, root=tmp_path, near_duplicates=False, progress=False)
    assert r.counts() == {"exact_duplicate": 1}


def test_unknown_manifest_type_is_unusable(tmp_path):
    p = tmp_path / "split.xlsx"
    p.write_bytes(b"PK")
    with pytest.raises(ManifestError, match="unknown manifest type"):
        check_leakage(p, progress=False)
    bad = tmp_path / "bad.csv"
    bad.write_bytes("path,split\n\xe9t\xe9,train\n".encode("latin-1"))
    with pytest.raises(ManifestError, match="not UTF-8"):
        check_leakage(bad, progress=False)


# --- command line ----------------------------------------------------------------------


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def test_cli_check_exit_codes(tmp_path):
    clean = tmp_path / "clean"
    split_tree(clean, {"train": [1, 2], "test": [3]})
    result = run("check", clean, "--no-near-duplicates", "-q")
    assert result.exit_code == 0, result.output
    assert "no leakage" in result.output

    leaking = tmp_path / "leaking"
    split_tree(leaking, {"train": [1, 2], "test": [3]})
    shutil.copy(leaking / "train/img1.png", leaking / "test/same.png")
    report = tmp_path / "report.json"
    table = tmp_path / "leaks.csv"
    result = run("check", leaking, "--no-near-duplicates", "-q", "--json", report, "--csv", table)
    assert result.exit_code == 1, result.output
    assert json.loads(report.read_text())["counts"] == {"exact_duplicate": 1}
    rows = pd.read_csv(table)
    assert rows.columns.tolist() == LEAK_COLUMNS and rows["path_b"].tolist() == ["test/same.png"]
    assert json.loads(rows["evidence"][0])["images_per_split"] == {"train": 1, "test": 1}

    no_split = write_csv(tmp_path / "nosplit.csv", [{"path": "a.png", "patient": "P"}])
    result = run("check", no_split, "-q")
    assert result.exit_code == 2
    assert "no split column" in result.stderr

    assert run("check", tmp_path / "does-not-exist.csv").exit_code == 2


def test_cli_check_json_to_stdout_is_plain_json(tmp_path):
    split_tree(tmp_path, {"train": [1], "test": [2]})
    result = CliRunner().invoke(main, ["check", str(tmp_path), "--no-near-duplicates", "-q",
                                       "--json", "-"])
    assert result.exit_code == 0
    assert json.loads(result.stdout)["ok"] is True


def test_cli_check_internal_error_is_exit_3(tmp_path, monkeypatch):
    split_tree(tmp_path, {"train": [1], "test": [2]})

    def broken(*args, **kwargs):
        raise RuntimeError("boom")

    monkeypatch.setattr("curate.leakage_check.find_leaks", broken)
    result = run("check", tmp_path, "--no-near-duplicates", "-q")
    assert result.exit_code == 3


def test_leakage_never_imports_the_splitter():
    import subprocess
    import sys

    code = "import sys, curate.leakage, curate.leakage_check; print('curate.splitting' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


# --- near-duplicates (hashing + radius search) --------------------------------------------


def test_flipped_and_resized_copy_in_another_split_is_a_near_duplicate(tmp_path):
    from PIL import Image

    data = tmp_path / "data"
    split_tree(data, {"train": [1, 2, 3, 4], "test": [5, 6]})
    original = Image.open(data / "train/img1.png")
    # Pillow's transpose/resize make the planted copy (a mirrored, smaller JPEG of train/img1.png)
    original.transpose(Image.Transpose.FLIP_LEFT_RIGHT).resize((48, 48)).save(
        data / "test" / "mirrored.jpg", quality=90)
    cache = tmp_path / "cache"
    r = check_leakage(data, cache=cache, workers=1, progress=False)
    assert r.counts() == {"near_duplicate": 1}
    f = r.to_frame()
    assert (f["path_a"][0], f["path_b"][0]) == ("train/img1.png", "test/mirrored.jpg")
    assert f["distance"][0] <= r.parameters["radius"]
    assert f["evidence"][0]["orientation"] != 0  # found under a flip, not as stored
    # the cache is a workspace whose hashes table now holds every image's codes
    from curate.store import Workspace

    assert len(Workspace.open(cache).read_sql("SELECT sha256 FROM hashes")) == 7
    again = check_leakage(data, cache=cache, workers=1, progress=False)
    assert again.to_frame()["path_b"].tolist() == ["test/mirrored.jpg"]


def test_near_duplicates_inside_one_split_are_not_leaks_and_a_non_image_is_unreadable(tmp_path):
    from PIL import Image

    split_tree(tmp_path, {"train": [1, 2], "test": [3]})
    Image.open(tmp_path / "train/img1.png").resize((40, 40)).save(tmp_path / "train/small.png")
    (tmp_path / "test" / "notes.png").write_bytes(b"this is text, not a PNG")
    r = check_leakage(tmp_path, cache=False, workers=1, progress=False)
    assert r.counts() == {"unreadable_file": 1}
    assert r.to_frame()["path_a"][0] == "test/notes.png"


def test_cli_check_with_near_duplicates_and_a_cache(tmp_path):
    from PIL import Image

    data = tmp_path / "data"
    split_tree(data, {"train": [1, 2], "val": [3]})
    Image.open(data / "train/img2.png").rotate(90).save(data / "val/turned.png")
    out = tmp_path / "r.json"
    result = run("check", data, "--cache", tmp_path / "cache", "--workers", "1", "-q", "--json", out)
    assert result.exit_code == 1, result.output
    leak = json.loads(out.read_text())["leaks"][0]
    assert (leak["kind"], leak["path_a"], leak["path_b"]) == ("near_duplicate", "train/img2.png", "val/turned.png")
    assert run("check", data, "--radius", "99").exit_code == 2


def test_unsure_pairs_across_splits_are_listed_for_review_not_as_leaks():
    t = table(path=list("abc"), split=["train", "test", "train"], sha256=["1", "2", "3"])
    unsure = pd.DataFrame({"path_a": ["a", "a"], "path_b": ["b", "c"], "distance": [9, 9],
                           "verdict": ["possible", "possible"]})
    r = find_leaks(t, pairs=pd.DataFrame(columns=["path_a", "path_b"]), review_pairs=unsure)
    assert r.ok
    assert r.to_review[["path_a", "path_b"]].values.tolist() == [["a", "b"]]
    assert "possible" in r.summary()
    assert json.loads(r.to_json())["to_review"][0]["distance"] == 9


# --- properties against a plain reference ------------------------------------------------

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

ROWS = st.lists(
    st.tuples(st.sampled_from(["train", "validation", "test"]), st.sampled_from("abcd"),
              st.sampled_from(["P1", "P2", "p1", "P3", "unknown"]), st.sampled_from(["L1", "L2", None])),
    min_size=1, max_size=25,
)


def reference_outside(rows, column):
    """Plain loops: images of an id in 2+ splits that are outside its most common split."""
    by_key = {}
    for i, r in enumerate(rows):
        value = r[column]
        if value is None or value.lower() == "unknown":
            continue
        by_key.setdefault(value.casefold(), []).append((f"img{i}", r[0]))
    out = set()
    order = ["train", "validation", "test"]
    for images in by_key.values():
        splits = [s for _, s in images]
        if len(set(splits)) < 2:
            continue
        main = max(set(splits), key=lambda s: (splits.count(s), -order.index(s)))
        out |= {p for p, s in images if s != main}
    return out


@settings(max_examples=30, deadline=None)
@given(ROWS, st.randoms(use_true_random=False))
def test_find_leaks_matches_a_plain_reference_and_ignores_row_order(rows, rnd):
    t = pd.DataFrame({"path": [f"img{i}" for i in range(len(rows))], "split": [r[0] for r in rows],
                      "sha256": [r[1] for r in rows], "patient_id": [r[2] for r in rows],
                      "lesion_id": [r[3] for r in rows]})
    report = find_leaks(t)
    f = report.to_frame()
    for kind, column in (("exact_duplicate", 1), ("same_patient", 2), ("same_lesion", 3)):
        assert set(f.loc[f["kind"] == kind, "path_b"]) == reference_outside(rows, column), kind
    shuffled = t.sample(frac=1, random_state=rnd.randint(0, 2**31)).reset_index(drop=True)
    assert find_leaks(shuffled).to_frame().drop(columns="evidence").equals(f.drop(columns="evidence"))
    assert report.ok == (len(f) == 0)


def test_empty_files_in_two_splits_are_not_exact_duplicates():
    from curate.leakage import find_leaks

    # the SHA-256 of zero bytes (FIPS 180-4) is shared by every empty file; it is not a copy
    empty = hashlib.sha256(b"").hexdigest()
    t = pd.DataFrame({"path": ["a.png", "b.png", "c.png", "d.png"], "split": ["train", "test"] * 2,
                      "sha256": [empty, empty, "11", "11"]})
    assert find_leaks(t).counts() == {"exact_duplicate": 1}


def test_blank_digests_in_a_manifest_are_not_exact_duplicates():
    from curate.leakage import find_leaks

    # a manifest whose digest cells are blank for some rows: blank is unknown, not a shared value
    t = pd.DataFrame({"path": ["a.png", "b.png", "c.png", "d.png"], "split": ["train", "test"] * 2,
                      "sha256": ["", "", "11", "11"]})
    assert find_leaks(t).counts() == {"exact_duplicate": 1}


def test_crop_check_runs_only_on_pairs_that_could_leak(tmp_path):
    import numpy as np
    from PIL import Image

    from curate.leakage_check import near_duplicate_pairs

    skdata = pytest.importorskip("skimage.data")
    # scikit-image's sample photograph and two crops of it made with Pillow
    photo = Image.fromarray(skdata.astronaut()).reduce(2)
    pictures = {"orig.png": photo, "crop_train.jpg": photo.crop((30, 10, 250, 226)),
                "crop_test.png": photo.crop((30, 10, 250, 226))}
    for name, picture in pictures.items():
        picture.save(tmp_path / name)
    table = pd.DataFrame({"path": list(pictures), "split": ["train", "train", "test"]})
    table["sha256"] = [hashlib.sha256((tmp_path / p).read_bytes()).hexdigest() for p in table["path"]]
    pairs, review, _ = near_duplicate_pairs(table, tmp_path, cache=False, workers=1, progress=False)
    every = pd.concat([pairs, review], ignore_index=True)
    checked = {frozenset((a, b)): c for a, b, c in zip(every["path_a"], every["path_b"], every["crop_checked"])}
    assert checked[frozenset(("orig.png", "crop_test.png"))] == 1
    same_split = frozenset(("orig.png", "crop_train.jpg"))
    assert checked[same_split] != 1  # a candidate, but inside one split: not checked


@pytest.mark.parametrize("turn", range(8))
def test_orientation_evidence_follows_the_pair_when_listed_the_other_way(turn):
    # a leak is listed train first; the orientation (turns image b onto image a) must then be
    # undone the other way. Reference: Pillow's transposes (curate.hashing.PIL_TRANSPOSE).
    import numpy as np
    from PIL import Image

    from curate.hashing import PIL_TRANSPOSE

    def turned(picture, k):
        return picture if PIL_TRANSPOSE[k] is None else picture.transpose(PIL_TRANSPOSE[k])

    a = Image.fromarray((np.random.default_rng(turn).random((6, 9)) * 255).astype(np.uint8))
    # b.png: a.png turned so that `turn` turns it back onto a.png
    b = next(turned(a, k) for k in range(8) if np.array_equal(np.asarray(turned(turned(a, k), turn)), np.asarray(a)))
    pictures = {"a.png": a, "b.png": b}
    table = pd.DataFrame({"path": ["a.png", "b.png"], "split": ["test", "train"]})
    pairs = pd.DataFrame({"path_a": ["a.png"], "path_b": ["b.png"], "distance": [0],
                          "orientation": [turn], "crop_orientation": [turn]})
    leak = find_leaks(table, pairs=pairs).to_frame().iloc[0]
    assert (leak["path_a"], leak["path_b"]) == ("b.png", "a.png")
    for key in ("orientation", "crop_orientation"):
        code = leak["evidence"][key]
        assert np.array_equal(np.asarray(turned(pictures[leak["path_b"]], code)),
                              np.asarray(pictures[leak["path_a"]])), (key, code)
