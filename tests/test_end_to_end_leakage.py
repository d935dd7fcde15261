"""Done-when of the leakage work: the demo, run end to end, freezes a split that `curate check`
finds clean, while the same images split naively (random per image) leak, and the leaks found
match what the demo planted (its truth folder, which the pipeline never reads)."""

import json

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from curate.cli import main
from curate.demo import generate_scenario
from curate.leakage_check import check_leakage
from curate.pipeline import run_pipeline

pytestmark = pytest.mark.slow

SPLITS = ["train", "validation", "test"]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    generate_scenario(out, n_images=160, random_state=1, progress=False, workers=1, image_scale=0.25)
    summary = run_pipeline(out, progress=False, echo=lambda line: None)
    truth = pd.read_csv(out / "truth" / "images.csv", dtype=str, keep_default_na=False)
    return out, summary, truth


def naive_split(truth: pd.DataFrame, seed: int) -> pd.DataFrame:
    """Every demo file, with the ids as the sources recorded them, split at random per image."""
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "path": truth["path"],
        "split": rng.choice(SPLITS, size=len(truth), p=[0.7, 0.15, 0.15]),
        "patient_id": truth["recorded_patient"],
        "lesion_id": truth["recorded_lesion"],
        "source": truth["source"],
    })


def linked(report) -> nx.Graph:
    """Images joined by the report's leaks (id leaks join each image to its key's anchor)."""
    g = nx.Graph()
    for row in report.to_frame().itertuples():
        if isinstance(row.path_b, str):
            g.add_edge(row.path_a, row.path_b, kind=row.kind)
    return g


def connected(g: nx.Graph, a: str, b: str) -> bool:
    return g.has_node(a) and g.has_node(b) and nx.has_path(g, a, b)


def test_the_frozen_demo_manifest_has_no_leaks(demo, tmp_path):
    out, summary, _ = demo
    assert summary["steps"]["freeze"]["frozen"] == "yes"
    manifest = out / "workspace" / "manifests" / "demo.csv"
    report = check_leakage(manifest, cache=tmp_path / "cache", progress=False)
    assert report.ok, report.summary()
    assert all(report.checks.values())
    result = CliRunner().invoke(main, ["check", str(manifest), "--cache", str(tmp_path / "cache"), "-q"])
    assert result.exit_code == 0, result.output
    assert CliRunner().invoke(main, ["verify", str(manifest), "-q"]).exit_code == 0


def test_a_naive_split_of_the_same_demo_leaks_every_planted_kind(demo, tmp_path):
    out, _, truth = demo
    naive = naive_split(truth, seed=0)
    naive.to_csv(tmp_path / "naive.csv", index=False)
    report = check_leakage(tmp_path / "naive.csv", root=out, patient_scope="source",
                           lesion_scope="source", cache=tmp_path / "cache", progress=False)
    counts = report.counts()
    for kind in ("exact_duplicate", "near_duplicate", "same_lesion", "same_patient", "unreadable_file"):
        assert counts.get(kind, 0) > 0, counts
    # the planted bad files (zero-byte, truncated, not an image) are the unreadable ones
    bad = set(truth.loc[truth["is_problem_file"] == "1", "path"])
    found = report.to_frame()
    assert set(found.loc[found["kind"] == "unreadable_file", "path_a"]) == bad
    # exit code 1 and the JSON report from the command line
    result = CliRunner().invoke(main, ["check", str(tmp_path / "naive.csv"), "--root", str(out), "--cache",
                                       str(tmp_path / "cache"), "-q", "--json", str(tmp_path / "r.json")])
    assert result.exit_code == 1
    assert json.loads((tmp_path / "r.json").read_text())["counts"]["unreadable_file"] == 3


def outside_main_split(table: pd.DataFrame, key_columns: list[str]) -> set[str]:
    """Images of each key spanning splits that sit outside the split holding most of that key
    (ties to the earlier of train, validation, test): the images the check must list."""
    out = set()
    for _, rows in table.groupby(key_columns):
        if rows["split"].nunique() < 2:
            continue
        counts = rows["split"].value_counts()
        main = max(counts.index, key=lambda s: (counts[s], -SPLITS.index(s)))
        out |= set(rows.loc[rows["split"] != main, "path"])
    return out


def test_same_lesion_and_patient_leaks_match_the_truth(demo, tmp_path):
    out, _, truth = demo
    naive = naive_split(truth, seed=0)
    report = check_leakage(naive, root=out, near_duplicates=False, patient_scope="source",
                           lesion_scope="source", progress=False)
    found = report.to_frame()
    for kind, column in (("same_lesion", "lesion_id"), ("same_patient", "patient_id")):
        recorded = naive[naive[column] != ""]
        expected = outside_main_split(recorded, ["source", column])
        assert expected, kind
        assert set(found.loc[found["kind"] == kind, "path_b"]) == expected, kind
    # and the recorded ids really are the demo's true lesions: no two true lesions share one
    rec = truth[truth["recorded_lesion"] != ""]
    assert (rec.groupby(["source", "recorded_lesion"])["true_lesion"].nunique() == 1).all()


@pytest.fixture(scope="module")
def copies_found(demo, tmp_path_factory):
    """Originals in train, their planted copies in test: is each copy joined to its original?"""
    out, _, truth = demo
    usable = truth[truth["is_problem_file"] == "0"]
    copies = usable[usable["copy_of"] != ""]
    table = pd.DataFrame({
        "path": usable["path"],
        "split": np.where(usable["copy_of"] != "", "test", "train"),
    })
    cache = tmp_path_factory.mktemp("cache")
    report = check_leakage(table, root=out, cache=cache, progress=False)
    g = linked(report)
    split = table.set_index("path")["split"]
    found = {}
    for c in copies.itertuples():
        if split.get(c.copy_of) != "train":  # a copy of a copy: both sit in test
            continue
        found.setdefault(c.copy_kind, []).append(connected(g, c.copy_of, c.path))
    print("planted copies found per kind (found, planted):",
          {k: (sum(v), len(v)) for k, v in sorted(found.items())})
    return found


WHOLE_IMAGE_KINDS = ("byte_copy", "reencode", "resize", "rotate90", "rotate180", "rotate270",
                     "flip_h", "flip_v", "colour_shift")


def test_every_copy_of_a_whole_image_transform_is_found(copies_found):
    planted = [k for k in WHOLE_IMAGE_KINDS if k in copies_found]
    assert len(planted) >= 6, copies_found
    for kind in planted:
        assert all(copies_found[kind]), (kind, copies_found[kind])


def test_every_planted_kind_is_found_including_crops(copies_found):
    missed = {k: v for k, v in copies_found.items() if not all(v)}
    assert not missed, missed


def test_look_alike_lesions_are_not_called_near_duplicates(demo, tmp_path):
    out, _, truth = demo
    looks = pd.read_csv(out / "truth" / "lookalike_pairs.csv", dtype=str)
    rows = [{"path": p, "split": s} for a, b in zip(looks["path_a"], looks["path_b"])
            for p, s in ((a, "train"), (b, "test"))]
    table = pd.DataFrame(rows).drop_duplicates("path")
    report = check_leakage(table, root=out, cache=tmp_path / "cache", progress=False)
    assert report.counts().get("near_duplicate", 0) == 0, report.summary()
