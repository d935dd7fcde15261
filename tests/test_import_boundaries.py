"""Import boundaries: computation modules stay free of UI and optional dependencies.

Every module is imported in a fresh interpreter with warnings as errors; after each one,
click (the CLI), ipywidgets (the review widget) and dask (the optional cluster backend)
must still be absent from ``sys.modules``. The leakage check must never import the
splitter it judges.
"""

import ast
import json
import subprocess
import sys
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "curate"
UI_MODULES = {"cli", "review", "__main__", "pytest_plugin"}
FORBIDDEN = ("click", "ipywidgets", "dask")

PROBE = r"""
import importlib, json, sys
names = json.loads(sys.argv[1])
leaks = {}
for name in names:
    importlib.import_module("curate." + name)
    found = [m for m in %r if m in sys.modules]
    if found:
        leaks[name] = found
        break
print(json.dumps(leaks))
""" % (FORBIDDEN,)


def _modules():
    return sorted(p.stem for p in PACKAGE.glob("*.py") if p.stem not in UI_MODULES)


def test_computation_modules_import_no_ui_or_optional_dependency():
    out = subprocess.run(
        [sys.executable, "-W", "error", "-c", PROBE, json.dumps(_modules())],
        capture_output=True,
        text=True,
        check=True,
    )
    assert json.loads(out.stdout) == {}


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text())
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
    return names


def test_leakage_never_imports_the_splitter():
    for path in PACKAGE.glob("leakage*.py"):
        assert not {"curate.splitting", "curate.split_store"} & _imports(path), path.name
