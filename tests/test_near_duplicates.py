"""Near-duplicate scoring, verdicts, conflicts, clusters, workspace pairs and the CLI."""

import os
import shutil

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from PIL import Image, ImageDraw

from curate.near_duplicates import conflict_of, duplicate_clusters, score_pairs, transform_codes
from curate.pair_store import find_near_duplicates, find_pairs, load_pairs


# --- clusters against networkx ----------------------------------------------------------


@pytest.mark.parametrize("seed", range(8))
def test_clusters_match_networkx_components(seed):
    nx = pytest.importorskip("networkx")
    rng = np.random.default_rng(seed)
    ids = np.sort(rng.choice(10_000, size=120, replace=False))
    m = 90
    a, b = rng.choice(ids, m), rng.choice(ids, m)
    keep = a != b
    pairs = pd.DataFrame({"image_a": np.minimum(a, b)[keep], "image_b": np.maximum(a, b)[keep],
                          "verdict": rng.choice(["exact", "near", "possible"], keep.sum())})
    clusters = duplicate_clusters(pairs, ids)
    g = nx.Graph()
    g.add_nodes_from(ids.tolist())
    joined = pairs[pairs["verdict"].isin(["exact", "near"])]
    g.add_edges_from(zip(joined["image_a"].tolist(), joined["image_b"].tolist()))
    # reference: networkx 3.x connected_components gives the same partition
    ours = {frozenset(grp.index) for _, grp in clusters.groupby(clusters)}
    theirs = {frozenset(c) for c in nx.connected_components(g)}
    assert ours == theirs


def test_clusters_reject_unknown_images():
    pairs = pd.DataFrame({"image_a": [1], "image_b": [9], "verdict": ["near"]})
    with pytest.raises(ValueError, match="not in image_ids"):
        duplicate_clusters(pairs, [1, 2])


# --- bit-grid transforms against Pillow + imagehash --------------------------------------------


def _drawn(seed, size=96):
    rng = np.random.default_rng(seed)
    img = Image.new("RGB", (size, size), tuple(int(v) for v in rng.integers(120, 230, 3)))
    draw = ImageDraw.Draw(img)
    for _ in range(4):
        x, y = (int(v) for v in rng.integers(0, size - 30, 2))
        w, h = (int(v) for v in rng.integers(10, 40, 2))
        draw.ellipse([x, y, x + w, y + h], fill=tuple(int(v) for v in rng.integers(20, 200, 3)))
    return img


def _code(h):
    return int("".join("1" if b else "0" for b in h.hash.ravel()), 2)


@pytest.mark.parametrize("t", range(8))
def test_average_hash_grid_permutation_matches_transformed_image(t):
    imagehash = pytest.importorskip("imagehash")
    from curate.hashing import PIL_TRANSPOSE

    diffs = []
    for seed in range(10):
        img = _drawn(seed)
        turned = img if PIL_TRANSPOSE[t] is None else img.transpose(PIL_TRANSPOSE[t])
        # reference: imagehash 4.x average_hash of the rotated/flipped image
        want = np.array([_code(imagehash.average_hash(turned))], np.uint64)
        got = transform_codes(np.array([_code(imagehash.average_hash(img))], np.uint64), np.array([t]))
        diffs.append(bin(int(want[0]) ^ int(got[0])).count("1"))
    assert max(diffs) <= 2  # resampling of an 8x8 grid is symmetric up to rounding ties


# --- scoring on hashed drawn images -----------------------------------------------------------


def _write_set(folder):
    """Originals, a byte copy, a re-encode, a rotation, a flip, and unrelated drawings."""
    paths = {}
    for k in range(6):
        p = folder / f"orig{k}.png"
        _drawn(100 + k, 160).save(p)
        paths[f"orig{k}"] = p
    shutil.copy(paths["orig0"], folder / "byte.png")
    Image.open(paths["orig1"]).convert("RGB").save(folder / "reencode.jpg", quality=80)
    Image.open(paths["orig2"]).transpose(Image.Transpose.ROTATE_90).save(folder / "rot90.png")
    Image.open(paths["orig3"]).transpose(Image.Transpose.FLIP_LEFT_RIGHT).save(folder / "flip.png")
    return {("orig0.png", "byte.png"): "exact", ("orig1.png", "reencode.jpg"): "near",
            ("orig2.png", "rot90.png"): "near", ("orig3.png", "flip.png"): "near"}


