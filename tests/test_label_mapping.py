"""Label mapping: normalisation, proposals, mapping-file checks with line numbers, apply, conflicts."""

import pandas as pd
import pytest

from curate.errors import TaxonomyError
from curate.label_mapping import (
    SYNONYMS,
    apply_mapping,
    label_conflicts,
    merge_mappings,
    normalise_label,
    parse_mapping,
    propose_mappings,
    read_mapping,
    write_mapping,
)
from curate.taxonomy import TaxonomyIssue, example_taxonomy

TREE = example_taxonomy()


@pytest.mark.parametrize("raw, norm", [
    ("Seborrheic keratosis", "seborrhoeic keratosis"),
    ("  SEBORRHOEIC   KERATOSIS ", "seborrhoeic keratosis"),
    ("naevus, compound", "naevus compound"),
    ("Nevus", "naevus"),
    ("Bowen's disease", "bowen disease"),
    ("Hémangioma", "haemangioma"),
    ("basal-cell_carcinoma", "basal cell carcinoma"),
    (None, ""),
])
def test_normalise_label(raw, norm):
    assert normalise_label(raw) == norm


def test_every_synonym_points_at_a_node_of_the_example_tree():
    assert {v for v in SYNONYMS.values()} <= set(TREE.order)


@pytest.mark.parametrize("raw, node, method", [
    ("Basal cell carcinoma", "basal_cell_carcinoma", "exact"),
    ("basal_cell_carcinoma", "basal_cell_carcinoma", "exact"),
    ("BCC", "basal_cell_carcinoma", "synonym"),
    ("SCC", "squamous_cell_carcinoma", "synonym"),
    ("MM", "melanoma", "synonym"),
    ("AK", "actinic_keratosis", "synonym"),
    ("SK", "seborrhoeic_keratosis", "synonym"),
    ("mole", "naevus", "synonym"),
    ("blue nevus", "blue_naevus", "exact"),
    ("seborrheic keratosis", "seborrhoeic_keratosis", "exact"),
    ("naevus, junctional", "junctional_naevus", "reordered"),
    ("MM nodular", "nodular_melanoma", "synonym"),
    ("dermatofibrom", "dermatofibroma", "fuzzy"),
    ("basal cell carcinomma", "basal_cell_carcinoma", "fuzzy"),
    ("VW", "viral_wart", "initials"),
    ("psor", "psoriasis", "prefix"),
    ("CN", "", "none"),  # compound or congenital naevus: ambiguous, left for a person
    ("completely unrelated", "", "none"),
])
def test_proposals(raw, node, method):
    p = propose_mappings(pd.Series([raw]), TREE)
    assert p.loc[0, ["node", "method"]].tolist() == [node, method]
    assert p.loc[0, "status"] == "proposed"
    assert (p.loc[0, "score"] == 1.0) == (method in ("exact", "synonym") and raw != "MM nodular")


def test_proposals_group_spellings_and_count_images():
    p = propose_mappings(pd.Series(["BCC", "bcc", " BCC ", "Nevus", "naevus"]), TREE)
    assert p[["raw_label", "images"]].values.tolist() == [["BCC", 3], ["Nevus", 2]]
    assert set(p.loc[0, "variants"].split("; ")) == {"bcc", " BCC "}


def test_known_labels_get_no_proposal():
    p = propose_mappings(pd.Series(["BCC", "SCC"]), TREE, known={"bcc"})
    assert p["raw_label"].tolist() == ["SCC"]


def test_mapping_file_problems_listed_with_lines():
    text = (
        "raw_label,node,status\n"              # 1
        "BCC,basal_cell_carcinoma,confirmed\n"  # 2
        "SCC,no_such_node,confirmed\n"          # 3
        "bcc,melanoma,confirmed\n"              # 4 conflicts with line 2
        "AK,actinic_keratosis,maybe\n"          # 5
    )
    with pytest.raises(TaxonomyError) as exc:
        parse_mapping(text, TREE, file="map.csv")
    assert [(f.reason, f.row) for f in exc.value.problems] == [
        (TaxonomyIssue.UNKNOWN_NODE, 3),
        (TaxonomyIssue.CONFLICTING_MAPPING, 4),
        (TaxonomyIssue.BAD_STATUS, 5),
    ]
    with pytest.raises(TaxonomyError) as exc:
        parse_mapping("label,target\nx,y\n", TREE)
    assert [(f.reason, f.row) for f in exc.value.problems] == [(TaxonomyIssue.MISSING_COLUMNS, 1)]


def test_apply_uses_confirmed_rows_and_lists_everything_else():
    mapping = pd.DataFrame({
        "raw_label": ["BCC", "SCC", "mole", "junk"],
        "node": ["basal_cell_carcinoma", "squamous_cell_carcinoma", "naevus", ""],
        "status": ["confirmed", "proposed", "rejected", "proposed"],
    })
    labels = pd.Series(["bcc", "BCC", "SCC", "mole", "junk", "new", None])
    nodes, unmapped = apply_mapping(labels, mapping)
    assert nodes.tolist()[:2] == ["basal_cell_carcinoma"] * 2
    assert nodes.isna().sum() == 5  # nothing dropped: each unmapped image stays, node missing
    assert dict(zip(unmapped["raw_label"], unmapped["status"])) == {
        "SCC": "proposed", "mole": "rejected", "junk": "proposed", "new": "absent", "": "absent"}
    assert unmapped["images"].sum() == 5
    nodes2, unmapped2 = apply_mapping(labels, mapping, accept_proposed=True)
    assert nodes2[2] == "squamous_cell_carcinoma" and "junk" in set(unmapped2["raw_label"])


def test_propose_merge_write_read_round_trip_keeps_user_rows(tmp_path):
    path = tmp_path / "map.csv"
    assert read_mapping(path).empty
    user = pd.DataFrame({"raw_label": ["BCC"], "node": ["squamous_cell_carcinoma"], "status": ["confirmed"],
                         "score": [1.0], "method": ["user"], "images": [1], "variants": [""]})
    proposals = propose_mappings(pd.Series(["bcc", "SK"]), TREE)
    merged = merge_mappings(user, proposals)
    assert merged["raw_label"].tolist() == ["BCC", "SK"]
    assert merged.loc[0, "node"] == "squamous_cell_carcinoma"  # the person's choice wins
    write_mapping(merged, path)
    back = read_mapping(path, TREE)
    assert back["raw_label"].tolist() == ["BCC", "SK"] and back["line"].tolist() == [2, 3]


def test_label_conflicts_lesions_and_pairs():
    frame = pd.DataFrame({
        "image_id": [1, 2, 3, 4, 5],
        "lesion_id": ["L1", "L1", "L2", "L2", None],
        "node": ["nodular_melanoma", "melanoma", "dermatofibroma", "dermatofibroma", "compound_naevus"],
    })
    pairs = pd.DataFrame({"image_a": [3, 1, 2], "image_b": [5, 5, 4],
                          "verdict": ["exact", "possible", "near"]})
    c = label_conflicts(frame, pairs, TREE)
    assert c[["kind", "image_a", "image_b", "relation"]].values.tolist() == [
        ["lesion", 1, 2, "ancestor"],
        ["near", 2, 4, "disjoint"],
        ["exact", 3, 5, "disjoint"],
    ]  # pairs in (image_a, image_b) order; the "possible" pair is not checked
    assert label_conflicts(frame, None).shape[0] == 1  # no pairs table: lesions only
