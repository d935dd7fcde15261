"""A pytest plugin so a training repository can assert, in its own tests, that its split does not leak.

Installed with curate and registered under the ``pytest11`` entry point, it
only adds fixtures: it does nothing (imports nothing heavy, adds no options,
runs no checks) unless a test asks for one of them.

Fixtures
--------
``assert_no_leakage``
    A function ``assert_no_leakage(manifest, **options)``: runs
    :func:`curate.check_leakage` on the manifest (a CSV/Parquet split table, a
    frozen manifest's sidecar, a folder with one subfolder per split, or a
    DataFrame) and fails the test with the readable summary when anything
    leaks or a file is missing. Options are those of ``check_leakage``
    (``root``, ``radius``, ``cache``, ``near_duplicates`` ...); progress bars are off.
    It returns the :class:`~curate.leakage.LeakageReport` when clean.

``leakage_report``
    A function with the same arguments that returns the report without
    failing, for tests that inspect it.

Example, in a training repository's ``tests/test_data.py``::

    def test_split_does_not_leak(assert_no_leakage):
        assert_no_leakage("data/splits/v3.csv", root="data/images")

Without the entry point (for example in a source checkout), enable it with
``pytest_plugins = ["curate.pytest_plugin"]`` in a ``conftest.py``.
"""

from __future__ import annotations

import pytest


def _report(manifest, **options):
    from curate.leakage_check import check_leakage

    options.setdefault("progress", False)
    return check_leakage(manifest, **options)


@pytest.fixture
def leakage_report():
    """``leakage_report(manifest, **options)`` -> LeakageReport (never fails the test)."""
    return _report


@pytest.fixture
def assert_no_leakage():
    """``assert_no_leakage(manifest, **options)``: fail the test with a summary if the split leaks."""

    def check(manifest, *, max_rows: int = 20, **options):
        report = _report(manifest, **options)
        if not report.ok:
            pytest.fail(report.summary(max_rows=max_rows), pytrace=False)
        return report

    return check