def test_find_near_duplicates_on_a_folder(tmp_path):
    expected = _write_set(tmp_path)
    pairs = find_near_duplicates(tmp_path, workers=1, progress=False)
    names = {(os.path.basename(a), os.path.basename(b)): v
             for a, b, v in zip(pairs["path_a"], pairs["path_b"], pairs["verdict"])}
    for (a, b), verdict in expected.items():
        assert names.get((a, b), names.get((b, a))) == verdict, (a, b)
    confident = {frozenset(k) for k, v in names.items() if v in ("exact", "near")}
    assert confident == {frozenset(k) for k in expected}
    assert pairs["score"].is_monotonic_decreasing
    rot = pairs[[os.path.basename(p) == "rot90.png" or os.path.basename(q) == "rot90.png"
                 for p, q in zip(pairs["path_a"], pairs["path_b"])]]
    assert rot["orientation"].iloc[0] in (1, 3)  # rot90 one way or the other


@pytest.mark.parametrize("t", range(1, 8))
@pytest.mark.parametrize("turned_first", [False, True])
def test_orientation_turns_image_b_onto_image_a(tmp_path, t, turned_first):
    # reference: Pillow's Image.transpose makes the turned copy; the stored code, applied to
    # image b with the same Pillow operations (curate.thumbnails.orient), must give image a back
    from curate.hashing import PIL_TRANSPOSE
    from curate.thumbnails import orient

    original = _drawn(7, 160)
    turned = original.transpose(PIL_TRANSPOSE[t])
    files = [tmp_path / "original.png", tmp_path / "turned.png"]
    if turned_first:
        files.reverse()
    original.save(tmp_path / "original.png")
    turned.save(tmp_path / "turned.png")
    pairs = find_near_duplicates([str(f) for f in files], workers=1, progress=False)
    assert len(pairs) == 1
    row = pairs.iloc[0]
    image_a, image_b = (Image.open(row[c]).convert("RGB") for c in ("path_a", "path_b"))
    back = orient(image_b, int(row["orientation"]))
    assert back.size == image_a.size
    assert np.array_equal(np.asarray(back), np.asarray(image_a))


def test_empty_files_are_not_exact_duplicates_of_each_other():
    import hashlib

    # zero-byte files share the SHA-256 of the empty message (FIPS 180-4) but hold no image
    empty = hashlib.sha256(b"").hexdigest()
    cols = ["ahash", "dhash", "phash", "whash", "colorhash"] + [f"phash_t{t}" for t in range(8)]
    hashes = pd.DataFrame(np.random.default_rng(0).integers(0, 2**63, (1, len(cols))).astype(np.uint64),
                          columns=cols)
    hashes.insert(0, "sha256", ["s1"])
    catalog = pd.DataFrame({"image_id": [1, 2, 3, 4], "sha256": [empty, empty, "s1", "s1"]})
    pairs = score_pairs(catalog, hashes)
    assert pairs[["image_a", "image_b", "verdict"]].values.tolist() == [[3, 4, "exact"]]


def test_find_near_duplicates_takes_a_list_or_a_frame(tmp_path):
    _write_set(tmp_path)
    files = sorted(str(p) for p in tmp_path.iterdir())
    table = pd.DataFrame({"path": files, "label": ["naevus"] * len(files)})
    table.loc[table["path"].str.endswith("byte.png"), "label"] = "Melanoma"
    by_frame = find_near_duplicates(table, workers=1, progress=False)
    by_list = find_near_duplicates(files, workers=1, progress=False)
    assert len(by_frame) == len(by_list)
    exact = by_frame[by_frame["verdict"] == "exact"]
    assert exact["conflict"].tolist() == ["label"]
    with pytest.raises(ValueError, match="'path' column"):
        find_near_duplicates(pd.DataFrame({"file": files}))
    with pytest.raises(FileNotFoundError):
        find_near_duplicates(tmp_path / "missing")


def test_score_pairs_checks_its_inputs():
    with pytest.raises(ValueError, match="sha256"):
        score_pairs(pd.DataFrame({"image_id": [1]}), pd.DataFrame({"sha256": []}))
    with pytest.raises(ValueError, match="hash frame lacks"):
        score_pairs(pd.DataFrame({"image_id": [1], "sha256": ["a"]}), pd.DataFrame({"sha256": ["a"]}))


