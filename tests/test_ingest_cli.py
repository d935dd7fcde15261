"""`curate scan` through click's CliRunner: every exit code, the summary line, --quiet."""

from __future__ import annotations

import pytest
from click.testing import CliRunner

import curate.ingest
from curate.cli import main
from curate.store import Workspace
from ingest_trees import drawn_image, save


@pytest.fixture
def folder(tmp_path):
    root = tmp_path / "clinic"
    save(root / "a.jpg", drawn_image())
    save(root / "b.png", drawn_image(colour=(10, 20, 30)))
    (root / "copy.jpg").write_bytes((root / "a.jpg").read_bytes())
    return root


def _run(*args):
    return CliRunner().invoke(main, ["scan", *map(str, args)])


def test_exit_0_on_a_clean_folder_and_summary_counts_exact_duplicates(tmp_path, folder):
    result = _run(tmp_path / "ws", folder, "--source", "north", "--quiet", "--workers", "1")
    assert result.exit_code == 0, result.output
    assert "north: 3 files (3 new" in result.output
    assert "no problems" in result.output
    assert "2 files share a SHA-256 with another (1 groups)" in result.output
    again = _run(tmp_path / "ws", folder, "--source", "north", "-q")
    assert again.exit_code == 0 and "3 unchanged" in again.output


def test_exit_1_when_problems_are_found(tmp_path, folder):
    (folder / "empty.jpg").write_bytes(b"")
    (folder / "text.webp").write_text("hello")
    result = _run(tmp_path / "ws", folder, "-q")
    assert result.exit_code == 1, result.output
    assert "2 problems (1 not_an_image, 1 zero_byte)" in result.output
    assert set(Workspace.open(tmp_path / "ws").problems("scan")["kind"]) == {"zero_byte", "not_an_image"}


def test_metadata_and_columns_options(tmp_path, folder):
    (folder / "meta.csv").write_text("file,who,dx\na.jpg,P1,naevus\nb.png,P2,bcc\nmissing.jpg,P3,x\n")
    result = _run(tmp_path / "ws", folder, "--metadata", folder / "meta.csv",
                  "--columns", "path=file,patient=who,label=dx", "-q")
    assert result.exit_code == 1 and "1 path_not_found" in result.output
    cat = Workspace.open(tmp_path / "ws").catalog()
    assert sorted(cat["patient_id"].dropna()) == ["P1", "P2"]


def test_metadata_only_form(tmp_path, folder):
    (folder / "list.csv").write_text("path,label\na.jpg,naevus\nb.png,bcc\n")
    result = _run(tmp_path / "ws", "--metadata", folder / "list.csv", "-q")
    assert result.exit_code == 0, result.output
    assert result.output.startswith("list: 2 files")  # source defaults to the CSV's name
    elsewhere = tmp_path / "l.csv"
    elsewhere.write_text("path\ncopy.jpg\n")
    result = _run(tmp_path / "ws", "--metadata", elsewhere, "--root", folder, "--source", "x", "-q")
    assert result.exit_code == 0 and "x: 1 files" in result.output


@pytest.mark.parametrize(
    "args, message",
    [
        (["{ws}", "{tmp}/nope"], "does not exist"),
        (["{ws}"], "give a FOLDER"),
        (["{ws}", "{folder}", "--columns", "colour=x"], "unknown field"),
        (["{ws}", "{folder}", "--metadata", "{tmp}/bad.csv"], "missing column"),
        (["{ws}", "{folder}", "--metadata", "{tmp}/none.csv"], "cannot read"),
        (["{ws}", "{folder}", "--root", "{tmp}"], "--root is for a metadata-only scan"),
    ],
)
def test_exit_2_on_unusable_input(tmp_path, folder, args, message):
    (tmp_path / "bad.csv").write_text("file,dx\na.jpg,x\n")  # no path column and no mapping
    values = {"ws": tmp_path / "ws", "tmp": tmp_path, "folder": folder}
    result = CliRunner().invoke(main, ["scan", *[a.format(**values) for a in args]])
    assert result.exit_code == 2, result.output
    assert message in result.output


def test_exit_3_on_an_internal_error(tmp_path, folder, monkeypatch):
    def broken(*args, **kwargs):
        raise RuntimeError("simulated bug")

    monkeypatch.setattr(curate.ingest, "scan_folder", broken)
    result = _run(tmp_path / "ws", folder, "-q")
    assert result.exit_code == 3 and "please report" in result.output


def test_progress_bars_show_unless_quiet(tmp_path, folder):
    loud = _run(tmp_path / "ws1", folder)
    quiet = _run(tmp_path / "ws2", folder, "--quiet")
    assert "reading clinic" in loud.output  # tqdm writes to stderr, which CliRunner mixes in
    assert "reading" not in quiet.output and "listing" not in quiet.output


def test_help_documents_exit_codes():
    result = CliRunner().invoke(main, ["scan", "--help"])
    assert result.exit_code == 0
    assert "2  usage or input error" in result.output and "--metadata" in result.output


def test_problem_rows_are_listed_under_the_summary_up_to_max_rows(tmp_path, folder):
    for i in range(3):
        (folder / f"empty{i}.jpg").write_bytes(b"")
    result = _run(tmp_path / "ws", folder, "-q", "--max-rows", "2")
    lines = result.output.splitlines()
    assert result.exit_code == 1 and "3 problems (3 zero_byte)" in lines[0]
    assert [line.split(":")[0].strip() for line in lines[1:3]] == ["zero_byte", "zero_byte"]
    assert lines[3].strip() == "... and 1 more"
