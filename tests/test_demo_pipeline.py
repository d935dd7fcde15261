"""run_pipeline and `curate demo`: the steps run on the demo scenario and find what was planted."""

import hashlib
import json

import pandas as pd
import pytest
from click.testing import CliRunner
from PIL import Image

from curate.cli import main
from curate.demo import generate_scenario
from curate.pipeline import CAUTIONS, STEPS, Step, read_sources, run_pipeline


@pytest.fixture(scope="module")
def ran(tmp_path_factory):
    out = tmp_path_factory.mktemp("pipeline")
    generate_scenario(out, n_images=60, random_state=3, progress=False, workers=1, image_scale=0.25)
    lines = []
    summary = run_pipeline(out, progress=False, echo=lines.append)
    truth = pd.read_csv(out / "truth" / "images.csv", keep_default_na=False)
    return out, summary, lines, truth


def test_scan_finds_exactly_the_planted_bad_files(ran):
    out, summary, _, truth = ran
    kinds = truth["problem_kind"].str.split(";").explode()
    planted = {k: int((kinds == k).sum()) for k in ("truncated", "zero_byte", "not_an_image")}
    problems = summary["steps"]["scan"]["problems"]
    assert {k: problems.get(k, 0) for k in planted} == planted
    assert summary["steps"]["scan"]["files"] == len(truth)


def test_exact_duplicates_match_hashlib_over_the_files(ran):
    out, summary, _, truth = ran
    # reference: SHA-256 of each non-empty file with hashlib (FIPS 180-4)
    digests = pd.Series({p: hashlib.sha256((out / p).read_bytes()).hexdigest() for p in truth["path"]
                         if (out / p).stat().st_size > 0})  # fmt: skip
    counts = digests.value_counts()
    assert summary["steps"]["scan"]["exact_duplicate_groups"] == int((counts > 1).sum())
    assert summary["steps"]["scan"]["exact_duplicate_files"] == int(counts[counts > 1].sum())
    assert summary["steps"]["scan"]["exact_duplicate_groups"] >= (truth["copy_kind"] == "byte_copy").sum()


def test_catalog_carries_each_sources_metadata(ran):
    out, summary, _, truth = ran
    from curate.store import Workspace

    catalog = Workspace.open(summary["workspace"]).catalog()
    assert len(catalog) == len(truth)
    by_path = truth.assign(abs_path=[str(out / p) for p in truth["path"]]).set_index("abs_path")
    joined = catalog.drop(columns="source").set_index("path").join(by_path[["recorded_patient", "recorded_label", "source"]])
    assert (joined["patient_id"].fillna("") == joined["recorded_patient"]).all()
    assert (joined["label"].fillna("").str.strip() == joined["recorded_label"].str.strip()).all()
    archive = joined[joined["source"] == "derm_archive"]
    assert archive["lesion_id"].isna().all()  # the archive keeps no lesion ids


def test_summary_lines_end_with_the_cautions(ran):
    _, summary, lines, _ = ran
    assert lines[-1] == CAUTIONS == summary["cautions"]
    assert "does not diagnose" in CAUTIONS and "local law" in CAUTIONS
    assert [s.name for s in STEPS][0] == "scan"
    assert set(summary["steps"]) == {s.name for s in STEPS}


def test_steps_are_a_list_that_can_be_extended(ran):
    out, _, _, _ = ran
    seen = []
    step = Step("count", lambda ctx: seen.append(len(ctx.sources)) or {"sources": len(ctx.sources)})
    summary = run_pipeline(out, progress=False, echo=lambda line: None, steps=[step])
    assert seen == [4] and summary["steps"] == {"count": {"sources": 4}}


@pytest.mark.parametrize(
    "content, message",
    [
        ("{}", "non-empty list"),
        ("[1]", "entry 0: expected an object"),
        ('[{"name": "a", "folder": "a"}]', "entry 0: missing key"),
        ('[{"name": "a", "folder": "a", "metadata": "m", "columns": []}]', "'columns' must map"),
        ("not json", "not readable JSON"),
    ],
)
def test_bad_sources_json_is_a_specific_error(tmp_path, content, message):
    (tmp_path / "sources.json").write_text(content)
    with pytest.raises(ValueError, match=message):
        read_sources(tmp_path)


