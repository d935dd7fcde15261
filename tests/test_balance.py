"""Balance table: roll-up against networkx descendant sets, counting rules, flags, rendering."""

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from curate.balance import BalanceIssue, balance, check_balance, plot_balance, tree_view
from curate.taxonomy import Taxonomy, example_taxonomy


def random_tree(rng, n_nodes):
    recs = [{"id": "n0", "parent": None, "name": "root"}]
    for i in range(1, n_nodes):
        recs.append({"id": f"n{i}", "parent": f"n{int(rng.integers(0, i))}", "name": f"node {i}"})
    return Taxonomy.from_records(recs)


def random_frame(rng, t, n_images, *, with_missing=True):
    nodes = np.array(t.order)[rng.integers(0, len(t), n_images)]
    lesions = rng.integers(0, max(1, n_images // 3), n_images).astype(str).astype(object)
    patients = rng.integers(0, max(1, n_images // 6), n_images).astype(str).astype(object)
    if with_missing:
        lesions[rng.random(n_images) < 0.1] = None
        patients[rng.random(n_images) < 0.1] = None
    return pd.DataFrame({
        "image_id": np.arange(n_images),
        "node": nodes,
        "lesion_id": lesions,
        "patient_id": patients,
        "split": rng.choice(["train", "validation", "test"], n_images),
    })


def naive_balance(frame, t, by=None):
    """Reference: per node, the rows whose node is in nx.descendants(G, node) | {node}.

    networkx 3.x ``nx.descendants`` on a DiGraph of parent -> child edges.
    Counting rules as documented in curate.balance: no lesion id -> own lesion
    (keyed by image id); no patient id -> patient of its own lesion.
    """
    g = nx.DiGraph()
    g.add_nodes_from(t.order)
    g.add_edges_from((t.parent(n), n) for n in t.order if t.parent(n) is not None)
    f = frame[frame["node"].notna()].copy()
    f["lk"] = [f"L{l}" if not pd.isna(l) else f"image:{i}" for l, i in zip(f["lesion_id"], f["image_id"])]
    f["pk"] = [f"P{p}" if not pd.isna(p) else f"lesion:{lk}" for p, lk in zip(f["patient_id"], f["lk"])]
    groups = [None] if by is None else sorted(f[by].unique())
    out = {}
    for n in t.order:
        sub = f[f["node"].isin(nx.descendants(g, n) | {n})]
        row = {"images": len(sub), "lesions": sub["lk"].nunique(), "patients": sub["pk"].nunique()}
        for gname in groups:
            if gname is None:
                continue
            s = sub[sub[by] == gname]
            row.update({f"images:{gname}": len(s), f"lesions:{gname}": s["lk"].nunique(),
                        f"patients:{gname}": s["pk"].nunique()})
        out[n] = row
    return pd.DataFrame.from_dict(out, orient="index")


@pytest.mark.parametrize("seed", range(5))
def test_rollup_matches_networkx_descendant_sets(seed):
    rng = np.random.default_rng(seed)
    t = random_tree(rng, 40)
    frame = random_frame(rng, t, 300)
    got = balance(frame, t, by="split")
    want = naive_balance(frame, t, by="split")
    pd.testing.assert_frame_equal(got[want.columns].astype(np.int64), want.astype(np.int64),
                                  check_names=False)


@settings(max_examples=30, deadline=None)
@given(st.integers(1, 25), st.integers(0, 60), st.integers(0, 2**32 - 1))
def test_rollup_property_against_networkx(n_nodes, n_images, seed):
    rng = np.random.default_rng(seed)
    t = random_tree(rng, n_nodes)
    frame = random_frame(rng, t, n_images)
    got = balance(frame, t)
    want = naive_balance(frame, t)
    assert got[["images", "lesions", "patients"]].to_numpy().tolist() == want.to_numpy().tolist()


def tiny():
    return Taxonomy.from_records([
        {"id": "skin", "parent": None, "name": "Skin"},
        {"id": "mel", "parent": "skin", "name": "Melanoma"},
        {"id": "ssm", "parent": "mel", "name": "SSM"},
        {"id": "nm", "parent": "mel", "name": "NM"},
        {"id": "nev", "parent": "skin", "name": "Naevus"},
    ])


def test_lesion_with_two_nodes_counts_once_at_their_common_ancestor():
    f = pd.DataFrame({"node": ["ssm", "nm", "nev"], "lesion_id": ["L1", "L1", "L2"],
                      "patient_id": ["P1", "P1", "P1"]})
    b = balance(f, tiny())
    assert b.loc["ssm", "lesions"] == 1 and b.loc["nm", "lesions"] == 1
    assert b.loc["mel", "lesions"] == 1  # not 2
    assert b.loc["skin", "lesions"] == 2 and b.loc["skin", "patients"] == 1


def test_images_without_lesion_or_patient_count_as_their_own():
    f = pd.DataFrame({"image_id": [1, 2, 3], "node": ["nev"] * 3, "lesion_id": [None, None, "L1"],
                      "patient_id": [None, None, None]})
    b = balance(f, tiny())
    assert b.loc["nev", ["images", "lesions", "patients"]].tolist() == [3, 3, 3]


def test_missing_key_columns_mean_every_image_is_its_own_lesion():
    f = pd.DataFrame({"node": ["nev", "nev"]})
    assert balance(f, tiny()).loc["nev", "lesions"] == 2


def test_unmapped_images_are_counted_aside_and_unknown_nodes_refused():
    f = pd.DataFrame({"node": ["nev", None, None]})
    assert balance(f, tiny()).attrs["unmapped_images"] == 2
    with pytest.raises(ValueError, match="not in the taxonomy"):
        balance(pd.DataFrame({"node": ["nope"]}), tiny())
    with pytest.raises(ValueError, match="by="):
        balance(pd.DataFrame({"node": ["nev"]}), tiny(), by="split")


def test_depth_keeps_rolled_counts_and_missing_group_values_form_their_own_group():
    f = pd.DataFrame({"node": ["ssm", "nm"], "lesion_id": ["a", "b"], "source": ["x", None]})
    b = balance(f, tiny(), depth=1, by="source")
    assert list(b.index) == ["skin", "mel", "nev"]
    assert b.loc["mel", "images"] == 2
    assert b.attrs["groups"] == ["(none)", "x"]


def test_flags_below_minimum_per_split_and_imbalance():
    rows = []
    for i in range(30):
        rows.append(("nev", f"n{i}", "train"))
        rows.append(("nev", f"t{i}", "test"))
    for i in range(12):
        rows.append(("ssm", f"m{i}", "train"))  # melanoma only in train
    f = pd.DataFrame(rows, columns=["node", "lesion_id", "split"])
    b = balance(f, tiny(), by="split", min_lesions=10)
    report = check_balance(b, min_lesions=10)
    got = {(x.reason, x.value, x.split) for x in report}
    assert (BalanceIssue.BELOW_MINIMUM, "mel", "test") in got
    assert (BalanceIssue.BELOW_MINIMUM, "ssm", "test") in got
    assert (BalanceIssue.IMBALANCED, "mel", "test") in got
    assert not any(v == "nev" and r == "below_minimum" for r, v, _ in got)
    assert "below_minimum[test]" in b.loc["mel", "flags"]
    assert b.loc["nm", "flags"] == ""  # no images: not flagged
    # by source: only the totals need the minimum
    f["source"] = "a"
    b2 = balance(f, tiny(), by="source", min_lesions=10)
    assert b2.loc["mel", "flags"] == ""


def test_bad_arguments():
    f = pd.DataFrame({"node": ["nev"]})
    with pytest.raises(ValueError):
        balance(f, tiny(), depth=-1)
    with pytest.raises(ValueError):
        check_balance(balance(f, tiny()), max_share_ratio=0.5)


def test_tree_view_indents_by_depth():
    f = pd.DataFrame({"node": ["ssm"]})
    view = tree_view(balance(f, tiny()))
    assert view["node"].str.rstrip().tolist() == ["skin", "  mel", "    ssm", "    nm", "  nev"]


def test_plot_is_a_png_with_one_panel_per_split(tmp_path):
    from PIL import Image

    rng = np.random.default_rng(1)
    t = example_taxonomy()
    frame = random_frame(rng, t, 200)
    b = balance(frame, t, by="split", depth=2)
    fig = plot_balance(b)
    assert len(fig.axes) == 3
    path = tmp_path / "balance.png"
    fig.savefig(path)
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with Image.open(path) as im:  # Pillow reads it back
        assert im.size[0] > 300
