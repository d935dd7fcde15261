"""Frozen manifests: the Manifest value, freeze, verify, pseudonyms, atomic writes, exit codes."""

import hashlib
import hmac
import json
import os
import shutil

import pandas as pd
import pytest
from click.testing import CliRunner

from curate.cli import main
from curate.errors import LeakageError, ManifestError
from curate.freeze import freeze_split
from curate.manifest import FORMAT_VERSION, Manifest, fingerprint
from curate.manifest_io import (
    atomic_write,
    load_manifest,
    read_manifest,
    verify_manifest,
    write_manifest,
)
from curate.pseudonyms import pseudonym, pseudonymise
from curate.store import Workspace, utc_now

from leakage_data import blob_image, save

SALT = "a long secret salt kept by the curator"


def make_workspace(tmp_path, rows, *, split_parameters=None):
    """A workspace whose catalog, groups and splits hold ``rows`` (dicts with seed, split ...)."""
    ws = Workspace.create(tmp_path / "ws")
    data = tmp_path / "data"
    now = utc_now()
    with ws.transaction() as con:
        for i, r in enumerate(rows, start=1):
            path = data / r.get("name", f"img{i}.png")
            if "copy_of" in r:
                path.parent.mkdir(parents=True, exist_ok=True)
                shutil.copy(data / r["copy_of"], path)
            else:
                save(blob_image(r["seed"]), path)
            sha = hashlib.sha256(path.read_bytes()).hexdigest()
            con.execute(
                "INSERT INTO images(image_id, path, root, source, size, sha256, decodable, patient_id, "
                "lesion_id, label, first_seen, last_seen) VALUES (?,?,?,?,?,?,1,?,?,?,?,?)",
                (i, str(path), str(data), r.get("source", "clinic_a"), path.stat().st_size, sha,
                 r.get("patient"), r.get("lesion"), "naevus", now, now),
            )
            if r.get("split"):
                con.execute("INSERT INTO splits VALUES (?, ?)", (i, r["split"]))
                con.execute("INSERT INTO groups VALUES (?, ?)", (i, r.get("group", f"g-{r.get('patient')}")))
        con.execute("INSERT INTO image_nodes VALUES (1, 'compound_naevus', 'naevus')")
    if split_parameters is not None:
        ws.set_meta("split_parameters", json.dumps(split_parameters))
    return ws


CLEAN = [
    {"seed": 1, "patient": "P1", "lesion": "L1", "split": "train"},
    {"seed": 2, "patient": "P1", "lesion": "L2", "split": "train"},
    {"seed": 3, "patient": "P2", "lesion": "L3", "split": "val"},
    {"seed": 4, "patient": "P3", "lesion": "L4", "split": "test"},
    {"seed": 5, "patient": "P4", "lesion": "L5", "split": "test", "name": "sub/img5.png"},
]


@pytest.fixture
def frozen(tmp_path):
    ws = make_workspace(tmp_path, CLEAN, split_parameters={"fractions": [0.6, 0.2, 0.2], "random_state": 7})
    result = freeze_split(ws, "v1", progress=False)
    return ws, result


# --- the value -------------------------------------------------------------------------


def test_fingerprint_is_sha256_of_sorted_digest_split_lines():
    t = pd.DataFrame({"sha256": ["b", "a", "a"], "split": ["test", "train", "train"]})
    # reference: hashlib.sha256 over the documented text (Python standard library)
    assert fingerprint(t) == hashlib.sha256(b"a\ttrain\na\ttrain\nb\ttest\n").hexdigest()


def test_to_dict_from_dict_round_trip_and_unknown_version():
    t = pd.DataFrame({"path": ["b", "a"], "sha256": ["2", "1"], "split": ["x", "y"]})
    m = Manifest(t, name="m", parameters={"random_state": 3})
    d = m.to_dict()
    assert d["format_version"] == FORMAT_VERSION and d["random_state"] == 3
    assert d["row_order"] == "path"
    back = Manifest.from_dict(json.loads(json.dumps(d)), m.table)
    assert back.recorded_fingerprint == m.fingerprint and back.parameters == m.parameters
    with pytest.raises(ManifestError, match="format_version"):
        Manifest.from_dict(dict(d, format_version=99), m.table)
    with pytest.raises(ManifestError, match="mapping"):
        Manifest.from_dict(["not", "a", "mapping"], m.table)
    with pytest.raises(ValueError, match="file stem"):
        Manifest(t, name="../escape")


