"""Training-class proposal: partition properties (hypothesis), merging, roll-up map."""

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from curate.taxonomy import Taxonomy, example_taxonomy
from curate.training_classes import REMAINDER_SUFFIX, propose_classes
from test_balance import random_tree  # the same random-tree builder as the balance tests


@st.composite
def scenarios(draw):
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    t = random_tree(rng, draw(st.integers(1, 30)))
    leaves_only = draw(st.booleans())
    where = t.leaves if leaves_only else t.order
    counts = {n: int(rng.integers(0, 40)) * int(rng.random() < 0.7) for n in where}
    max_images = draw(st.integers(1, 120))
    min_images = draw(st.integers(0, max_images))
    return t, pd.Series(counts, dtype=np.int64), max_images, min_images


@settings(max_examples=150, deadline=None)
@given(scenarios())
def test_partition_properties(case):
    t, counts, max_images, min_images = case
    p = propose_classes(counts, t, max_images=max_images, min_images=min_images)
    members = [m for c in p.classes for m in c.members]
    # every leaf in exactly one class; no node in two classes
    assert len(members) == len(set(members))
    assert set(t.leaves) <= set(members)
    # every node holding images is in a class, and class sizes add up
    assert {n for n, v in counts.items() if v > 0} <= set(members)
    for c in p.classes:
        assert c.images == sum(int(counts.get(m, 0)) for m in c.members)
    assert sum(c.images for c in p.classes) == int(counts.sum())
    # every class under the maximum unless it is one node's own images (a single leaf,
    # or the images labelled at an inner node itself)
    for c in p.classes:
        holding = [m for m in c.members if counts.get(m, 0) > 0]
        assert c.images <= max_images or len(holding) == 1
    # classes under the minimum are reported (or hold nothing)
    for c in p.classes:
        if 0 < c.images < min_images:
            assert c.name in p.reported
    # roll-up rows sum to one at every depth
    for depth in range(t.max_depth + 1):
        m = p.rollup(t, depth, include_empty=True)
        assert (m.sum(axis=1) == 1).all()
        assert set(m.index) == {c.name for c in p.classes}


def test_subtree_classes_descend_only_when_over_the_maximum():
    t = example_taxonomy()
    counts = pd.Series({"superficial_spreading_melanoma": 40, "nodular_melanoma": 30,
                        "melanoma_in_situ": 20, "basal_cell_carcinoma": 500, "psoriasis": 5, "eczema": 6})
    p = propose_classes(counts, t, max_images=100)
    names = [c.name for c in p.classes if c.images]
    assert "melanocytic" in names  # 90 images: the whole branch is one class
    assert "basal_cell_carcinoma" in names  # a leaf over the maximum stays one class
    assert "inflammatory" in names  # 11 images: one class for the whole branch
    assert "keratinocytic" not in names  # 500 images: descended
    assert set(p.trainable()) == set(names)


def test_inner_node_images_form_a_remainder_class():
    t = example_taxonomy()
    counts = pd.Series({"melanoma": 7, "nodular_melanoma": 50, "melanoma_in_situ": 50})
    p = propose_classes(counts, t, max_images=60)
    by_name = {c.name: c for c in p.classes}
    assert by_name["melanoma" + REMAINDER_SUFFIX].images == 7
    cls = p.class_of(pd.Series(["melanoma", "nodular_melanoma", None]))
    assert cls.tolist()[:2] == ["melanoma:other", "invasive_melanoma"] and pd.isna(cls.iloc[2])


def test_small_classes_merge_into_parent_or_are_reported():
    t = Taxonomy.from_records([
        {"id": "r", "parent": None, "name": "R"},
        {"id": "a", "parent": "r", "name": "A"},
        {"id": "a1", "parent": "a", "name": "A1"},
        {"id": "a2", "parent": "a", "name": "A2"},
        {"id": "a3", "parent": "a", "name": "A3"},
        {"id": "b", "parent": "r", "name": "B"},
    ])
    p = propose_classes(pd.Series({"a1": 30, "a2": 30, "a3": 2, "b": 50}), t, max_images=40, min_images=5)
    by_name = {c.name: c for c in p.classes}
    # a3 merges into a:other, which is still small and merges into r:other; the root has
    # no parent, so r:other is reported
    assert by_name["r:other"].members == ["r", "a", "a3"] and by_name["r:other"].images == 2
    assert p.reported == ["r:other"]
    # merging stops where the parent's class would go over the maximum
    p2 = propose_classes(pd.Series({"a1": 30, "a2": 30, "a3": 2, "r": 39}), t, max_images=40, min_images=5)
    assert "a:other" in p2.reported


def test_rollup_map_maps_fine_classes_to_coarse_nodes():
    t = example_taxonomy()
    counts = pd.Series({"nodular_melanoma": 50, "superficial_spreading_melanoma": 50,
                        "compound_naevus": 80, "basal_cell_carcinoma": 60})
    p = propose_classes(counts, t, max_images=70)
    m = p.rollup(t, 2)
    assert (m.sum(axis=1) == 1).all()
    assert m.loc["nodular_melanoma", "melanocytic"] == 1
    assert m.loc["compound_naevus", "melanocytic"] == 1
    assert m.loc["keratinocytic", "keratinocytic"] == 1  # 60 images: one class
    # renormalising over a subset of coarse nodes: probabilities summed per column
    probs = pd.Series(0.25, index=m.index)
    coarse = probs @ m
    assert coarse.sum() == pytest.approx(1.0)
    sub = coarse[["melanocytic"]] / coarse[["melanocytic"]].sum()
    assert sub.iloc[0] == pytest.approx(1.0)


def test_bad_arguments():
    t = example_taxonomy()
    with pytest.raises(ValueError, match="max_images"):
        propose_classes(pd.Series(dtype=int), t, max_images=0)
    with pytest.raises(ValueError, match="min_images"):
        propose_classes(pd.Series(dtype=int), t, max_images=5, min_images=6)
    with pytest.raises(ValueError, match="not in the taxonomy"):
        propose_classes(pd.Series({"nope": 3}), t, max_images=5)
