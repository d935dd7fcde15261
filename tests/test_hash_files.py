"""curate.hash_files: one reduced decode per file, EXIF orientation, cache, workers, Dask."""

from __future__ import annotations

import hashlib
import io
import pickle

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from hash_pictures import drawn as picture
from PIL import Image, ImageOps

import curate.hash_files as HF
from curate.hashing import CROP_WINDOWS, hash_thumbnail
from curate.store import Workspace, utc_now


def write(path, img, fmt="JPEG", **kw):
    img.save(path, fmt, **kw)
    return str(path)


@pytest.fixture
def folder(tmp_path):
    paths = [write(tmp_path / f"p{i}.jpg", picture(320, 240, i), quality=90) for i in range(5)]
    paths.append(write(tmp_path / "p5.png", picture(150, 100, 5), "PNG"))
    return tmp_path, paths


# --- one file ---------------------------------------------------------------------------


def test_jpeg_is_decoded_reduced_by_draft(tmp_path):
    data = io.BytesIO()
    picture(1600, 1200, 1).save(data, "JPEG", quality=90)
    thumb = HF.decode_for_hashing(data.getvalue())
    # Pillow's JpegImagePlugin.draft picks the 1/8 scale here (1600/8 x 1200/8); a full
    # decode shrunk by whole factors (Image.reduce rounds up) gives 134x100
    assert thumb.size == (200, 150) and thumb.mode == "RGB"
    full = HF.decode_for_hashing(data.getvalue(), draft=False)
    assert full.size == (134, 100)


@pytest.mark.parametrize("orientation", range(1, 9))
def test_exif_orientation_matches_pillow_exif_transpose(tmp_path, orientation):
    img = picture(120, 80, orientation)
    exif = Image.Exif()
    exif[0x0112] = orientation  # Exif tag 274, Orientation (Exif 2.32 / CIPA DC-008)
    p = write(tmp_path / "o.png", img, "PNG", exif=exif)
    got = HF.decode_for_hashing(open(p, "rb").read())
    # reference: Pillow's ImageOps.exif_transpose
    want = ImageOps.exif_transpose(Image.open(p)).convert("RGB")
    assert np.array_equal(np.asarray(got), np.asarray(want))


@pytest.mark.parametrize(
    "data, reason",
    [(b"", "zero_byte"), (b"plain text, not a picture", "not_an_image")],
)
def test_bad_bytes_raise_a_small_error_with_a_reason(data, reason):
    with pytest.raises(HF.HashError) as info:
        HF.decode_for_hashing(data, path="x.jpg")
    assert info.value.reason == reason and info.value.path == "x.jpg"
    back = pickle.loads(pickle.dumps(info.value))
    assert (back.path, back.reason, str(back)) == ("x.jpg", reason, str(info.value))