# --- pseudonyms ------------------------------------------------------------------------


def test_pseudonym_is_truncated_hmac_sha256():
    # reference: RFC 2104 HMAC as implemented by Python's hmac module with hashlib.sha256
    expected = hmac.new(SALT.encode(), b"P-0042", hashlib.sha256).hexdigest()[:16]
    assert pseudonym("P-0042", SALT) == expected


def test_pseudonyms_stable_for_a_salt_and_different_across_salts():
    ids = pd.Series(["P1", "P2", "P1", None])
    a, b = pseudonymise(ids, SALT), pseudonymise(ids, SALT)
    other = pseudonymise(ids, SALT + " but different")
    assert a.tolist() == b.tolist()
    assert a[0] == a[2] and a[0] != a[1] and a[3] is None
    assert a[0] != other[0] and a[1] != other[1]
    with pytest.raises(ValueError, match="16 bytes"):
        pseudonym("P1", "short")


# --- writing ---------------------------------------------------------------------------


def test_write_is_atomic_and_never_overwrites(tmp_path):
    t = pd.DataFrame({"path": ["a"], "sha256": ["1"], "split": ["train"]})
    files = write_manifest(Manifest(t, name="m"), tmp_path)
    before = {k: p.read_bytes() for k, p in files.items()}
    with pytest.raises(ManifestError, match="never"):
        write_manifest(Manifest(t.assign(split="test"), name="m"), tmp_path)
    assert {k: p.read_bytes() for k, p in files.items()} == before
    assert not [p for p in os.listdir(tmp_path) if p.endswith(".tmp")]
    with pytest.raises(ManifestError, match="already exists"):
        atomic_write(files["csv"], b"x")


def test_a_failed_write_leaves_no_partial_manifest(tmp_path, monkeypatch):
    t = pd.DataFrame({"path": ["a"], "sha256": ["1"], "split": ["train"]})
    calls = []

    def failing_replace(src, dst):
        calls.append(dst)
        if str(dst).endswith(".manifest.json"):
            raise OSError("disk full")
        return real_replace(src, dst)

    real_replace = os.replace
    monkeypatch.setattr(os, "replace", failing_replace)
    with pytest.raises(OSError, match="disk full"):
        write_manifest(Manifest(t, name="m"), tmp_path)
    assert os.listdir(tmp_path) == []
    assert len(calls) == 3


# --- freeze ----------------------------------------------------------------------------


def test_freeze_writes_sorted_tables_and_a_sidecar(frozen):
    ws, result = frozen
    files = result.files
    assert {p.name for p in files.values()} == {"v1.csv", "v1.parquet", "v1.manifest.json"}
    csv = pd.read_csv(files["csv"], dtype=str)
    assert csv["path"].tolist() == sorted(csv["path"])
    assert csv["path"].tolist()[-1] == "sub/img5.png"  # relative to the declared root, '/'-separated
    assert list(csv.columns[:3]) == ["path", "sha256", "split"]
    assert csv.loc[csv["path"] == "img1.png", "node"].item() == "compound_naevus"
    parquet = pd.read_parquet(files["parquet"])
    assert parquet["sha256"].tolist() == csv["sha256"].tolist()
    side = json.loads(files["sidecar"].read_text())
    assert side["fingerprint"] == fingerprint(csv)
    assert side["parameters"] == {"fractions": [0.6, 0.2, 0.2], "random_state": 7}
    assert side["random_state"] == 7
    assert side["versions"]["pandas"] == pd.__version__
    assert side["split_counts"] == {"test": 2, "train": 2, "val": 1}
    assert side["table_digests"]["csv"] == hashlib.sha256(files["csv"].read_bytes()).hexdigest()
    recorded = ws.read_sql("SELECT * FROM manifests")
    assert recorded["name"].tolist() == ["v1"] and recorded["fingerprint"][0] == side["fingerprint"]