def test_one_hash_alone_does_not_make_a_near_pair():
    """Identical average hash but unrelated DCT/difference hashes: not near (look-alikes)."""
    cols = ["ahash", "dhash", "phash", "whash", "colorhash"] + [f"phash_t{t}" for t in range(8)]
    rng = np.random.default_rng(3)
    rows = rng.integers(0, 2**63, size=(2, len(cols))).astype(np.uint64)
    rows[1, 0] = rows[0, 0]  # same ahash
    rows[1, 3] = rows[0, 3]  # same whash
    rows[1, 4] = rows[0, 4]  # same colour
    h = pd.DataFrame(rows, columns=cols)
    h["phash_t0"] = h["phash"]
    h.insert(0, "sha256", ["x", "y"])
    out = score_pairs(pd.DataFrame({"image_id": [1, 2], "sha256": ["x", "y"]}), h)
    assert "near" not in set(out["verdict"])


def test_conflict_codes():
    got = conflict_of(["A b", "x", None, "x"], ["a  B", "y", "z", "y"], ["1", "1", "1", "2"],
                      ["1", "1", "2", None]).tolist()
    assert got == [None, "label", "patient", "label"]


# --- workspace and CLI -----------------------------------------------------------------------


def _workspace_with_images(tmp_path):
    from curate.store import Workspace, utc_now
    import hashlib

    folder = tmp_path / "img"
    folder.mkdir()
    _write_set(folder)
    ws = Workspace.create(tmp_path / "ws")
    now = utc_now()
    with ws.transaction() as con:
        for k, p in enumerate(sorted(folder.iterdir())):
            digest = hashlib.sha256(p.read_bytes()).hexdigest()
            con.execute(
                "INSERT INTO images(path, root, source, sha256, decodable, patient_id, label, first_seen, last_seen) "
                "VALUES (?, ?, 's', ?, 1, ?, 'naevus', ?, ?)",
                (str(p), str(folder), digest, f"p{k}", now, now),
            )
    return ws


def test_find_pairs_writes_the_table_once(tmp_path):
    ws = _workspace_with_images(tmp_path)
    first = find_pairs(ws, progress=False, workers=1)
    again = find_pairs(ws, progress=False, workers=1)
    stored = load_pairs(ws)
    assert len(first) == len(again) == len(stored)
    assert set(stored["verdict"]) >= {"exact", "near"}
    assert (stored["image_a"] < stored["image_b"]).all()
    assert set(stored.loc[stored["verdict"] == "exact", "conflict"]) == {"patient"}
    # the second run reads the crop check's answers back from the workspace
    assert first.attrs["crop_checked"] == again.attrs["crop_checked"] > 0
    assert (first.attrs["crop_cached"], again.attrs["crop_cached"]) == (0, again.attrs["crop_checked"])


def test_cli_pairs_writes_csv_and_exits_1_on_findings(tmp_path):
    from curate.cli import main

    ws = _workspace_with_images(tmp_path)
    out = tmp_path / "pairs.csv"
    result = CliRunner().invoke(main, ["pairs", str(ws.path), "--out", str(out), "-q", "--workers", "1"])
    assert result.exit_code == 1, result.output
    table = pd.read_csv(out)
    assert list(table.columns[:4]) == ["path_a", "path_b", "verdict", "score"]
    assert table["score"].is_monotonic_decreasing


def test_cli_pairs_exit_0_without_duplicates_and_2_on_bad_workspace(tmp_path):
    from curate.cli import main
    from curate.store import Workspace

    Workspace.create(tmp_path / "empty")
    assert CliRunner().invoke(main, ["pairs", str(tmp_path / "empty"), "-q"]).exit_code == 0
    result = CliRunner().invoke(main, ["pairs", str(tmp_path / "nothing"), "-q"])
    assert result.exit_code == 2 and "not a curate workspace" in result.output


# --- quality on a small demo scenario (the scorer in benchmarks/) ----------------------------


