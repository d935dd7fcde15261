"""The workspace report: the counts it shows come from the workspace tables."""

import numpy as np
import pandas as pd
from click.testing import CliRunner
from PIL import Image

from curate.cli import main
from curate.store import Workspace
from curate.workspace_report import CAUTIONS, summarise


def _workspace(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    rng = np.random.default_rng(0)
    for i in range(6):
        Image.fromarray(rng.integers(0, 255, (20, 30, 3), dtype=np.uint8)).save(src / f"{i}.png")
    pd.DataFrame(
        {"file": [f"{i}.png" for i in range(6)], "pid": ["p1", "p1", "p2", "p3", "p3", "p4"],
         "lid": ["a", "b", "c", "d", "d", "e"], "dx": ["BCC"] * 6}
    ).to_csv(src / "meta.csv", index=False)
    runner = CliRunner()
    ws_dir = str(tmp_path / "ws")
    assert runner.invoke(main, ["init", ws_dir]).exit_code == 0
    result = runner.invoke(main, ["scan", ws_dir, str(src), "--metadata", str(src / "meta.csv"),
                                  "--columns", "path=file,patient=pid,lesion=lid,label=dx", "--quiet"])
    assert result.exit_code == 0, result.output
    return Workspace.open(ws_dir)


def test_summary_counts_match_the_tables(tmp_path):
    ws = _workspace(tmp_path)
    with ws.transaction() as con:
        con.executemany("INSERT INTO splits(image_id, split) VALUES (?, ?)",
                        [(i, "train" if i <= 4 else "test") for i in range(1, 7)])
        con.executemany("INSERT INTO groups(image_id, group_id) VALUES (?, ?)",
                        [(1, "g1"), (2, "g1"), (3, "g2"), (4, "g3"), (5, "g3"), (6, "g4")])
    images = ws.read_sql("SELECT i.*, s.split FROM images i JOIN splits s USING (image_id)")
    s = summarise(images, groups=ws.read_sql("SELECT * FROM groups"))
    assert s.sources.loc["src", ["images", "patients", "lesions"]].tolist() == [6, 4, 5]
    assert s.splits.loc["train", "images"] == 4 and s.splits.loc["test", "patients"] == 2
    assert s.groups["groups"].to_dict()["2"] == 2 and s.groups["groups"].to_dict()["1"] == 2
    assert s.largest_groups["images"].tolist()[:2] == [2, 2]


def test_report_command_writes_markdown_with_cautions(tmp_path):
    ws = _workspace(tmp_path)
    result = CliRunner().invoke(main, ["report", str(ws.path), "--out", str(tmp_path / "r")])
    assert result.exit_code == 0, result.output
    text = (tmp_path / "r" / "report.md").read_text()
    assert all(c in text for c in CAUTIONS)
    assert "| src | 6 | 6 | 4 | 5 |" in text


def test_report_on_a_missing_workspace_is_an_input_error(tmp_path):
    result = CliRunner().invoke(main, ["report", str(tmp_path)])
    assert result.exit_code == 2