def test_read_manifest_loads_it_back_in_one_call(frozen):
    _, result = frozen
    for f in result.files.values():
        t = read_manifest(f)
        assert len(t) == 5 and {"path", "split", "sha256", "patient_id", "group_id"} <= set(t.columns)


def test_freeze_leaves_out_undecodable_files_and_records_them(tmp_path):
    ws = make_workspace(tmp_path, CLEAN)
    broken = tmp_path / "data" / "broken.jpg"
    broken.write_bytes(b"\xff\xd8\xff truncated")
    with ws.transaction() as con:
        con.execute(
            "INSERT INTO images(image_id, path, root, source, sha256, decodable, first_seen, last_seen) "
            "VALUES (6, ?, ?, 'clinic_a', ?, 0, ?, ?)",
            (str(broken), str(tmp_path / "data"), hashlib.sha256(broken.read_bytes()).hexdigest(),
             utc_now(), utc_now()),
        )
        con.execute("INSERT INTO splits VALUES (6, 'test')")
    save(blob_image(60), tmp_path / "data" / "stray.png")  # on disk, not in the catalog
    result = freeze_split(ws, "v1", progress=False)
    assert "broken.jpg" not in set(result.manifest.table["path"])
    assert sorted((e["path"], e["reason"]) for e in result.manifest.excluded) == [
        ("broken.jpg", "not decodable as an image"), ("stray.png", "not in the catalog")]
    assert verify_manifest(result.files["csv"], progress=False).ok


def test_freeze_never_reuses_a_name(frozen):
    ws, _ = frozen
    with pytest.raises(ManifestError, match="already exists"):
        freeze_split(ws, "v1", progress=False)


def test_freeze_refuses_a_leaking_split_unless_allowed(tmp_path):
    rows = CLEAN[:3] + [{"seed": 9, "patient": "P1", "lesion": "L9", "split": "test"}]
    ws = make_workspace(tmp_path, rows)
    with pytest.raises(LeakageError, match="same_patient"):
        freeze_split(ws, "leaky", progress=False)
    assert not (ws.path / "manifests" / "leaky.csv").exists()
    result = freeze_split(ws, "leaky", allow_leaks=True, progress=False)
    assert result.manifest.leak_check["known_leaks"] == {"same_patient": 1}


def test_freeze_refuses_files_changed_since_the_scan(tmp_path):
    ws = make_workspace(tmp_path, CLEAN)
    save(blob_image(99), tmp_path / "data" / "img2.png")
    with pytest.raises(ManifestError, match="changed since the scan"):
        freeze_split(ws, "v1", progress=False)


def test_freeze_pseudonymises_ids_and_copies_no_exif(tmp_path):
    ws = make_workspace(tmp_path, CLEAN)
    # a JPEG carrying patient-like EXIF (ImageDescription 0x010E, Artist 0x013B per Exif 2.32)
    from PIL import Image

    exif = Image.Exif()
    exif[0x010E] = "Jane Example, DOB 1970-01-01"
    exif[0x013B] = "Dr Who Took It"
    img_path = tmp_path / "data" / "exif.jpg"
    blob_image(50).save(img_path, exif=exif)
    sha = hashlib.sha256(img_path.read_bytes()).hexdigest()
    with ws.transaction() as con:
        con.execute(
            "INSERT INTO images(image_id, path, root, source, sha256, decodable, patient_id, lesion_id, "
            "first_seen, last_seen) VALUES (6, ?, ?, 'clinic_a', ?, 1, 'P9', 'L9', ?, ?)",
            (str(img_path), str(tmp_path / "data"), sha, utc_now(), utc_now()),
        )
        con.execute("INSERT INTO splits VALUES (6, 'train')")
    result = freeze_split(ws, "shared", pseudonymise=True, salt=SALT, progress=False)
    csv_text = result.files["csv"].read_text()
    table = pd.read_csv(result.files["csv"], dtype=str)
    assert "P1" not in table["patient_id"].tolist()
    assert table.loc[table["path"] == "img1.png", "patient_id"].item() == pseudonym("P1", SALT)
    assert table.loc[table["path"] == "img3.png", "lesion_id"].item() == pseudonym("L3", SALT)
    for text in ("Jane Example", "Dr Who", SALT):
        assert text not in csv_text and text not in result.files["sidecar"].read_text()
    assert json.loads(result.files["sidecar"].read_text())["pseudonymised"] is True
    with pytest.raises(ManifestError, match="salt"):
        freeze_split(ws, "nosalt", pseudonymise=True, progress=False)


