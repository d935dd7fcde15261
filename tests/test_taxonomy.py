"""Taxonomy files: parsing YAML/CSV, every validation error with its line, tree queries."""

import pickle

import networkx as nx
import pytest

from curate.errors import TaxonomyError
from curate.taxonomy import (
    EXAMPLE_TAXONOMY_PATH,
    Taxonomy,
    TaxonomyIssue,
    check_taxonomy,
    example_taxonomy,
    parse_taxonomy,
    read_taxonomy,
)

DEMO_LEAVES = """superficial_spreading_melanoma nodular_melanoma lentigo_maligna_melanoma melanoma_in_situ
junctional_naevus compound_naevus dermal_naevus dysplastic_naevus blue_naevus basal_cell_carcinoma
squamous_cell_carcinoma actinic_keratosis bowen_disease seborrhoeic_keratosis solar_lentigo dermatofibroma
haemangioma pyogenic_granuloma psoriasis eczema tinea viral_wart""".split()

BAD_YAML = """\
format_version: 1
nodes:
  - {id: skin, parent: null, name: Skin, malignancy: benign}
  - {id: bcc, parent: skin, name: BCC, icd10: C4}
  - {id: bcc, parent: skin, name: BCC again}
  - {id: orphan, parent: nowhere, name: Orphan}
  - {id: second_root, parent: null, name: Another root}
  - {id: loop_a, parent: loop_b, name: A}
  - {id: loop_b, parent: loop_a, name: B}
  - {id: mel, parent: skin, name: Melanoma, malignancy: malignant}
  - {id: odd, parent: skin, name: Odd, malignancy: sinister}
  - {id: lower, parent: skin, name: Lower-case code, icd10: c43.9}
"""


def problems(exc_info):
    return sorted((f.reason, f.row) for f in exc_info.value.problems)


def test_every_yaml_problem_is_reported_at_once_with_its_line():
    with pytest.raises(TaxonomyError) as exc:
        parse_taxonomy(BAD_YAML, format="yaml", file="bad.yaml")
    assert problems(exc) == sorted([
        (TaxonomyIssue.BAD_ICD10, 4),
        (TaxonomyIssue.DUPLICATE_ID, 5),
        (TaxonomyIssue.UNKNOWN_PARENT, 6),
        (TaxonomyIssue.MULTIPLE_ROOTS, 7),
        (TaxonomyIssue.CYCLE, 8),
        (TaxonomyIssue.MALIGNANT_UNDER_BENIGN, 10),
        (TaxonomyIssue.BAD_MALIGNANCY, 11),
        (TaxonomyIssue.BAD_ICD10, 12),
    ])
    assert all(f.file == "bad.yaml" for f in exc.value.problems)


def test_every_csv_problem_is_reported_with_its_line():
    text = (
        "id,parent,name,icd10,malignancy\n"           # line 1
        "skin,,Skin,,benign\n"                        # 2
        "bcc,skin,BCC,C44.9,\n"                       # 3
        "bcc,skin,BCC again,,\n"                      # 4
        "x,nowhere,X,,\n"                             # 5
        "mel,skin,Melanoma,C43.,malignant\n"          # 6 (dot without digits)
        "r2,,Root two,,\n"                            # 7
    )
    with pytest.raises(TaxonomyError) as exc:
        parse_taxonomy(text, format="csv", file="bad.csv")
    assert problems(exc) == sorted([
        (TaxonomyIssue.DUPLICATE_ID, 4),
        (TaxonomyIssue.UNKNOWN_PARENT, 5),
        (TaxonomyIssue.BAD_ICD10, 6),
        (TaxonomyIssue.MALIGNANT_UNDER_BENIGN, 6),
        (TaxonomyIssue.MULTIPLE_ROOTS, 7),
    ])


def test_malignant_leaf_under_indeterminate_or_undeclared_node_is_fine():
    t = Taxonomy.from_records([
        {"id": "r", "parent": None, "name": "R"},
        {"id": "pre", "parent": "r", "name": "Pre", "malignancy": "indeterminate"},
        {"id": "bowen", "parent": "pre", "name": "Bowen", "malignancy": "malignant"},
    ])
    assert t.leaves == ["bowen"]


def test_malignant_leaf_deep_under_benign_ancestor_is_caught():
    rows = [
        {"id": "r", "parent": None, "name": "R", "malignancy": "benign", "line": 1},
        {"id": "mid", "parent": "r", "name": "Mid", "line": 2},
        {"id": "leaf", "parent": "mid", "name": "Leaf", "malignancy": "malignant", "line": 3},
    ]
    assert [(f.reason, f.row, f.value) for f in check_taxonomy(rows)] == [
        ("malignant_under_benign", 3, "leaf")
    ]


def test_cycle_without_any_root_reports_both():
    text = "id,parent,name\na,b,A\nb,a,B\n"
    with pytest.raises(TaxonomyError) as exc:
        parse_taxonomy(text, format="csv")
    assert sorted((f.reason, f.row or 0) for f in exc.value.problems) == [
        (TaxonomyIssue.CYCLE, 2), (TaxonomyIssue.NO_ROOT, 0)]


def test_self_parent_is_a_cycle():
    with pytest.raises(TaxonomyError) as exc:
        parse_taxonomy("id,parent,name\nr,,R\na,a,A\n", format="csv")
    assert problems(exc) == [(TaxonomyIssue.CYCLE, 3)]


