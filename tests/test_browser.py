"""End to end in a real browser: JupyterLab + the review notebook + Debian's Chromium.

Starts JupyterLab on 127.0.0.1 (a free port, a random token, a temporary root
folder holding a copy of notebooks/02_near_duplicates_review.ipynb), drives it
with Playwright's sync API and the system Chromium (no browser download), runs
every cell, clicks a decision button in the review widget and types a decision
key into its key box, and then checks through the curate API that both
decisions are in the workspace. A screenshot of
the widget is saved to .ci/artifacts/review-widget.png.

Skipped only when /usr/bin/chromium is missing outside CI; with CI=true a
missing browser is a failure (.ci/install-test-deps installs it).
"""

from __future__ import annotations

import json
import os
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

from curate.review_queue import current_decisions
from curate.store import Workspace

REPO = Path(__file__).resolve().parent.parent
NOTEBOOK = "02_near_duplicates_review.ipynb"
CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = REPO / ".ci" / "artifacts"
SCREENSHOT = ARTIFACTS / "review-widget.png"
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]

pytestmark = [pytest.mark.browser, pytest.mark.slow]


def _in_ci() -> bool:
    return os.environ.get("CI", "").lower() in ("1", "true", "yes")


def _need_chromium() -> None:
    if CHROMIUM.exists():
        return
    if _in_ci():
        pytest.fail(f"{CHROMIUM} is missing in CI: .ci/install-test-deps should install chromium")
    pytest.skip(f"{CHROMIUM} not installed (run .ci/install-test-deps)")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_for_server(url: str, proc: subprocess.Popen, log: Path, timeout: float = 120) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise AssertionError(f"JupyterLab exited early:\n{log.read_text()[-4000:]}")
        try:
            with urllib.request.urlopen(url, timeout=5) as r:
                if r.status == 200:
                    return
        except OSError:
            time.sleep(0.5)
    raise AssertionError(f"JupyterLab did not answer within {timeout} s:\n{log.read_text()[-4000:]}")


def _stop_server(proc: subprocess.Popen, base: str, token: str) -> None:
    if proc.poll() is None:
        try:
            req = urllib.request.Request(f"{base}/api/shutdown", method="POST",
                                         headers={"Authorization": f"token {token}"})
            urllib.request.urlopen(req, timeout=10).close()
        except OSError:
            pass
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGTERM)
            try:
                proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(timeout=15)


def _browser_workspace(root: Path) -> Path:
    """A small demo workspace (as `curate demo` makes it) once the pairs step exists.

    Until then the notebook could not fill table ``pairs`` on the demo, so a
    hand-filled workspace of drawn lesions with candidate pairs is used instead.
    """
    try:
        import curate.near_duplicates  # noqa: F401
    except ImportError:
        from review_workspace import make_review_workspace

        return make_review_workspace(root / "drawn").path
    from curate.demo import generate_scenario
    from curate.pipeline import run_pipeline

    demo = root / "demo"
    generate_scenario(demo, n_images=60, random_state=0, progress=False, image_scale=0.5)
    return Path(run_pipeline(demo, progress=False, echo=lambda line: None)["workspace"])


@pytest.fixture
def lab(tmp_path):
    """A running JupyterLab serving tmp_path/root; yields (base_url, token, root, workspace)."""
    _need_chromium()
    root = tmp_path / "root"
    root.mkdir()
    shutil.copy(REPO / "notebooks" / NOTEBOOK, root / NOTEBOOK)
    workspace = _browser_workspace(tmp_path)
    token = secrets.token_hex(16)
    port = _free_port()
    config = tmp_path / "jupyter-config"
    (config / "labconfig").mkdir(parents=True)
    # no news/update checks (they would go to the network and pop up notices)
    (config / "labconfig" / "page_config.json").write_text(json.dumps({
        "disabledExtensions": {"@jupyterlab/apputils-extension:announcements": True}}))
    env = {
        **os.environ,
        "JUPYTER_CONFIG_DIR": str(config),
        "JUPYTER_RUNTIME_DIR": str(tmp_path / "jupyter-runtime"),
        "JUPYTERLAB_SETTINGS_DIR": str(tmp_path / "lab-settings"),
        "JUPYTERLAB_WORKSPACES_DIR": str(tmp_path / "lab-workspaces"),
        "IPYTHONDIR": str(tmp_path / "ipython"),
        "CURATE_WORKSPACE": str(workspace),
        "CURATE_DEMO_DIR": str(tmp_path / "demo"),
        "CURATE_REVIEWER": "browser test",
        "CURATE_PROGRESS": "0",
        "PYTHONPATH": os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]),
    }
    log = tmp_path / "jupyter.log"
    with open(log, "w") as out:
        proc = subprocess.Popen(
            [sys.executable, "-m", "jupyter", "lab", "--no-browser",
             f"--ServerApp.token={token}", f"--ServerApp.port={port}",
             "--ServerApp.ip=127.0.0.1", f"--ServerApp.root_dir={root}",
             "--ServerApp.open_browser=False", "--ServerApp.port_retries=0",
             "--LabApp.news_url=None", "--LabApp.expose_app_in_browser=True",
             "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate",
             "--LabApp.extension_manager=readonly"]
            + (["--allow-root"] if hasattr(os, "geteuid") and os.geteuid() == 0 else []),
            cwd=root, env=env, stdout=out, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
            start_new_session=True,
        )
    base = f"http://127.0.0.1:{port}"
    try:
        _wait_for_server(f"{base}/api/status?token={token}", proc, log)
        yield base, token, root, Path(workspace), log
    finally:
        _stop_server(proc, base, token)


