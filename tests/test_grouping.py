"""Leakage groups: components of patient, lesion, digest, pair and decision links."""

import hashlib

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from curate.grouping import GroupIssue, group_images, is_placeholder_id


def catalog(rows):
    """rows: (image_id, source, patient_id, lesion_id, sha256)."""
    return pd.DataFrame(rows, columns=["image_id", "source", "patient_id", "lesion_id", "sha256"])


def partition(groups: pd.Series) -> set:
    return {frozenset(ids) for ids in groups.groupby(groups).groups.values()}


def reference_partition(cat, pairs, *, link_verdicts=("exact", "near"), placeholders=()):
    """networkx 3.x connected_components over the same links, written out plainly."""
    graph = nx.Graph()
    graph.add_nodes_from(cat["image_id"])
    for col, scoped in (("patient_id", True), ("lesion_id", True), ("sha256", False)):
        keys = {}
        for r in cat.itertuples(index=False):
            value = getattr(r, col)
            if pd.isna(value) or str(value).strip().lower() in placeholders:
                continue
            key = (r.source, str(value).strip().lower()) if scoped else value
            keys.setdefault(key, []).append(r.image_id)
        for ids in keys.values():
            nx.add_path(graph, ids)
    for r in pairs.itertuples(index=False):
        if r.verdict in link_verdicts:
            graph.add_edge(r.image_a, r.image_b)
    return {frozenset(c) for c in nx.connected_components(graph)}  # networkx.connected_components