def test_truncated_jpeg_is_reported(tmp_path):
    data = io.BytesIO()
    picture(400, 300, 2).save(data, "JPEG", quality=90)
    cut = data.getvalue()[: len(data.getvalue()) // 2]
    with pytest.raises(HF.HashError) as info:
        HF.decode_for_hashing(cut, path="cut.jpg")
    assert info.value.reason in ("truncated", "decode_failed")


def test_sixteen_bit_and_transparent_images_are_hashed(tmp_path):
    a = (np.arange(100 * 120).reshape(100, 120) * 5 % 65535).astype(np.uint16)
    p16 = write(tmp_path / "g16.png", Image.fromarray(a), "PNG")
    rgba = picture(100, 100, 3).convert("RGBA")
    rgba.putalpha(128)
    pa = write(tmp_path / "a.png", rgba, "PNG")
    df = HF.hash_files([p16, pa], workers=1, progress=False)
    assert len(df) == 2 and df.attrs["report"].ok


# --- many files -------------------------------------------------------------------------


def test_hash_files_gives_the_hash_frame(folder):
    tmp, paths = folder
    bad = tmp / "empty.jpg"
    bad.write_bytes(b"")
    df = HF.hash_files(paths + [str(bad), paths[0]], workers=1, progress=False)
    assert list(df.columns) == ["path"] + HF.HASH_FRAME_COLUMNS
    assert list(df["path"]) == paths  # input order, duplicates once, the bad file left out
    for c in HF.CODE_COLUMNS:
        assert df[c].dtype == np.uint64
    assert (df["phash"] == df["phash_t0"]).all()
    assert all(len(c) == len(CROP_WINDOWS) and c.dtype == np.uint64 for c in df["crop_hashes"])
    for p, digest in zip(df["path"], df["sha256"]):
        assert digest == hashlib.sha256(open(p, "rb").read()).hexdigest()  # reference: hashlib
    one = hash_thumbnail(HF.decode_for_hashing(open(paths[2], "rb").read()))
    assert df.loc[2, "dhash"] == one["dhash"] and np.array_equal(df.loc[2, "crop_hashes"], one["crop_hashes"])
    report = df.attrs["report"]
    assert report.counts() == {"zero_byte": 1} and report.findings[0].file == str(bad)


def assert_same_hashes(a: pd.DataFrame, b: pd.DataFrame):
    a, b = a.sort_values("sha256").reset_index(drop=True), b.sort_values("sha256").reset_index(drop=True)
    pd.testing.assert_frame_equal(a.drop(columns="crop_hashes"), b.drop(columns="crop_hashes"))
    assert all(np.array_equal(x, y) for x, y in zip(a["crop_hashes"], b["crop_hashes"]))


def test_two_processes_give_the_same_result_as_one(folder):
    _, paths = folder
    paths = paths * 1
    one = HF.hash_files(paths, workers=1, progress=False)
    two = HF.hash_files(paths + [p + ".missing" for p in paths[:1]], workers=2, progress=False)
    assert_same_hashes(one, two)
    assert two.attrs["report"].counts() == {"path_not_found": 1}


def test_a_dask_cluster_gives_the_same_result(folder):
    distributed = pytest.importorskip("dask.distributed")
    _, paths = folder
    local = HF.hash_files(paths, workers=1, progress=False)
    with distributed.LocalCluster(n_workers=1, processes=False, threads_per_worker=2,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        remote = HF.hash_files(paths, client=client, progress=False)
        # the CLI's --scheduler path: connect by address
        by_address = HF.hash_files(paths, scheduler=cluster.scheduler_address, progress=False)
    assert_same_hashes(local, remote)
    assert_same_hashes(local, by_address)


def test_workers_must_be_positive(folder):
    with pytest.raises(ValueError, match="workers"):
        HF.hash_files(folder[1], workers=0, progress=False)
    with pytest.raises(ValueError, match="either client or scheduler"):
        HF.hash_files(folder[1], client=object(), scheduler="tcp://x:1", progress=False)


# --- the workspace cache ------------------------------------------------------------------


def add_to_catalog(ws: Workspace, paths, *, decodable=1, sha256=None):
    now = utc_now()
    with ws.transaction() as con:
        for p in paths:
            digest = sha256 or hashlib.sha256(open(p, "rb").read()).hexdigest()
            con.execute(
                "INSERT INTO images(path, root, source, sha256, decodable, first_seen, last_seen) "
                "VALUES (?, '/', 'test', ?, ?, ?, ?)",
                (str(p), digest, decodable, now, now),
            )


@pytest.fixture
def counted_decodes(monkeypatch):
    calls = []
    real = HF.decode_for_hashing

    def counting(data, **kw):
        calls.append(kw.get("path"))
        return real(data, **kw)

    monkeypatch.setattr(HF, "decode_for_hashing", counting)
    return calls


def test_rerun_hashes_only_new_digests(tmp_path, folder, counted_decodes):
    _, paths = folder
    ws = Workspace.create(tmp_path / "ws")
    add_to_catalog(ws, paths[:4])
    run = HF.hash_workspace(ws, workers=1, progress=False)
    assert (run.to_hash, run.hashed, run.failed) == (4, 4, 0) and len(counted_decodes) == 4
    # two new files, one of them a byte copy of a hashed one under another name
    copy = tmp_path / "copy_of_p0.jpg"
    copy.write_bytes(open(paths[0], "rb").read())
    add_to_catalog(ws, [paths[4], str(copy)])
    run = HF.hash_workspace(ws, workers=1, progress=False)
    assert (run.to_hash, run.hashed, run.cached) == (1, 1, 4)
    assert counted_decodes[4:] == [paths[4]]
    assert HF.hash_workspace(ws, workers=1, progress=False).to_hash == 0 and len(counted_decodes) == 5
    frame = HF.load_hashes(ws)
    assert len(frame) == 5 and list(frame.columns) == HF.HASH_FRAME_COLUMNS
    assert list(frame["sha256"]) == sorted(frame["sha256"])
    direct = HF.hash_files(paths[:5], workers=1, progress=False).drop(columns="path")
    assert_same_hashes(frame, direct)


def test_uint64_codes_survive_signed_storage(tmp_path, folder):
    ws = Workspace.create(tmp_path / "ws")
    add_to_catalog(ws, folder[1])
    HF.hash_workspace(ws, workers=1, progress=False)
    raw = ws.read_sql("SELECT ahash, dhash, phash, whash FROM hashes")
    loaded = HF.load_hashes(ws)
    codes = loaded[["ahash", "dhash", "phash", "whash"]].to_numpy().ravel()
    assert (codes >= 2**63).any() and (raw.to_numpy() < 0).any()  # the high bit was used
    # signed int64 in SQLite, back to the same uint64 bits
    assert np.array_equal(np.sort(raw.to_numpy().astype(np.int64).view(np.uint64).ravel()), np.sort(codes))


def test_failures_become_problems_and_do_not_stop_the_run(tmp_path, folder):
    _, paths = folder
    ws = Workspace.create(tmp_path / "ws")
    broken = tmp_path / "broken.jpg"
    broken.write_bytes(b"not an image at all")
    changed = tmp_path / "changed.jpg"
    changed.write_bytes(open(paths[1], "rb").read())
    add_to_catalog(ws, paths[:2] + [str(broken)])
    add_to_catalog(ws, [str(changed)], sha256="0" * 64)  # catalog digest no longer matches
    add_to_catalog(ws, [str(tmp_path / "gone.jpg")], sha256="1" * 64)
    add_to_catalog(ws, [paths[3]], decodable=0)  # ingest said undecodable: not our job
    run = HF.hash_workspace(ws, workers=1, progress=False)
    assert (run.hashed, run.failed) == (2, 3)
    problems = ws.problems("hash")
    assert sorted(problems["kind"]) == ["changed_since_scan", "not_an_image", "path_not_found"]
    assert set(problems["file"]) == {str(broken), str(changed), str(tmp_path / "gone.jpg")}
    # a re-run retries the failures and replaces their problem rows instead of piling up
    HF.hash_workspace(ws, workers=1, progress=False)
    assert len(ws.problems("hash")) == 3


def test_hash_files_uses_a_workspace_as_cache(tmp_path, folder, counted_decodes):
    _, paths = folder
    ws = Workspace.create(tmp_path / "ws")
    first = HF.hash_files(paths[:3], workspace=ws, workers=1, progress=False)
    assert len(counted_decodes) == 3 and len(HF.load_hashes(ws)) == 3
    again = HF.hash_files(paths, workspace=ws, workers=1, progress=False)
    assert len(counted_decodes) == 6  # only the three new files were decoded
    assert list(again["path"]) == paths
    assert_same_hashes(first, again.iloc[:3])


def test_cli_hash_command(tmp_path, folder):
    from curate.cli import main

    ws = Workspace.create(tmp_path / "ws")
    add_to_catalog(ws, folder[1][:3])
    result = CliRunner().invoke(main, ["hash", str(ws.path), "--workers", "1", "--quiet"])
    assert result.exit_code == 0, result.output
    assert "3 hashed" in result.output
    bad = tmp_path / "bad.jpg"
    bad.write_bytes(b"xx")
    add_to_catalog(ws, [str(bad)])
    result = CliRunner().invoke(main, ["hash", str(ws.path), "--workers", "1", "--quiet"])
    assert result.exit_code == 1 and "not_an_image" in result.output
    result = CliRunner().invoke(main, ["hash", str(tmp_path / "nowhere"), "--quiet"])
    assert result.exit_code == 2
    result = CliRunner().invoke(main, ["hash", str(ws.path), "--workers", "0"])
    assert result.exit_code == 2
    result = CliRunner().invoke(main, ["hash", "--help"])
    assert result.exit_code == 0 and "--scheduler" in result.output and "Exit codes" in result.output
