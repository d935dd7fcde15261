"""Grouped stratified splits: properties, exhaustive optimum on tiny cases, scikit-learn protocol."""

import itertools

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.dummy import DummyClassifier
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import (
    GridSearchCV,
    GroupKFold,
    StratifiedGroupKFold,
    StratifiedKFold,
    cross_val_score,
)

from curate.splitting import BalancedGroupKFold, SplitIssue, assign, propose_split


def kfold_as_labels(cv, y, groups):
    fold = np.full(len(groups), -1)
    for k, (train, test) in enumerate(cv.split(np.zeros((len(groups), 1)), y, groups)):
        assert len(np.intersect1d(train, test)) == 0
        assert len(train) + len(test) == len(groups)
        fold[test] = k
    return fold


def assign_as_labels(y, groups, random_state=0):
    return assign(y, groups, fractions=[0.6, 0.25, 0.15], random_state=random_state)


#: every splitter as (name, function(y, groups, random_state) -> label per row)
SPLITTERS = [
    ("BalancedGroupKFold", lambda y, g, rs: kfold_as_labels(BalancedGroupKFold(3, random_state=rs), y, g)),
    ("assign", lambda y, g, rs: assign_as_labels(y, g, rs)),
]


def check_valid_assignment(labels, groups):
    """Every row assigned once, no group in two splits."""
    labels = np.asarray(labels)
    assert len(labels) == len(groups)
    assert not pd.isna(labels).any() and not (labels == -1).any()
    per_group = pd.DataFrame({"g": groups, "s": labels}).groupby("g")["s"].nunique()
    assert (per_group == 1).all()


@st.composite
def labelled_groups(draw, min_groups=3):
    n_groups = draw(st.integers(min_groups, 25))
    sizes = draw(st.lists(st.integers(1, 6), min_size=n_groups, max_size=n_groups))
    groups = np.repeat(np.arange(n_groups) * 7 + 3, sizes)
    y = np.asarray(draw(st.lists(st.sampled_from(["mel", "nev", "bcc", "ak"]), min_size=len(groups),
                                 max_size=len(groups))))
    return y, groups


@pytest.mark.parametrize("name, splitter", SPLITTERS)
@settings(max_examples=25, deadline=None)
@given(data=labelled_groups(), seed=st.integers(0, 2**16))
def test_split_properties(name, splitter, data, seed):
    y, groups = data
    labels = splitter(y, groups, seed)
    check_valid_assignment(labels, groups)
    # same seed, same assignment
    np.testing.assert_array_equal(labels, splitter(y, groups, seed))
    # renaming the classes does not change anything
    renamed = pd.Series(y).map({"mel": "zz", "nev": "aa", "bcc": "mm", "ak": "bb"}).to_numpy()
    np.testing.assert_array_equal(labels, splitter(renamed, groups, seed))
    # shuffling rows moves each row's label with it
    perm = np.random.default_rng(seed).permutation(len(y))
    np.testing.assert_array_equal(labels[perm], splitter(y[perm], groups[perm], seed))


def test_fractions_are_met_when_possible():
    groups = np.arange(400) // 2  # 200 groups of 2
    y = np.tile(["a", "a", "b", "c"], 100)
    out = assign(y, groups, fractions=[0.7, 0.15, 0.15], random_state=3)
    counts = pd.Series(out).value_counts()
    assert counts.to_dict() == {"train": 280, "validation": 60, "test": 60}
    per_class = pd.crosstab(y, out, normalize="index")
    np.testing.assert_allclose(per_class[["train", "validation", "test"]].to_numpy(),
                               np.tile([0.7, 0.15, 0.15], (3, 1)), atol=0.02)


def plain_objective(y, split, targets):
    """Written out from the definition in curate._split_search, without numpy tricks."""
    classes = sorted(set(y))
    total = 0.0
    for c in classes:
        n_c = sum(1 for v in y if v == c)
        for s, t in enumerate(targets):
            share = sum(1 for v, x in zip(y, split) if v == c and x == s) / n_c
            total += (share - t) ** 2 / len(classes)
    for s, t in enumerate(targets):
        total += (sum(1 for x in split if x == s) / len(y) - t) ** 2
    return total