# --- verify ----------------------------------------------------------------------------


def test_verify_a_fresh_manifest_is_clean(frozen):
    _, result = frozen
    check = verify_manifest(result.files["sidecar"], progress=False)
    assert check.ok, check.summary()
    assert check.n_images == 5


def test_verify_finds_changed_missing_and_extra_files(frozen, tmp_path):
    _, result = frozen
    data = tmp_path / "data"
    save(blob_image(77), data / "img1.png")      # changed content
    os.remove(data / "img3.png")                 # missing
    save(blob_image(78), data / "new" / "x.png")  # unexpected
    check = verify_manifest(result.files["csv"], progress=False)
    found = check.report.to_frame()
    assert check.counts() == {"changed_file": 1, "missing_file": 1, "unexpected_file": 1}
    assert found.set_index("reason").loc["changed_file", "file"] == "img1.png"
    assert found.set_index("reason").loc["unexpected_file", "file"] == "new/x.png"


def test_verify_finds_an_edited_split_column(frozen):
    _, result = frozen
    csv = result.files["csv"]
    table = pd.read_csv(csv, dtype=str, keep_default_na=False)
    table.loc[table["path"] == "img4.png", "split"] = "train"  # move a test image into train
    csv.write_text(table.to_csv(index=False, lineterminator="\n"))
    check = verify_manifest(csv, progress=False)
    assert check.counts() == {"fingerprint_mismatch": 1, "table_changed": 1}
    assert check.recorded_fingerprint != check.table_fingerprint


def test_verify_with_another_root_after_moving_the_data(frozen, tmp_path):
    _, result = frozen
    moved = tmp_path / "moved"
    shutil.move(tmp_path / "data", moved)
    assert verify_manifest(result.files["sidecar"], root=moved, progress=False).ok
    assert verify_manifest(result.files["sidecar"], progress=False).counts()["missing_file"] == 5


def test_load_manifest_needs_a_sidecar(tmp_path):
    p = tmp_path / "plain.csv"
    p.write_text("path,split,sha256\na.png,train,00\n")
    with pytest.raises(ManifestError, match="no sidecar"):
        load_manifest(p)


# --- command line ----------------------------------------------------------------------


def run(*args, **kwargs):
    return CliRunner().invoke(main, [str(a) for a in args], **kwargs)


def test_cli_freeze_and_verify_exit_codes(tmp_path):
    ws = make_workspace(tmp_path, CLEAN)
    r = run("freeze", ws.path, "--name", "v1", "-q")
    assert r.exit_code == 0, r.output
    assert "fingerprint" in r.output
    r = run("freeze", ws.path, "--name", "v1", "-q")
    assert r.exit_code == 2 and "already exists" in r.stderr
    sidecar = ws.path / "manifests" / "v1.manifest.json"
    assert run("verify", sidecar, "-q").exit_code == 0
    assert run("check", ws.path / "manifests" / "v1.csv", "-q", "--no-near-duplicates").exit_code == 0
    os.remove(tmp_path / "data" / "img2.png")
    r = run("verify", sidecar, "-q", "--json", tmp_path / "v.json")
    assert r.exit_code == 1
    assert json.loads((tmp_path / "v.json").read_text())["counts"] == {"missing_file": 1}
    plain = tmp_path / "plain.csv"
    plain.write_text("path,split\na.png,train\n")
    assert run("verify", plain, "-q").exit_code == 2
    bad = ws.path / "manifests" / "v1.manifest.json"
    bad.write_text(json.dumps(dict(json.loads(bad.read_text()), format_version=42)))
    r = run("verify", bad, "-q")
    assert r.exit_code == 2 and "format_version" in r.stderr


