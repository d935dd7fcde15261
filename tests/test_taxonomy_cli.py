"""The taxonomy steps on the demo scenario, from the CLI and from Python."""

import json
import os

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from curate.balance import balance
from curate.cli import main
from curate.store import Workspace
from curate.taxonomy import example_taxonomy
from curate.taxonomy_workspace import node_frame


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    from curate.demo import generate_scenario
    from curate.pipeline import Step, run_pipeline, scan_sources

    out = tmp_path_factory.mktemp("demo")
    generate_scenario(out, n_images=120, random_state=3, progress=False, image_scale=0.3, workers=1)
    run_pipeline(out, progress=False, echo=lambda s: None, steps=(Step("scan", scan_sources),))
    return out


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def test_taxonomy_balance_classes_skin_tone_end_to_end(demo, tmp_path):
    ws_path = demo / "workspace"
    labels = tmp_path / "labels.csv"

    # 1. proposals only: nothing confirmed yet, so every label is listed as unmapped
    r = run("taxonomy", ws_path, "--labels", labels, "--propose")
    assert r.exit_code == 1, r.output
    assert "proposed" in r.output and labels.is_file()
    ws = Workspace.open(ws_path)
    nodes = ws.read_sql("SELECT node FROM image_nodes")
    assert len(nodes) == len(ws.catalog()) and nodes["node"].isna().all()

    # 2. accept the proposals: most images get a node; the rest are listed, none dropped
    r = run("taxonomy", ws_path, "--labels", labels, "--accept-proposed")
    assert r.exit_code in (0, 1), r.output
    frame = node_frame(ws)
    assert frame["node"].notna().mean() > 0.8

    # the assistant's accepted proposals against the scenario's truth (read only by this test):
    # the node must be the true node or one of its ancestors (a less specific label)
    tree = example_taxonomy()
    truth = pd.read_csv(demo / "truth" / "images.csv")
    truth["abs"] = [os.path.abspath(demo / p) for p in truth["path"]]
    m = frame.merge(truth, left_on="path", right_on="abs")
    relabelled = m["problem_kind"].fillna("").str.contains("conflicting_label")
    m = m[m["node"].notna() & m["true_node"].notna() & ~relabelled]
    assert len(m) > 50
    ok = [n in tree.ancestors(t) for n, t in zip(m["node"], m["true_node"])]
    assert np.mean(ok) > 0.9

    # 3. balance with a plot, by source
    png = tmp_path / "balance.png"
    csv_out = tmp_path / "balance.csv"
    r = run("balance", ws_path, "--depth", 3, "--by", "source", "--plot", png, "--csv", csv_out)
    assert r.exit_code in (0, 1), r.output
    assert png.read_bytes()[:4] == b"\x89PNG"
    assert "skin_condition" in r.output and "melanocytic" in r.output
    # the CLI table equals the Python API's
    api = balance(frame, tree, by="source", depth=3)
    cli = pd.read_csv(csv_out, index_col="node")
    assert cli["lesions"].tolist() == api["lesions"].tolist()

    # --by split before any split exists is an input error
    r = run("balance", ws_path, "--by", "split")
    assert r.exit_code == 2 and "split" in r.output

    # a split written (as the splits step would) is picked up
    ids = ws.read_sql("SELECT image_id FROM images")["image_id"]
    with ws.transaction() as con:
        con.executemany("INSERT INTO splits(image_id, split) VALUES (?, ?)",
                        [(int(i), ["train", "train", "validation", "test"][int(i) % 4]) for i in ids])
    r = run("balance", ws_path, "--by", "split", "--min-lesions", 1, "--plot", png)
    assert r.exit_code in (0, 1) and "lesions:train" in r.output

    # 4. skin tone, then balance by ITA bin
    r = run("skin-tone", ws_path, "-q")
    assert r.exit_code in (0, 1), r.output
    r = run("balance", ws_path, "--by", "ita_bin", "--depth", 1)
    assert r.exit_code in (0, 1), r.output
    assert any(col.startswith("lesions:") for col in r.output.split())

    # 5. training classes
    out = tmp_path / "classes"
    r = run("classes", ws_path, "--max-images", 15, "--min-images", 2, "--out", out, "--rollup-depth", 2)
    assert r.exit_code in (0, 1), r.output
    classes = pd.read_csv(out / "classes.csv")
    per_image = pd.read_csv(out / "image_classes.csv")
    mapped = per_image[per_image["node"].notna()]
    assert mapped["training_class"].notna().all()
    assert set(mapped["training_class"]) <= set(classes["class"])
    matrix = pd.read_csv(out / "rollup_depth2.csv", index_col="class")
    assert (matrix.sum(axis=1) == 1).all()
    doc = json.loads((out / "rollup_depth2.json").read_text())
    assert sorted(c for cs in doc["rollup"].values() for c in cs) == sorted(matrix.index)
    stored = ws.read_sql("SELECT training_class FROM image_nodes WHERE node IS NOT NULL")
    assert stored["training_class"].notna().all()