def test_tiny_cases_against_exhaustive_enumeration():
    rng = np.random.default_rng(11)
    targets = [0.5, 0.3, 0.2]
    gaps = []
    for trial in range(30):
        n_groups = int(rng.integers(3, 7))
        groups = np.repeat(np.arange(n_groups), rng.integers(1, 5, size=n_groups))
        y = rng.choice(["a", "b", "c"], size=len(groups))
        out = assign(y, groups, fractions=targets, names=["x", "y", "z"], random_state=trial)
        ours = plain_objective(y, ["xyz".index(v) for v in out], targets)
        best = min(plain_objective(y, [a[g] for g in groups], targets)
                   for a in itertools.product(range(3), repeat=n_groups))
        gaps.append(ours - best)
    gaps = np.asarray(gaps)
    assert gaps.min() > -1e-9  # nothing beats the enumerated optimum
    assert gaps.max() < 0.02
    assert (gaps < 1e-9).mean() >= 0.9  # the enumerated optimum itself, nearly always


@pytest.mark.filterwarnings("ignore:The groups parameter is ignored")
def test_one_image_per_group_matches_stratified_kfold_counts():
    # with singleton groups the problem is plain stratification; scikit-learn 1.x
    # StratifiedKFold puts floor or ceil of n_c / k of each class in every fold
    y = np.array([0] * 23 + [1] * 11 + [2] * 7)
    groups = np.arange(len(y))
    ours = kfold_as_labels(BalancedGroupKFold(4, random_state=0), y, groups)
    ref = kfold_as_labels(StratifiedKFold(4), y, groups)
    for c in range(3):
        assert sorted(np.bincount(ours[y == c], minlength=4)) == sorted(np.bincount(ref[y == c], minlength=4))


def test_agrees_with_group_kfold_on_the_guarantees():
    # scikit-learn 1.x GroupKFold and StratifiedGroupKFold: every group in exactly one
    # test fold, folds cover every row, n_splits folds; ours must give the same guarantees
    rng = np.random.default_rng(5)
    groups = rng.integers(0, 60, size=500)
    y = rng.integers(0, 4, size=500)
    for cv in (GroupKFold(5), StratifiedGroupKFold(5), BalancedGroupKFold(5, random_state=0)):
        fold = kfold_as_labels(cv, y, groups)
        check_valid_assignment(fold, groups)
        assert set(fold) == set(range(5)) and cv.get_n_splits() == 5


def test_balances_classes_better_than_stratified_group_kfold_on_its_objective():
    # scikit-learn StratifiedGroupKFold (1.x) as the reference on the same rows
    rng = np.random.default_rng(2)
    sizes = np.minimum(rng.zipf(2.0, size=300), 40)
    groups = np.repeat(np.arange(300), sizes)
    y = rng.choice(6, size=300, p=[0.4, 0.2, 0.15, 0.1, 0.1, 0.05])[groups]
    k = 5

    def squared_deviation(fold):
        return plain_objective(list(y), list(fold), [1 / k] * k)

    ours = kfold_as_labels(BalancedGroupKFold(k, random_state=0), y, groups)
    ref = kfold_as_labels(StratifiedGroupKFold(k), y, groups)
    assert squared_deviation(ours) <= squared_deviation(ref)


def test_inside_cross_val_score_and_grid_search():
    rng = np.random.default_rng(0)
    groups = np.repeat(np.arange(40), 3)
    X = rng.normal(size=(120, 3))
    y = (X[:, 0] + rng.normal(scale=0.5, size=120) > 0).astype(int)
    cv = BalancedGroupKFold(4, random_state=0)
    scores = cross_val_score(LogisticRegression(), X, y, groups=groups, cv=cv)
    assert scores.shape == (4,) and (scores > 0.5).all()
    search = GridSearchCV(LogisticRegression(), {"C": [0.1, 1.0]}, cv=cv).fit(X, y, groups=groups)
    assert search.n_splits_ == 4 and search.best_params_["C"] in (0.1, 1.0)
    dummy = cross_val_score(DummyClassifier(), X, y, groups=groups, cv=cv)
    assert dummy.shape == (4,)


def test_protocol_details():
    cv = BalancedGroupKFold(3, random_state=7)
    assert repr(cv) == "BalancedGroupKFold(max_sweeps=100, n_splits=3, overall_weight=1.0, random_state=7)"
    assert cv.get_n_splits() == 3
    with pytest.raises(ValueError, match="groups"):
        next(cv.split(np.zeros((4, 1)), [0, 1, 0, 1]))
    with pytest.raises(ValueError, match="number of groups"):
        next(cv.split(np.zeros((4, 1)), [0, 1, 0, 1], [1, 1, 2, 2]))
    train, test = next(cv.split(np.zeros((6, 1)), [0, 1] * 3, [1, 2, 3, 4, 5, 6]))
    assert train.dtype.kind == "i" and test.dtype.kind == "i"
    with pytest.raises(TypeError):
        BalancedGroupKFold(3, 0)  # options are keyword-only


