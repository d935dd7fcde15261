"""Command-line basics: help, python -m, init, exit codes."""

import subprocess
import sys

from click.testing import CliRunner

from curate.cli import main


def test_help_lists_commands_with_descriptions():
    result = CliRunner().invoke(main, ["--help"])
    assert result.exit_code == 0
    assert "init" in result.output


def test_python_dash_m_runs_the_cli():
    out = subprocess.run([sys.executable, "-m", "curate", "--help"], capture_output=True, text=True)
    assert out.returncode == 0 and "Commands:" in out.stdout


def test_init_creates_a_workspace(tmp_path):
    result = CliRunner().invoke(main, ["init", str(tmp_path / "ws")])
    assert result.exit_code == 0, result.output
    assert (tmp_path / "ws" / "curate.sqlite").is_file()


def test_init_on_a_file_is_an_input_error(tmp_path):
    f = tmp_path / "file"
    f.write_text("x")
    result = CliRunner().invoke(main, ["init", str(f)])
    assert result.exit_code == 2