def test_bad_tree_is_an_input_error_naming_lines(demo, tmp_path):
    bad = tmp_path / "tree.csv"
    bad.write_text("id,parent,name,icd10\nskin,,Skin,\nx,nowhere,X,C4\n")
    r = run("taxonomy", demo / "workspace", "--tree", bad, "--labels", tmp_path / "m.csv")
    assert r.exit_code == 2
    assert "unknown_parent" in r.output and "bad_icd10" in r.output and "row 3" in r.output


def test_bad_mapping_file_is_an_input_error(demo, tmp_path):
    m = tmp_path / "m.csv"
    m.write_text("raw_label,node,status\nBCC,not_a_node,confirmed\n")
    r = run("taxonomy", demo / "workspace", "--labels", m)
    assert r.exit_code == 2 and "unknown_node" in r.output


def test_help_of_each_command():
    for name in ("taxonomy", "balance", "classes", "skin-tone"):
        r = run(name, "--help")
        assert r.exit_code == 0 and "Exit codes" in r.output


def _tiny_workspace(path, labels, lesions):
    from curate.store import utc_now

    ws = Workspace.create(path)
    now = utc_now()
    with ws.transaction() as con:
        con.executemany(
            "INSERT INTO images(path, root, source, label, lesion_id, patient_id, first_seen, last_seen) "
            "VALUES (?, ?, 's', ?, ?, 'P1', ?, ?)",
            [(f"/x/{i}.jpg", "/x", lab, les, now, now) for i, (lab, les) in enumerate(zip(labels, lesions))],
        )
    return ws


def test_taxonomy_exit_codes_on_a_hand_made_workspace(tmp_path):
    ws = _tiny_workspace(tmp_path / "ws", ["BCC", "bcc", "Mole", "???"], ["L1", "L1", "L2", "L3"])
    m = tmp_path / "m.csv"
    m.write_text("raw_label,node,status\nBCC,basal_cell_carcinoma,confirmed\nmole,naevus,confirmed\n")
    r = run("taxonomy", ws.path, "--labels", m)
    assert r.exit_code == 1 and "???" in r.output  # one label unmapped, listed
    problems = ws.problems("taxonomy")
    assert problems["kind"].tolist() == ["unmapped_label"]
    m.write_text(m.read_text() + "???,skin_condition,confirmed\n")
    r = run("taxonomy", ws.path, "--labels", m)
    assert r.exit_code == 0, r.output
    assert ws.problems("taxonomy").empty
    # a lesion whose images carry two nodes is a conflict to review (exit 1)
    m.write_text("raw_label,node,status\nBCC,basal_cell_carcinoma,confirmed\n"
                 "bcc,basal_cell_carcinoma,confirmed\nmole,naevus,confirmed\n???,naevus,confirmed\n")
    ws2 = _tiny_workspace(tmp_path / "ws2", ["BCC", "mole"], ["L1", "L1"])
    r = run("taxonomy", ws2.path, "--labels", m)
    assert r.exit_code == 1 and "lesion" in r.output and "disjoint" in r.output
    # balance before any mapping is an input error
    ws3 = _tiny_workspace(tmp_path / "ws3", ["BCC"], ["L1"])
    assert run("balance", ws3.path).exit_code == 2
    assert run("classes", ws3.path, "--max-images", 5).exit_code == 2