@pytest.mark.parametrize("kwargs, match", [
    ({"n_splits": 1}, "n_splits"), ({"n_splits": 2.5}, "n_splits"),
    ({"overall_weight": -1}, "overall_weight"), ({"random_state": "x"}, "random_state"),
])
def test_bad_splitter_arguments(kwargs, match):
    with pytest.raises((ValueError, TypeError), match=match):
        BalancedGroupKFold(**kwargs)


@pytest.mark.parametrize("kwargs, match", [
    ({"fractions": [0.5, 0.6]}, "sum to 1"), ({"fractions": [1.0]}, "at least two"),
    ({"fractions": [0.5, 0.5], "names": ["a"]}, "names"), ({"fractions": [0.5, 0.5], "names": ["a", "a"]}, "distinct"),
    ({"fractions": [0.5, 0.5], "locked": ["zz", None, None, None]}, "not one of the split names"),
])
def test_bad_assign_arguments(kwargs, match):
    with pytest.raises(ValueError, match=match):
        assign([0, 1, 0, 1], [1, 2, 3, 4], **kwargs)


def small_catalog():
    return pd.DataFrame({
        "image_id": np.arange(1, 41),
        "group_id": [f"g{i // 2:02d}" for i in range(40)],
        "label": (["mel", "mel", "nev", "nev"] * 10)[:38] + ["rare", "rare"],
        "source": ["a", "b"] * 20,
    })


def test_propose_split_reports_classes_too_small_with_where_they_went():
    sa = propose_split(small_catalog(), stratify=["label", "source"], random_state=0)
    small = [f for f in sa.report if f.reason == SplitIssue.CLASS_TOO_SMALL]
    assert [f.value for f in small] == ["label=rare"]
    assert small[0].split in sa.names and sa.splits[39] == small[0].split
    table = sa.split_table()
    assert table["images"].sum() == 40 and list(table["split"]) == ["train", "validation", "test"]


def test_propose_split_keeps_locked_images_and_says_where_new_ones_went():
    cat = small_catalog()
    first = propose_split(cat.iloc[:30], random_state=0, stratify="label")
    keep = first.splits
    grown = cat.copy()
    grown.loc[grown["image_id"] == 33, "group_id"] = cat.loc[cat["image_id"] == 1, "group_id"].iloc[0]
    second = propose_split(grown, keep=keep, random_state=5, stratify="label")
    pd.testing.assert_series_equal(second.splits.loc[keep.index], keep)
    joined = [f for f in second.report if f.reason == SplitIssue.JOINED_LOCKED_GROUP]
    assert [(f.image_id, f.split) for f in joined] == [(33, keep[1])]
    assert second.splits[33] == keep[1]


def test_locked_group_spanning_two_splits_is_reported():
    cat = small_catalog()
    keep = pd.Series({1: "train", 2: "test"})  # images 1 and 2 share group g00
    sa = propose_split(cat, keep=keep, random_state=0)
    assert sa.splits[1] == "train" and sa.splits[2] == "test"
    assert [f.reason for f in sa.report if f.value == "g00"] == [SplitIssue.LOCKED_GROUP_SPLIT]


def test_propose_split_groups_the_catalog_when_no_group_column():
    cat = pd.DataFrame({"image_id": range(1, 9), "source": "a", "patient_id": list("aabbccdd"),
                        "lesion_id": None, "sha256": [f"d{i}" for i in range(8)]})
    sa = propose_split(cat, fractions=[0.5, 0.5], random_state=0)
    check_valid_assignment(sa.splits.to_numpy(), cat["patient_id"].to_numpy())
    assert sa.groups.nunique() == 4


def test_propose_split_is_keyed_by_image_id_not_row_order():
    cat = small_catalog()
    a = propose_split(cat, stratify="label", random_state=1).splits
    b = propose_split(cat.sample(frac=1, random_state=3), stratify="label", random_state=1).splits
    pd.testing.assert_series_equal(a, b)


def test_propose_split_errors_name_the_problem():
    with pytest.raises(ValueError, match="stratify column"):
        propose_split(small_catalog(), stratify="node")
    bad = small_catalog()
    bad.loc[3, "group_id"] = None
    with pytest.raises(ValueError, match="image_id 4"):
        propose_split(bad)


# --- workspace and command line ----------------------------------------------------------

import json  # noqa: E402

from click.testing import CliRunner  # noqa: E402

from curate.cli import main  # noqa: E402
from curate.split_store import build_groups, read_keep_manifest, split_workspace  # noqa: E402
from curate.store import Workspace, utc_now  # noqa: E402