@st.composite
def catalogs(draw):
    n = draw(st.integers(1, 30))
    ids = draw(st.lists(st.integers(1, 10_000), min_size=n, max_size=n, unique=True))
    rows = []
    for i in ids:
        rows.append((
            i,
            draw(st.sampled_from(["a", "b"])),
            draw(st.one_of(st.none(), st.sampled_from(["p1", "P1 ", "p2", "p3", "unknown", "0"]))),
            draw(st.one_of(st.none(), st.sampled_from(["l1", "l2", "l3", "n/a"]))),
            draw(st.sampled_from(["d1", "d2", "d3", "d4", "d5", "d6", "d7", "d8"])),
        ))
    cat = catalog(rows)
    k = draw(st.integers(0, min(8, n * (n - 1) // 2)))
    pairs = []
    for _ in range(k):
        a, b = sorted(draw(st.lists(st.sampled_from(ids), min_size=2, max_size=2, unique=True))) if n > 1 else (0, 0)
        if a != b:
            pairs.append((a, b, draw(st.sampled_from(["exact", "near", "possible"]))))
    return cat, pd.DataFrame(pairs, columns=["image_a", "image_b", "verdict"])


@settings(max_examples=40, deadline=None)
@given(catalogs())
def test_groups_match_networkx_components(data):
    cat, pairs = data
    got = group_images(cat, pairs, max_id_share=1.0)
    expected = reference_partition(cat, pairs, placeholders={"unknown", "0", "n/a"})
    assert partition(got.groups) == expected
    assert got.groups.index.is_monotonic_increasing and len(got.groups) == len(cat)


@settings(max_examples=30, deadline=None)
@given(catalogs(), st.randoms(use_true_random=False))
def test_group_ids_do_not_depend_on_row_order(data, rnd):
    cat, pairs = data
    order = list(range(len(cat)))
    rnd.shuffle(order)
    a = group_images(cat, pairs, max_id_share=1.0).groups
    b = group_images(cat.iloc[order], pairs, max_id_share=1.0).groups
    pd.testing.assert_series_equal(a, b)


def test_group_id_depends_only_on_its_members():
    cat = catalog([(1, "a", "p1", None, "aa"), (2, "a", "p1", None, "bb"), (3, "a", "p2", None, "cc")])
    before = group_images(cat).groups
    more = pd.concat([cat, catalog([(4, "a", "p9", None, "00")])], ignore_index=True)
    after = group_images(more).groups
    assert before[1] == after[1] == after[2] and before[3] == after[3]
    assert before[1].startswith("g-") and len(before[1]) == 18


@pytest.mark.parametrize("value", ["unknown", "UNKNOWN ", "0", "000", "n/a", "NA", "none", "-", "", "null",
                                   "?", "999999", None, float("nan")])
def test_placeholder_values(value):
    assert is_placeholder_id(value)


@pytest.mark.parametrize("value", ["P0001", "10", "anne", "0x12", 12345])
def test_real_ids_are_not_placeholders(value):
    assert not is_placeholder_id(value)


def test_placeholder_patient_ids_join_nothing_and_are_listed():
    cat = catalog([(i, "a", "unknown", None, f"d{i}") for i in range(1, 6)] + [(6, "a", "p1", None, "d6")])
    g = group_images(cat)
    assert g.n_groups == 6
    assert g.report.counts() == {"placeholder_id": 1}
    assert g.placeholders[["column", "value", "images"]].values.tolist() == [["patient_id", "unknown", 5]]


def test_an_id_on_an_implausible_share_of_images_is_refused():
    rows = [(i, "a", "P7", None, f"d{i}") for i in range(1, 31)] + [(100 + i, "a", f"q{i}", None, f"e{i}")
                                                                   for i in range(70)]
    g = group_images(catalog(rows), max_id_share=0.2, min_overshared_images=10)
    assert g.n_groups == 100
    assert [f.reason for f in g.report] == [GroupIssue.OVERSHARED_ID]
    # the same id is fine under the default threshold (100 images at least)
    assert group_images(catalog(rows)).n_groups == 71


def test_patient_scope_global_joins_across_sources():
    cat = catalog([(1, "a", "p1", None, "d1"), (2, "b", "p1", None, "d2")])
    assert group_images(cat).n_groups == 2
    assert group_images(cat, patient_scope="global").n_groups == 1


def test_lesion_scope_patient_keeps_per_patient_numbering_apart():
    cat = catalog([(1, "a", "p1", "1", "d1"), (2, "a", "p2", "1", "d2")])
    assert group_images(cat).n_groups == 1
    assert group_images(cat, lesion_scope="patient").n_groups == 2


def decisions(rows):
    return pd.DataFrame(rows, columns=["decision_id", "image_a", "image_b", "decision", "decided_at", "undone"])


def test_decisions_join_and_separate():
    cat = catalog([(1, "a", None, None, "d1"), (2, "a", "p2", None, "d2"), (3, "a", "p3", None, "d3"),
                   (4, "a", None, None, "d4")])
    pairs = pd.DataFrame([(1, 2, "near"), (3, 4, "near")], columns=["image_a", "image_b", "verdict"])
    dec = decisions([
        (1, 1, 2, "different_lesions", "2026-01-01T00:00:00", 0),
        (2, 3, 4, "different_lesions", "2026-01-01T00:00:00", 0),
        (3, 4, 3, "same_lesion", "2026-01-02T00:00:00", 1),   # undone: does not count
        (4, 1, 4, "same_image", "2026-01-03T00:00:00", 0),
    ])
    g = group_images(cat, pairs, dec)
    assert partition(g.groups) == {frozenset({1, 4}), frozenset({2}), frozenset({3})}
    assert g.report.ok


def test_latest_decision_counts():
    cat = catalog([(1, "a", "p1", None, "d1"), (2, "a", "p2", None, "d2")])
    pairs = pd.DataFrame([(1, 2, "near")], columns=["image_a", "image_b", "verdict"])
    dec = decisions([(1, 1, 2, "different_lesions", "2026-01-01T00:00:00", 0),
                     (2, 2, 1, "same_lesion", "2026-01-02T00:00:00", 0)])
    assert group_images(cat, pairs, dec).n_groups == 1
    assert group_images(cat, pairs, dec.iloc[:1]).n_groups == 2


def test_a_decision_never_overrides_a_shared_lesion_id_or_digest():
    cat = catalog([(1, "a", "p1", "L1", "d1"), (2, "a", "p2", "L1", "d2"), (3, "a", "p3", None, "d3"),
                   (4, "a", "p4", None, "d3")])
    dec = decisions([(1, 1, 2, "different_lesions", "2026-01-01", 0),
                     (2, 3, 4, "different_lesions", "2026-01-01", 0)])
    g = group_images(cat, None, dec)
    assert g.n_groups == 2
    assert sorted(g.report.counts()) == ["decision_contradicts_digest", "decision_contradicts_id"]


def test_same_lesion_between_different_patient_ids_is_reported_and_joined():
    cat = catalog([(1, "a", "p1", None, "d1"), (2, "a", "p2", None, "d2")])
    g = group_images(cat, None, decisions([(1, 1, 2, "same_lesion", "2026-01-01", 0)]))
    assert g.n_groups == 1
    assert g.report.counts() == {"decision_contradicts_id": 1}


def test_kept_apart_pair_still_linked_elsewhere_is_reported():
    cat = catalog([(1, "a", "p1", None, "d1"), (2, "a", "p2", None, "d2"), (3, "a", "p3", None, "d3")])
    pairs = pd.DataFrame([(1, 2, "near"), (1, 3, "near"), (2, 3, "near")], columns=["image_a", "image_b", "verdict"])
    g = group_images(cat, pairs, decisions([(1, 1, 2, "different_lesions", "2026-01-01", 0)]))
    assert g.n_groups == 1
    assert [(f.reason, f.image_id, f.related_image_id) for f in g.report] == [
        (GroupIssue.KEPT_APART_BUT_LINKED, 1, 2)]


def test_report_tables():
    cat = catalog([(i, "a", f"p{i // 3}", None, f"d{i}") for i in range(10)])
    g = group_images(cat)
    dist = g.size_distribution()
    assert dist["images"].sum() == 10 and dist["groups"].sum() == 4
    assert g.largest(2)["images"].tolist() == [3, 3]
    assert g.sizes().sum() == 10
    assert "10 images in 4 groups" in g.summary()


@pytest.mark.parametrize("kwargs, match", [
    ({"patient_scope": "patient"}, "patient_scope"),
    ({"lesion_scope": "world"}, "lesion_scope"),
    ({"max_id_share": 0}, "max_id_share"),
])
def test_bad_arguments(kwargs, match):
    with pytest.raises(ValueError, match=match):
        group_images(catalog([(1, "a", "p", None, "d")]), **kwargs)


def test_duplicate_image_ids_are_refused():
    with pytest.raises(ValueError, match="image_id 1"):
        group_images(catalog([(1, "a", "p", None, "d"), (1, "a", "q", None, "e")]))


def test_large_catalog_stays_vectorised():
    rng = np.random.default_rng(0)
    n = 20_000
    cat = catalog([(i, "a", f"p{rng.integers(5000)}", None, f"{i:064x}") for i in range(n)])
    g = group_images(cat)
    assert g.n_groups == cat["patient_id"].nunique()


def test_empty_files_do_not_join_their_patients():
    # every zero-byte file has the SHA-256 of the empty message (FIPS 180-4); sharing it is not a copy
    empty = hashlib.sha256(b"").hexdigest()
    cat = catalog([(1, "a", "p1", None, empty), (2, "a", "p2", None, empty), (3, "a", "p3", None, "d3"),
                   (4, "a", "p4", None, "d3")])
    assert group_images(cat).n_groups == 3