def test_cli_freeze_leaking_split_is_exit_1_and_writes_nothing(tmp_path):
    rows = CLEAN[:3] + [{"seed": 1, "copy_of": "img1.png", "name": "dup.png", "patient": "P7",
                         "lesion": "L7", "split": "test"}]
    ws = make_workspace(tmp_path, rows)
    r = run("freeze", ws.path, "--name", "v1", "-q")
    assert r.exit_code == 1 and "exact_duplicate" in r.stderr
    assert not (ws.path / "manifests" / "v1.csv").exists()
    r = run("freeze", ws.path, "--name", "v1", "-q", "--allow-leaks")
    assert r.exit_code == 1 and (ws.path / "manifests" / "v1.csv").exists()


def test_cli_freeze_salt_is_never_recorded(tmp_path, monkeypatch):
    ws = make_workspace(tmp_path, CLEAN)
    monkeypatch.setattr("sys.argv", ["curate", "freeze", str(ws.path), "--name", "p", "--pseudonymise",
                                     "--salt", SALT])
    r = run("freeze", ws.path, "--name", "p", "--pseudonymise", "--salt", SALT, "-q")
    assert r.exit_code == 0, r.output
    side = (ws.path / "manifests" / "p.manifest.json").read_text()
    assert SALT not in side and "--salt ***" in side
    assert run("freeze", ws.path, "--name", "q", "--pseudonymise", "-q").exit_code == 2
    assert run("freeze", ws.path, "--name", "q", "--salt", SALT, "-q").exit_code == 2
    monkeypatch.setenv("CURATE_PSEUDONYM_SALT", SALT)
    assert run("freeze", ws.path, "--name", "q", "--pseudonymise", "-q").exit_code == 0


def test_cli_freeze_without_a_split_is_exit_2(tmp_path):
    ws = make_workspace(tmp_path, [{"seed": 1, "patient": "P1"}])
    r = run("freeze", ws.path, "--name", "v1", "-q")
    assert r.exit_code == 2 and "no split" in r.stderr


# --- the committed sample manifests ------------------------------------------------------

SAMPLE = __import__("pathlib").Path(__file__).parent.parent / "sample_manifest"


def test_the_committed_samples_still_read_and_are_self_consistent():
    for name in ("demo", "demo_pseudonymised"):
        m = load_manifest(SAMPLE / f"{name}.csv")
        assert m.format_version == 1 and m.name == name
        assert m.recorded_fingerprint == m.fingerprint
        # reference: hashlib's SHA-256 of the committed CSV bytes equals the digest recorded at freezing
        assert hashlib.sha256((SAMPLE / f"{name}.csv").read_bytes()).hexdigest() == m.table_digests["csv"]
        assert m.table["path"].tolist() == sorted(m.table["path"])
    plain, pseudo = load_manifest(SAMPLE / "demo.csv"), load_manifest(SAMPLE / "demo_pseudonymised.csv")
    assert plain.fingerprint == pseudo.fingerprint  # same files, same splits
    assert pseudo.pseudonymised and not set(plain.table["patient_id"].dropna()) & set(
        pseudo.table["patient_id"].dropna())


def test_written_manifests_get_the_usual_file_mode(tmp_path):
    t = pd.DataFrame({"path": ["a"], "sha256": ["1"], "split": ["train"]})
    files = write_manifest(Manifest(t, name="m"), tmp_path)
    umask = os.umask(0)
    os.umask(umask)
    assert files["csv"].stat().st_mode & 0o777 == 0o666 & ~umask


def test_check_of_a_frozen_manifest_follows_the_recorded_id_scope(tmp_path):
    # two clinics both number a patient "P1": different people, so freezing them apart is fine
    rows = [
        {"seed": 1, "patient": "P1", "split": "train", "source": "clinic_a"},
        {"seed": 2, "patient": "P1", "split": "test", "source": "clinic_b"},
        {"seed": 3, "patient": "P2", "split": "train", "source": "clinic_a"},
    ]
    ws = make_workspace(tmp_path, rows)
    result = freeze_split(ws, "v1", progress=False)
    assert result.manifest.leak_check["patient_scope"] == "source"
    from curate.leakage_check import check_leakage

    assert check_leakage(result.files["csv"], near_duplicates=False, progress=False).ok
    # without its sidecar the same table is read cautiously, with one id space
    alone = tmp_path / "alone.csv"
    shutil.copy(result.files["csv"], alone)
    report = check_leakage(alone, root=tmp_path / "data", near_duplicates=False, progress=False)
    assert report.counts() == {"same_patient": 1}