@pytest.mark.slow
def test_quality_targets_on_a_small_demo():
    """Recall per planted kind and precision of near, scored against the demo's truth folder.

    At 150 images a crop missed counts for several per cent, so the 0.95 crop target is
    measured by the benchmark at 1,200 and 5,000 images (docs/near_duplicates.md). What is
    asserted for crops here: every crop found as a candidate is confirmed ``near`` by the
    crop check.
    """
    import importlib.util
    from pathlib import Path

    spec = importlib.util.spec_from_file_location(
        "score_near_duplicates", Path(__file__).parents[1] / "benchmarks" / "score_near_duplicates.py")
    scorer = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(scorer)
    result = scorer.score_demo(150, 0, 8, workers=2, progress=False)
    per_kind = result["per_kind"]
    for kind in ("byte_copy", "reencode", "resize", "rotate90", "rotate180", "rotate270", "flip_h", "flip_v"):
        if kind in per_kind.index:
            assert per_kind.loc[kind, "recall"] >= scorer.TARGETS[kind], (kind, per_kind)
    assert per_kind["n"].sum() > 10
    if "crop>=75%" in per_kind.index:
        assert per_kind.loc["crop>=75%", "recall"] == per_kind.loc["crop>=75%", "found"], per_kind
    assert result["near_precision"] >= scorer.NEAR_PRECISION_TARGET, result["near_precision"]
    assert set(result.get("lookalike_verdicts", {})) <= {"none", "possible"}


# --- candidate generation: searching the coarse hashes adds nothing -----------------------


def _flip_bits(rng, code, n_bits):
    mask = 0
    for b in rng.choice(64, size=n_bits, replace=False):
        mask |= 1 << int(b)
    return np.uint64(int(code) ^ mask)


def _clustered_hash_frame(seed, n_clusters=25, size=6, windows_of_phash=False):
    """Hash rows in clusters: each family of each member moved 0-12 bits from its cluster's codes
    (with ``windows_of_phash`` the first crop window's code moves from the cluster's DCT hash,
    so windows of one member meet the DCT hash of another, some 9-10 bits apart)."""
    rng = np.random.default_rng(seed)
    families = ["ahash", "dhash", "phash", "whash", "colorhash"] + [f"phash_t{t}" for t in range(1, 8)]
    rows = []
    for c in range(n_clusters):
        base = {f: np.uint64(rng.integers(0, 2**63)) for f in families}
        base_crops = rng.integers(0, 2**63, size=4).astype(np.uint64)
        if windows_of_phash:
            base_crops[0] = base["phash"]
        for m in range(size):
            row = {f: _flip_bits(rng, base[f], int(rng.integers(0, 13))) for f in families}
            row["phash_t0"] = row["phash"]
            row["crop_hashes"] = np.array([_flip_bits(rng, x, int(rng.integers(0, 13))) for x in base_crops],
                                          dtype=np.uint64)
            row["sha256"] = f"{c:04d}{m:04d}".ljust(64, "0")
            rows.append(row)
    hashes = pd.DataFrame(rows)
    for f in families + ["phash_t0"]:
        hashes[f] = hashes[f].astype(np.uint64)
    catalog = pd.DataFrame({"image_id": np.arange(1, len(hashes) + 1), "sha256": hashes["sha256"]})
    return catalog, hashes


@pytest.mark.parametrize("seed", range(3))
def test_searching_only_difference_and_dct_hashes_loses_no_pair(seed, monkeypatch):
    # reference: the same scoring with every structural family searched for candidates
    import curate.near_duplicates as nd

    catalog, hashes = _clustered_hash_frame(seed)
    fast = score_pairs(catalog, hashes, radius=8)
    monkeypatch.setattr(nd, "CANDIDATE_FAMILIES", nd.STRUCTURAL)
    every = score_pairs(catalog, hashes, radius=8)
    key = ["image_a", "image_b"]
    assert len(every) > 50
    pd.testing.assert_frame_equal(fast.sort_values(key).reset_index(drop=True),
                                  every.sort_values(key).reset_index(drop=True))