def test_missing_sources_json(tmp_path):
    with pytest.raises(FileNotFoundError, match="sources.json"):
        run_pipeline(tmp_path, progress=False, echo=lambda line: None)


def test_sources_json_written_by_the_demo_reads_back(ran):
    out, _, _, _ = ran
    assert read_sources(out) == json.loads((out / "sources.json").read_text())


# --- CLI ---------------------------------------------------------------------------


def test_curate_demo_runs_and_exits_zero(tmp_path):
    result = CliRunner().invoke(main, ["demo", str(tmp_path / "d"), "--images", "40", "--seed", "1", "--quiet",
                                       "--image-scale", "0.5"])
    with Image.open(next((tmp_path / "d" / "sources" / "north_clinic").glob("*.jpg"))) as im:
        assert im.size in {(300, 225), (256, 256)}
    assert result.exit_code == 0, result.output
    assert "demo scenario in" in result.output and "scan:" in result.output
    assert result.output.rstrip().endswith(CAUTIONS)
    assert (tmp_path / "d" / "workspace" / "curate.sqlite").is_file()


def test_curate_demo_refuses_too_few_images_and_foreign_folders(tmp_path):
    result = CliRunner().invoke(main, ["demo", str(tmp_path / "d"), "--images", "10"])
    assert result.exit_code == 2
    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "notes.txt").write_text("x")
    result = CliRunner().invoke(main, ["demo", str(tmp_path / "mine"), "--images", "40", "--quiet"])
    assert result.exit_code == 2
    assert "not empty" in result.output


def test_curate_demo_help():
    result = CliRunner().invoke(main, ["demo", "--help"])
    assert result.exit_code == 0 and "--images" in result.output and "--seed" in result.output


def test_later_steps_find_the_byte_copies_and_freeze_a_manifest(ran):
    out, summary, _, truth = ran
    from curate.store import Workspace

    ws = Workspace.open(summary["workspace"])
    catalog = ws.catalog().set_index("path")["image_id"]
    pairs = ws.read_sql("SELECT image_a, image_b, verdict FROM pairs")
    found = {(min(a, b), max(a, b)): v for a, b, v in pairs.itertuples(index=False)}
    for row in truth[truth["copy_kind"] == "byte_copy"].itertuples():
        a, b = catalog[str(out / row.path)], catalog[str(out / row.copy_of)]
        assert found.get((min(a, b), max(a, b))) == "exact"
    if "freeze" in summary["steps"] and summary["steps"]["freeze"]["frozen"] == "yes":
        for path in summary["steps"]["freeze"]["files"].split(", "):
            assert (out / path).is_file()


def test_freeze_is_refused_when_the_independent_check_found_leaks(ran):
    out, summary, _, _ = ran
    from curate.pipeline import PipelineContext, freeze_demo_split, read_sources
    from curate.store import Workspace

    ws = Workspace.open(summary["workspace"])
    manifests = sorted(p.name for p in (ws.path / "manifests").glob("*")) if (ws.path / "manifests").exists() else []
    ctx = PipelineContext(out, ws, read_sources(out), False, lambda line: None, leak_free=False)
    ctx.results["check"] = {"leaks": {"near_duplicate": 3}}
    result = freeze_demo_split(ctx)
    assert result["frozen"].startswith("no") and result["reason"] == "3 near_duplicate"
    after = sorted(p.name for p in (ws.path / "manifests").glob("*")) if (ws.path / "manifests").exists() else []
    assert after == manifests  # nothing written


def test_a_second_freeze_of_the_demo_takes_the_next_free_name(ran):
    out, summary, _, _ = ran
    from curate.pipeline import PipelineContext, freeze_demo_split, read_sources
    from curate.store import Workspace

    assert summary["steps"]["freeze"]["frozen"] == "yes"
    ws = Workspace.open(summary["workspace"])
    ctx = PipelineContext(out, ws, read_sources(out), False, lambda line: None, leak_free=True)
    result = freeze_demo_split(ctx)
    assert result["frozen"] == "yes", result
    assert "demo-2.csv" in result["files"] and (ws.path / "manifests" / "demo.csv").is_file()
