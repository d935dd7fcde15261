"""Ingest on the generated demo scenario, scored against its truth folder."""

from __future__ import annotations

import json
import os

import pandas as pd
import pytest

from curate.ingest import exact_duplicates, scan_folder
from curate.report import IngestIssue
from curate.store import Workspace

demo = pytest.importorskip("curate.demo")


@pytest.fixture(scope="module")
def scanned(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    demo.generate_scenario(out, n_images=120, random_state=3, progress=False, workers=1, image_scale=0.2)
    ws = Workspace.create(out / "ws")
    results = []
    for source in json.loads((out / "sources.json").read_text()):
        results.append(
            scan_folder(ws, out / source["folder"], source=source["name"], metadata=out / source["metadata"],
                        columns=source["columns"], progress=False)
        )
    truth = pd.read_csv(out / "truth" / "images.csv", keep_default_na=False)
    truth["abs"] = [os.path.join(str(out), p) for p in truth["path"]]
    return out, ws, results, truth


def test_every_demo_file_is_catalogued_with_its_recorded_metadata(scanned):
    _, ws, _, truth = scanned
    cat = ws.catalog().set_index("path")
    assert set(cat.index) == set(truth["abs"])
    t = truth.set_index("abs")
    for column, recorded in [("patient_id", "recorded_patient"), ("lesion_id", "recorded_lesion"),
                             ("label", "recorded_label")]:
        ours = cat[column].fillna("")
        theirs = t.loc[ours.index, recorded].str.strip()
        assert (ours == theirs).all(), column


def test_planted_bad_files_are_exactly_the_file_problems_found(scanned):
    _, _, results, truth = scanned
    file_kinds = {IngestIssue.ZERO_BYTE.value, IngestIssue.TRUNCATED.value, IngestIssue.NOT_AN_IMAGE.value}
    expected = set()
    for row in truth.itertuples():
        for kind in set(row.problem_kind.split(";")) & file_kinds:
            expected.add((row.abs, kind))
    assert expected, "the demo plants bad files"
    found = {(f.file, f.as_dict()["reason"]) for r in results for f in r.report
             if f.as_dict()["reason"] in file_kinds}
    assert found == expected
    # and nothing else is wrong with the demo's metadata tables
    others = [f for r in results for f in r.report if f.as_dict()["reason"] not in file_kinds]
    assert others == []


def test_exact_duplicates_are_the_planted_byte_copies(scanned):
    out, ws, results, truth = scanned
    copies = truth[truth["copy_kind"] == "byte_copy"]
    assert len(copies), "the demo plants byte copies"
    expected = set(copies["abs"]) | {os.path.join(str(out), p) for p in copies["copy_of"]}
    found = exact_duplicates(ws)
    assert set(found["path"]) == expected
    assert results[-1].exact_duplicate_files == len(found)