def make_workspace(path, rows):
    """rows: (path, source, sha256, patient_id, lesion_id, label)."""
    ws = Workspace.create(path)
    now = utc_now()
    with ws.transaction() as con:
        con.executemany(
            "INSERT INTO images(path, root, source, sha256, patient_id, lesion_id, label, first_seen, "
            "last_seen, decodable) VALUES (?, '/data', ?, ?, ?, ?, ?, ?, ?, 1)",
            [(*r, now, now) for r in rows])
    return ws


def clean_rows(n=60):
    labels = ["mel", "nev", "bcc"]
    return [(f"/data/s{i // 2 % 2}/img{i:03d}.jpg", f"s{i // 2 % 2}", f"{i:064x}", f"p{i // 2}", None, labels[(i // 2) % 3])
            for i in range(n)]


def test_workspace_split_writes_tables_and_parameters(tmp_path):
    ws = make_workspace(tmp_path / "ws", clean_rows())
    sa = split_workspace(ws, fractions=[0.6, 0.2, 0.2], names=["tr", "va", "te"], stratify=["label"],
                         random_state=4)
    stored = ws.read_sql("SELECT image_id, split FROM splits ORDER BY image_id")
    assert stored["split"].tolist() == sa.splits.tolist()
    assert ws.read_sql("SELECT COUNT(*) AS n FROM groups")["n"].iloc[0] == 60
    params = json.loads(ws.get_meta("split_parameters"))
    assert params["fractions"] == [0.6, 0.2, 0.2] and params["names"] == ["tr", "va", "te"]
    assert params["stratify"] == ["label"] and params["random_state"] == 4 and params["keep"] is None
    # same seed, same split, byte for byte
    again = split_workspace(ws, fractions=[0.6, 0.2, 0.2], names=["tr", "va", "te"], stratify=["label"],
                            random_state=4)
    pd.testing.assert_series_equal(sa.splits, again.splits)


def test_keep_manifest_by_sha256_and_by_relative_path(tmp_path):
    ws = make_workspace(tmp_path / "ws", clean_rows(40))
    first = split_workspace(ws, fractions=[0.7, 0.3], random_state=0)
    cat = ws.catalog().set_index("image_id")
    by_sha = tmp_path / "m.csv"
    pd.DataFrame({"sha256": cat["sha256"], "split": first.splits}).to_csv(by_sha, index=False)
    by_path = tmp_path / "p.csv"
    rel = cat["path"].str.replace("/data/", "", regex=False)
    pd.DataFrame({"path": rel, "split": first.splits}).to_csv(by_path, index=False)
    for manifest in (by_sha, by_path):
        keep, counts = read_keep_manifest(manifest, ws.catalog())
        assert counts == {"rows": 40, "matched_rows": 40, "unmatched_rows": 0}
        pd.testing.assert_series_equal(keep.sort_index(), first.splits, check_names=False, check_index_type=False)
    # grow the workspace: the kept images stay put, the new ones are placed around them
    now = utc_now()
    with ws.transaction() as con:
        con.executemany("INSERT INTO images(path, root, source, sha256, patient_id, lesion_id, label, first_seen,"
                        " last_seen) VALUES (?, '/data', 's0', ?, ?, NULL, 'mel', ?, ?)",
                        [(f"/data/new{i}.jpg", f"{1000 + i:064x}", f"q{i}", now, now) for i in range(20)]
                        + [("/data/new_p0.jpg", f"{2000:064x}", "p0", now, now)])
    second = split_workspace(ws, fractions=[0.7, 0.3], random_state=9, keep=by_sha)
    pd.testing.assert_series_equal(second.splits.loc[first.splits.index], first.splits)
    assert second.report.counts() == {"joined_locked_group": 1}
    assert json.loads(ws.get_meta("split_parameters"))["keep"] == str(by_sha)


def test_keep_manifest_with_unknown_split_name_is_an_input_error(tmp_path):
    ws = make_workspace(tmp_path / "ws", clean_rows(10))
    bad = tmp_path / "bad.csv"
    pd.DataFrame({"sha256": [f"{0:064x}"], "split": ["holdout"]}).to_csv(bad, index=False)
    with pytest.raises(ValueError, match="holdout"):
        split_workspace(ws, fractions=[0.5, 0.5], keep=bad)


def test_build_groups_records_findings_as_problems(tmp_path):
    rows = clean_rows(10) + [(f"/data/u{i}.jpg", "s0", f"{500 + i:064x}", "unknown", None, "mel") for i in range(3)]
    ws = make_workspace(tmp_path / "ws", rows)
    grouping = build_groups(ws)
    assert grouping.report.counts() == {"placeholder_id": 1}
    assert ws.problems("groups")["kind"].tolist() == ["placeholder_id"]
    assert json.loads(ws.get_meta("group_parameters"))["groups"] == grouping.n_groups == 8


def test_cli_exit_codes(tmp_path, monkeypatch):
    runner = CliRunner()
    clean = make_workspace(tmp_path / "clean", clean_rows(60))
    flagged = make_workspace(tmp_path / "flagged", clean_rows(30) + [("/data/u.jpg", "s0", "ab" * 32, "0", None, "rare")])
    result = runner.invoke(main, ["groups", str(clean.path)])
    assert result.exit_code == 0, result.output
    assert "60 images in 30 groups" in result.output
    result = runner.invoke(main, ["groups", str(flagged.path)])
    assert result.exit_code == 1 and "placeholder_id" in result.output
    result = runner.invoke(main, ["split", str(clean.path), "--stratify", "label", "--seed", "2",
                                  "--plot", str(tmp_path / "shares.png")])
    assert result.exit_code == 0, result.output
    assert (tmp_path / "shares.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec 5.2)
    result = runner.invoke(main, ["groups", str(clean.path), "--plot", str(tmp_path / "sizes.png")])
    assert result.exit_code == 0 and (tmp_path / "sizes.png").stat().st_size > 0
    result = runner.invoke(main, ["split", str(flagged.path), "--stratify", "label"])
    assert result.exit_code == 1 and "class_too_small" in result.output and "label=rare" in result.output
    result = runner.invoke(main, ["split", str(clean.path), "--fractions", "0.7,0.7"])
    assert result.exit_code == 2 and "sum to 1" in result.output
    result = runner.invoke(main, ["split", str(clean.path), "--stratify", "node"])
    assert result.exit_code == 2 and "curate taxonomy" in result.output
    result = runner.invoke(main, ["groups", str(tmp_path)])
    assert result.exit_code == 2 and "not a curate workspace" in result.output

    def broken(*args, **kwargs):
        raise RuntimeError("boom")

    monkeypatch.setattr("curate.split_store.split_workspace", broken)
    result = runner.invoke(main, ["split", str(clean.path)])
    assert result.exit_code == 3


def test_stratify_by_taxonomy_depth_and_skin_tone_bin(tmp_path):
    from curate.split_store import split_catalog
    from curate.taxonomy import example_taxonomy

    ws = make_workspace(tmp_path / "ws", clean_rows(40))
    leaves = ["compound_naevus", "dermal_naevus", "nodular_melanoma", "basal_cell_carcinoma"]
    cat = ws.catalog()
    with ws.transaction() as con:
        con.executemany("INSERT INTO image_nodes(image_id, node, training_class) VALUES (?, ?, ?)",
                        [(i, leaves[i % 4], "x") for i in cat["image_id"]])
        con.executemany("INSERT INTO skin_tone(sha256, ita, ita_bin) VALUES (?, 30.0, ?)",
                        [(d, ["light", "tan"][k % 2]) for k, d in enumerate(cat["sha256"])])
    sa = split_workspace(ws, fractions=[0.5, 0.5], stratify=["node:1", "ita_bin"], random_state=0)
    tree = example_taxonomy()
    table = sa.class_table
    depth1 = table.loc[table["column"] == "node:1", "value"].unique()
    assert sorted(depth1) == sorted({tree.ancestor_at_depth(leaf, 1) for leaf in leaves})
    assert set(table.loc[table["column"] == "ita_bin", "value"]) == {"light", "tan"}
    assert "ita_bin" in split_catalog(ws).columns
    with pytest.raises(ValueError, match="depth"):
        split_workspace(ws, fractions=[0.5, 0.5], stratify=["node:x"])


def test_split_regroups_with_the_stored_options_and_new_decisions(tmp_path):
    ws = make_workspace(tmp_path / "ws", clean_rows(20))
    build_groups(ws, patient_scope="global", max_id_share=0.5)
    with ws.transaction() as con:  # a reviewer joins two patients' images after grouping
        con.execute("INSERT INTO decisions(image_a, image_b, decision, reviewer, decided_at) "
                    "VALUES (1, 20, 'same_lesion', 'r', '2026-01-01T00:00:00')")
    sa = split_workspace(ws, fractions=[0.5, 0.5], random_state=0)
    assert sa.splits[1] == sa.splits[20] and sa.groups[1] == sa.groups[20]
    stored = json.loads(ws.get_meta("group_parameters"))
    assert stored["patient_scope"] == "global" and stored["max_id_share"] == 0.5
    assert json.loads(ws.get_meta("split_parameters"))["group_parameters"]["patient_scope"] == "global"