def test_review_notebook_decision_reaches_the_store(lab):
    base, token, root, workspace, log = lab
    assert current_decisions(Workspace.open(workspace)).empty
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    try:
        decided, ws = _drive_review(base, token, workspace)
    except Exception as exc:  # add the server's log to any failure in the browser
        raise AssertionError(f"{exc}\n--- JupyterLab log (tail) ---\n{log.read_text()[-4000:]}") from exc
    row = decided.iloc[0]
    assert row["decision"] == "different_lesions" and row["reviewer"] == "browser test"
    # it is the pair the widget showed first: the most uncertain one in the queue
    from curate.review_queue import ReviewSession

    first = ReviewSession(ws, reviewer="check").pairs().iloc[0]
    assert (row["image_a"], row["image_b"]) == (first["image_a"], first["image_b"])
    assert SCREENSHOT.stat().st_size > 10_000
    after_keys = current_decisions(ws)
    assert len(after_keys) == 2, "typing '2' into the key box did not record a decision"
    assert set(after_keys["decision"]) == {"different_lesions", "same_lesion"}


def _drive_review(base: str, token: str, workspace: Path):
    """Open the notebook, run all cells, click "Different lesions", type "2"; return decisions."""
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS,
                                    headless=True, timeout=120_000)
        try:
            page = browser.new_page(viewport={"width": 1400, "height": 1400})
            page.set_default_timeout(120_000)
            page.goto(f"{base}/lab/tree/{NOTEBOOK}?token={token}", wait_until="domcontentloaded")
            page.wait_for_function("() => window.jupyterapp && window.jupyterapp.shell", timeout=120_000)
            # wait until the notebook panel is open and its kernel is idle
            page.wait_for_selector(".jp-NotebookPanel", state="visible", timeout=120_000)
            page.wait_for_function(
                "() => { const w = window.jupyterapp.shell.currentWidget;"
                " return w && w.sessionContext && w.sessionContext.session"
                " && w.sessionContext.session.kernel"
                " && w.sessionContext.session.kernel.status === 'idle'; }",
                timeout=180_000,
            )
            page.evaluate("window.jupyterapp.commands.execute('notebook:run-all-cells')")
            button = page.locator(".curate-review .curate-decision-different_lesions button, "
                                  ".curate-review button.curate-decision-different_lesions")
            button.first.wait_for(state="visible", timeout=300_000)
            # both images must have arrived and be decoded before the click
            page.wait_for_function(
                "() => { const imgs = document.querySelectorAll('.curate-review img');"
                " return imgs.length >= 2 && imgs[0].naturalWidth > 0 && imgs[1].naturalWidth > 0; }",
                timeout=120_000,
            )
            widget = page.locator(".curate-review").first
            widget.scroll_into_view_if_needed()
            errors = page.locator(".jp-OutputArea-output[data-mime-type='application/vnd.jupyter.stderr']")
            tracebacks = [t for t in errors.all_inner_texts() if "Traceback" in t or "Error" in t]
            assert not tracebacks, tracebacks
            widget.screenshot(path=str(SCREENSHOT))
            button.first.click()
            # the decision travels browser -> kernel -> SQLite; poll the store (bounded)
            ws = Workspace.open(workspace)
            deadline = time.monotonic() + 60
            decided = current_decisions(ws)
            while decided.empty and time.monotonic() < deadline:
                time.sleep(0.5)
                decided = current_decisions(ws)
            assert len(decided) == 1, "the click did not reach the workspace within 60 s"
            # the keyboard path: type "2" (same lesion) into the key box of the widget
            keys = page.locator(".curate-review .curate-keys input").first
            keys.click()
            keys.press_sequentially("2", delay=50)
            deadline = time.monotonic() + 60
            while len(current_decisions(ws)) < 2 and time.monotonic() < deadline:
                time.sleep(0.5)
            # and the widget says so
            page.locator(".curate-review").get_by_text("saved: same lesion").first.wait_for(
                state="visible", timeout=60_000)
            page.screenshot(path=str(ARTIFACTS / "review-notebook-after-click.png"), full_page=False)
        finally:
            browser.close()
    return decided, ws