@pytest.mark.parametrize("code", ["C43", "C43.9", "D22.91", "L57.0", "B07"])
def test_well_formed_icd10_codes_pass(code):
    # WHO ICD-10 code shape: letter, two digits, optional dot and further digits
    rows = [{"id": "r", "parent": None, "name": "R", "icd10": code}]
    assert check_taxonomy(rows).ok


@pytest.mark.parametrize("code", ["C4", "43.9", "C43.", "C4A", "CC43", "C43-9", "c43"])
def test_malformed_icd10_codes_fail(code):
    rows = [{"id": "r", "parent": None, "name": "R", "icd10": code, "line": 7}]
    assert [(f.reason, f.row, f.value) for f in check_taxonomy(rows)] == [("bad_icd10", 7, code)]


def test_missing_id_and_empty_files():
    rows = [{"id": " ", "parent": None, "name": "x", "line": 3}]
    assert [(f.reason, f.row) for f in check_taxonomy(rows)] == [("missing_id", 3)]
    assert [f.reason for f in check_taxonomy([])] == ["empty"]


def test_yaml_syntax_error_gives_its_line():
    with pytest.raises(TaxonomyError) as exc:
        parse_taxonomy("nodes:\n  - {id: a, parent: null\n  - oops: [\n", format="yaml")
    (finding,) = exc.value.problems
    assert finding.reason == "unreadable" and finding.row is not None


def test_yaml_without_node_list_and_csv_without_columns():
    with pytest.raises(TaxonomyError) as exc:
        parse_taxonomy("name: just a mapping\n", format="yaml")
    assert exc.value.problems[0].reason == "unreadable"
    with pytest.raises(TaxonomyError) as exc:
        parse_taxonomy("node,up\na,\n", format="csv")
    assert [(f.reason, f.row) for f in exc.value.problems] == [("missing_columns", 1)]


def test_yaml_bare_list_and_block_style_lines():
    text = "- id: r\n  parent:\n  name: Root\n- id: a\n  parent: r\n  name: A\n  icd10: X1\n"
    with pytest.raises(TaxonomyError) as exc:
        parse_taxonomy(text, format="yaml")
    assert problems(exc) == [(TaxonomyIssue.BAD_ICD10, 4)]  # the line where the item starts


def test_error_pickles_with_its_problems():
    with pytest.raises(TaxonomyError) as exc:
        parse_taxonomy(BAD_YAML, format="yaml")
    again = pickle.loads(pickle.dumps(exc.value))
    assert again.problems == exc.value.problems and str(again) == str(exc.value)


def test_read_taxonomy_rejects_unknown_suffix(tmp_path):
    p = tmp_path / "tree.txt"
    p.write_text("id,parent,name\n")
    with pytest.raises(ValueError, match="yaml"):
        read_taxonomy(p)


def test_csv_and_yaml_give_the_same_tree(tmp_path):
    yaml_tree = example_taxonomy()
    import csv

    p = tmp_path / "tree.csv"
    with p.open("w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=["id", "parent", "name", "icd10", "malignancy"])
        w.writeheader()
        for rec in yaml_tree.to_records():
            w.writerow({k: ("" if v is None else v) for k, v in rec.items()})
    csv_tree = read_taxonomy(p)
    assert csv_tree.to_records() == yaml_tree.to_records()


def test_example_tree_is_valid_and_holds_every_demo_leaf():
    t = read_taxonomy(EXAMPLE_TAXONOMY_PATH)
    assert len(t.leaves) >= 36  # "several dozen"
    assert set(DEMO_LEAVES) <= set(t.leaves)
    for branch in ("melanocytic_benign", "melanocytic_malignant", "keratinocytic_benign",
                   "keratinocytic_premalignant", "keratinocytic_malignant", "vascular",
                   "fibrous_adnexal", "inflammatory", "infectious"):
        assert branch in t and not t.is_leaf(branch)
    assert t.effective_malignancy("nodular_melanoma") == "malignant"
    assert t.effective_malignancy("blue_naevus") == "benign"


def _nx_tree(t):
    g = nx.DiGraph()
    g.add_nodes_from(t.order)
    g.add_edges_from((t.parent(n), n) for n in t.order if t.parent(n) is not None)
    return g


def test_tree_queries_match_networkx():
    # reference: networkx 3.x nx.descendants / nx.ancestors / shortest_path_length on the same edges
    t = example_taxonomy()
    g = _nx_tree(t)
    assert nx.is_arborescence(g)
    for n in t.order:
        assert set(t.descendants(n)) == nx.descendants(g, n) | {n}
        assert set(t.ancestors(n)) == nx.ancestors(g, n) | {n}
        assert t.depth(n) == nx.shortest_path_length(g, t.root, n)
    A = t.ancestor_matrix
    for i, n in enumerate(t.order):
        chain = [t.order[p] for p in A[:, i] if p >= 0]
        assert chain == list(reversed(t.ancestors(n)))
    assert t.ancestor_at_depth("nodular_melanoma", 2) == "melanocytic"
    assert t.ancestor_at_depth("neoplasm", 4) == "neoplasm"


def test_taxonomy_constructor_refuses_unchecked_nodes():
    from curate.taxonomy import TaxonomyNode

    with pytest.raises(ValueError):
        Taxonomy([TaxonomyNode("a", None, "A"), TaxonomyNode("b", None, "B")])
