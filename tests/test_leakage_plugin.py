"""The pytest plugin, run inside a throw-away pytest session (pytest's own pytester fixture)."""

import shutil
from importlib.metadata import entry_points

from leakage_data import split_tree, write_csv

pytest_plugins = ["pytester"]

TEST_FILE = """
def test_split_is_clean(assert_no_leakage):
    report = assert_no_leakage(r"{manifest}", near_duplicates=False)
    assert report.ok

def test_report_fixture_does_not_fail(leakage_report):
    assert leakage_report(r"{manifest}", near_duplicates=False).n_images == 3
"""


def _run(pytester, manifest):
    pytester.makeconftest('pytest_plugins = ["curate.pytest_plugin"]')
    pytester.makepyfile(test_split=TEST_FILE.format(manifest=manifest))
    return pytester.runpytest("-q", "-p", "no:cacheprovider")


def test_plugin_passes_a_clean_manifest(pytester, tmp_path):
    split_tree(tmp_path, {"train": [1, 2], "test": [3]})
    rows = [{"path": p, "split": p.split("/")[0]} for p in ("train/img1.png", "train/img2.png", "test/img3.png")]
    manifest = write_csv(tmp_path / "split.csv", rows)
    result = _run(pytester, manifest)
    result.assert_outcomes(passed=2)


def test_plugin_fails_a_leaking_manifest_with_the_summary(pytester, tmp_path):
    split_tree(tmp_path, {"train": [1, 2], "test": [3]})
    shutil.copy(tmp_path / "train/img1.png", tmp_path / "test/img3.png")
    rows = [{"path": p, "split": p.split("/")[0], "patient": "P" + p[-5]}
            for p in ("train/img1.png", "train/img2.png", "test/img3.png")]
    manifest = write_csv(tmp_path / "split.csv", rows)
    result = _run(pytester, manifest)
    result.assert_outcomes(passed=1, failed=1)
    result.stdout.fnmatch_lines(["*exact_duplicate: train/img1.png (train) <-> test/img3.png (test)*"])


def test_plugin_is_registered_as_a_pytest11_entry_point():
    names = {ep.value for ep in entry_points(group="pytest11")}
    assert "curate.pytest_plugin" in names