def test_possible_pairs_are_capped_to_the_best_few_of_each_image():
    catalog, hashes = _clustered_hash_frame(5, n_clusters=8, size=12)
    every = score_pairs(catalog, hashes, radius=8, max_possible=None)
    capped = score_pairs(catalog, hashes, radius=8, max_possible=2, max_checks=0)
    key = ["image_a", "image_b"]
    confident = every[every["verdict"] != "possible"].sort_values(key).reset_index(drop=True)
    pd.testing.assert_frame_equal(confident, capped[capped["verdict"] != "possible"].sort_values(key)
                                  .reset_index(drop=True))
    possible = every[every["verdict"] == "possible"]
    kept = capped[capped["verdict"] == "possible"]
    assert 0 < len(kept) < len(possible)
    assert len(kept) <= 2 * len(catalog)
    scores = {}  # image -> its possible scores, best first (plain loop, independent of the code)
    for a, b, s in zip(possible["image_a"], possible["image_b"], possible["score"]):
        scores.setdefault(a, []).append(s)
        scores.setdefault(b, []).append(s)
    second_best = {i: sorted(v, reverse=True)[:2][-1] for i, v in scores.items()}
    for a, b, s in zip(kept["image_a"], kept["image_b"], kept["score"]):
        assert s >= second_best[a] or s >= second_best[b]
    for image, v in scores.items():
        n_kept = ((kept["image_a"] == image) | (kept["image_b"] == image)).sum()
        assert n_kept >= min(2, len(v))


def test_the_cap_keeps_every_pair_the_crop_check_would_choose():
    # reference: the crop check's choice (worth_checking) among all candidates, uncapped
    from curate.near_duplicates import worth_checking

    catalog, hashes = _clustered_hash_frame(5, n_clusters=8, size=12)
    every = score_pairs(catalog, hashes, radius=8, max_possible=None)
    chosen = every[worth_checking(every["image_a"], every["image_b"], every["verdict"], every["d_crop"],
                                  every["d_phash"], every["score"], per_image=3)]
    without = score_pairs(catalog, hashes, radius=8, max_possible=1, max_checks=0)
    capped = score_pairs(catalog, hashes, radius=8, max_possible=1, max_checks=3)
    key = ["image_a", "image_b"]
    missing_without = chosen[key].merge(without[key], how="left", indicator=True)["_merge"].eq("left_only")
    assert missing_without.any()  # the cap alone drops some of them
    kept = chosen[key].merge(capped[key], how="left", indicator=True)["_merge"]
    assert kept.eq("both").all()
    assert len(capped) < len(every)


@pytest.mark.parametrize("seed", range(2))
def test_pairs_found_only_beyond_the_radius_are_kept_when_worth_checking(seed):
    # reference: every candidate scored (max_possible=None), the crop check's choice among them
    from curate.near_duplicates import worth_checking

    catalog, hashes = _clustered_hash_frame(seed, n_clusters=6, size=14, windows_of_phash=True)
    every = score_pairs(catalog, hashes, radius=8, max_possible=None)
    closest = np.minimum(every["d_crop"], every["d_phash"].astype(float))
    beyond = every[every["d_crop"].between(9, 10) & (every["d_phash"] > 8)]
    chosen = every[worth_checking(every["image_a"], every["image_b"], every["verdict"], every["d_crop"],
                                  every["d_phash"], every["score"], per_image=3)]
    assert ((closest[chosen.index] > 8) & chosen.index.isin(beyond.index)).any()  # some chosen lie beyond
    capped = score_pairs(catalog, hashes, radius=8, max_possible=1, max_checks=3)
    key = ["image_a", "image_b"]
    assert chosen[key].merge(capped[key], how="left", indicator=True)["_merge"].eq("both").all()
    # and most pairs beyond the radius were not worth scoring
    assert beyond[key].merge(capped[key], how="left", indicator=True)["_merge"].eq("left_only").mean() > 0.5


@pytest.mark.parametrize("chunk", [7, 30])
def test_scoring_in_chunks_keeps_exactly_the_pairs_of_one_pass(chunk, monkeypatch):
    # reference: the same candidates scored in one pass (chunk larger than the candidate set)
    import curate.near_duplicates as nd

    catalog, hashes = _clustered_hash_frame(7, n_clusters=10, size=10)
    whole = score_pairs(catalog, hashes, radius=8, max_possible=2)
    monkeypatch.setattr(nd, "SCORE_CHUNK_PAIRS", chunk)
    chunked = score_pairs(catalog, hashes, radius=8, max_possible=2)
    assert (whole["verdict"] == "possible").sum() > 2 * chunk  # several chunks hold kept pairs
    pd.testing.assert_frame_equal(whole, chunked)
