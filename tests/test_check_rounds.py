"""The pipeline's check step joins the near-duplicates it finds and mends the split.

The pairs step spends its crop checks on each image's closest pairs, the leakage check on
pairs across splits, so the check can confirm a copy the pairs step left unsure. Here the
pairs step is made to miss the crops it confirmed (they are set back to ``possible``) and
the split is made to put each such copy's group apart from its original; the check must
then find them, join them and leave a split that a second check finds clean.
"""

import pandas as pd
import pytest

import curate.pipeline as pipeline
from curate.demo import generate_scenario
from curate.pair_store import add_found_pairs
from curate.pipeline import STEPS, Step, run_pipeline
from curate.split_store import mend_split
from curate.store import Workspace

pytestmark = pytest.mark.slow


def _missed_crops(ctx):
    """Stand-in for a pairs step that left its confirmed crops unsure."""
    ws = ctx.workspace
    crops = ws.read_sql("SELECT image_a, image_b FROM pairs WHERE verdict = 'near' AND crop = 1")
    with ws.transaction() as con:
        con.execute("UPDATE pairs SET verdict = 'possible' WHERE verdict = 'near' AND crop = 1")
    return {"set_back": [(int(a), int(b)) for a, b in crops.itertuples(index=False)]}


def _crops_apart(ctx):
    """Stand-in for a split that put each set-back crop's group in another split than its original."""
    ws = ctx.workspace
    pairs = ctx.results["miss_crops"]["set_back"]
    groups = ws.read_sql("SELECT image_id, group_id FROM groups").set_index("image_id")["group_id"]
    split = ws.read_sql("SELECT image_id, split FROM splits").set_index("image_id")["split"]
    names = ["train", "validation", "test"]
    moved = []
    for a, b in pairs:
        if groups[a] == groups[b]:
            continue
        other = next(n for n in names if n != split[a])
        members = groups.index[groups == groups[b]]
        split[members] = other
        moved.append((int(a), int(b)))
    with ws.transaction() as con:
        con.executemany("UPDATE splits SET split = ? WHERE image_id = ?",
                        [(s, int(i)) for i, s in split.items()])
    return {"pairs_apart": moved}


def _steps():
    names = [s.name for s in STEPS]
    steps = list(STEPS)
    steps.insert(names.index("pairs") + 1, Step("miss_crops", _missed_crops))
    steps.insert(names.index("split") + 2, Step("crops_apart", _crops_apart))
    return steps


def _run(tmp_path_factory, name):
    out = tmp_path_factory.mktemp(name)
    generate_scenario(out, n_images=160, random_state=1, progress=False, workers=1, image_scale=0.25)
    summary = run_pipeline(out, progress=False, echo=lambda line: None, steps=_steps())
    return out, summary


@pytest.fixture(scope="module")
def mended(tmp_path_factory):
    return _run(tmp_path_factory, "mended")


def test_the_check_joins_what_it_found_and_the_last_check_is_clean(mended):
    _, summary = mended
    steps = summary["steps"]
    apart = steps["crops_apart"]["pairs_apart"]
    assert apart, "the scenario has no confirmed crop whose group could be moved"
    check = steps["check"]
    assert check["checks"] == 2, check
    assert check["pairs_joined_from_checks"] >= len(apart), check
    assert check["leaks"] == {}, check
    assert steps["freeze"]["frozen"] == "yes"
    # every check scored the same contents as the pairs step: its answer was read back
    assert steps["pairs"]["scored_pairs_read_back"] == "no"
    assert check["checks_reading_scored_pairs_back"] == 2, check
    ws = Workspace.open(summary["workspace"])
    verdict = ws.read_sql("SELECT image_a, image_b, verdict FROM pairs").set_index(["image_a", "image_b"])["verdict"]
    split = ws.read_sql("SELECT image_id, split FROM splits").set_index("image_id")["split"]
    for a, b in apart:
        assert verdict[min(a, b), max(a, b)] == "near"
        assert split[a] == split[b]


def test_with_one_check_the_leaks_stay_and_nothing_is_frozen(tmp_path_factory, monkeypatch):
    monkeypatch.setattr(pipeline, "CHECK_ROUNDS", 1)
    _, summary = _run(tmp_path_factory, "one_round")
    check = summary["steps"]["check"]
    assert check["checks"] == 1 and check["pairs_joined_from_checks"] == 0
    assert check["leaks"].get("near_duplicate", 0) >= len(summary["steps"]["crops_apart"]["pairs_apart"]) > 0
    assert summary["steps"]["freeze"]["frozen"].startswith("no")


def test_mending_moves_only_the_groups_a_new_pair_tore(mended):
    _, summary = mended
    ws = Workspace.open(summary["workspace"])
    before = ws.read_sql("SELECT image_id, split FROM splits").set_index("image_id")["split"]
    groups = ws.read_sql("SELECT image_id, group_id FROM groups").set_index("image_id")["group_id"]
    # join two images of different groups sitting in different splits
    table = pd.DataFrame({"image_id": before.index, "split": before.to_numpy(),
                          "group": groups.reindex(before.index).to_numpy()})
    a = table.iloc[0]
    b = table[(table["split"] != a["split"]) & (table["group"] != a["group"])].iloc[0]
    catalog = ws.catalog().set_index("image_id")["path"]
    leaks = pd.DataFrame({"kind": ["near_duplicate"], "path_a": [catalog[a["image_id"]]],
                          "path_b": [catalog[b["image_id"]]], "distance": [4.0],
                          "evidence": [{"d_phash": 4, "orientation": 1, "score": 0.9, "verdict": "near"}]})
    assert add_found_pairs(ws, leaks) == 1
    assignment, moved = mend_split(ws)
    after = assignment.splits
    torn = table["group"].isin([a["group"], b["group"]]).to_numpy()
    assert after[a["image_id"]] == after[b["image_id"]]
    # every image outside the two joined groups kept its split
    assert (after.reindex(before.index)[~torn] == before[~torn]).all()
    assert moved == int((after.reindex(before.index) != before).sum()) > 0


def test_found_pairs_naming_unknown_files_are_refused_whole(mended):
    _, summary = mended
    ws = Workspace.open(summary["workspace"])
    n = len(ws.read_sql("SELECT * FROM pairs"))
    path = ws.catalog()["path"].iloc[0]
    leaks = pd.DataFrame({"kind": ["near_duplicate"] * 2, "path_a": [path, path],
                          "path_b": [path, "/nowhere/x.jpg"], "distance": [0.0, 2.0], "evidence": [{}, {}]})
    with pytest.raises(ValueError, match="/nowhere/x.jpg"):
        add_found_pairs(ws, leaks)
    assert len(ws.read_sql("SELECT * FROM pairs")) == n


def test_mend_from_the_command_line(mended, tmp_path):
    from click.testing import CliRunner

    from curate.cli import main

    _, summary = mended
    ws = summary["workspace"]
    result = CliRunner().invoke(main, ["split", ws, "--mend"])
    # nothing new since the last mend: nothing moves
    assert result.exit_code in (0, 1), result.output
    assert "mended the stored split: 0 image(s) changed split" in result.output
    manifest = next((Workspace.open(ws).path / "manifests").glob("*.csv"))
    result = CliRunner().invoke(main, ["split", ws, "--mend", "--keep", str(manifest)])
    assert result.exit_code == 2 and "cannot be combined with --keep" in result.output
    Workspace.create(tmp_path / "empty")
    result = CliRunner().invoke(main, ["split", str(tmp_path / "empty"), "--mend"])
    assert result.exit_code == 2 and "no split to mend" in result.output
