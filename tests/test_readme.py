"""The README's quick start stays true: CI runs exactly the test command it quotes."""

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_readme_quotes_the_ci_test_command():
    ci = (ROOT / ".ci" / "run").read_text()
    command = re.search(r"^TEST_COMMAND='(.+)'$", ci, re.M).group(1)
    assert command in (ROOT / "README.md").read_text()


def test_readme_quick_start_has_two_commands():
    text = (ROOT / "README.md").read_text()
    block = re.search(r"## Quick start\n.*?```(?:bash|sh)\n(.*?)```", text, re.S).group(1)
    commands = [line for line in block.splitlines() if line.strip() and not line.startswith("#")]
    assert len(commands) == 2
    assert commands[0].startswith("pip install -e . && curate demo")
