"""The ``curate`` command line: one thin command per step over the Python API.

Exit codes (the same for every command):

  0  nothing to flag
  1  findings (problems on scan, leaks, near-duplicates, imbalance ...)
  2  usage or input error (bad option, missing file, unusable input)
  3  unexpected internal error (please report it)

Each command parses its options, calls the library, prints a short summary and
returns its exit code. No logic lives here that the Python API lacks.
"""

from __future__ import annotations

import functools
import sys
import traceback

import click

from curate.errors import CurateError

EXIT_OK, EXIT_FINDINGS, EXIT_INPUT, EXIT_INTERNAL = 0, 1, 2, 3

EXIT_CODES_HELP = (
    "\b\nExit codes:\n  0  nothing to flag\n  1  findings\n"
    "  2  usage or input error\n  3  unexpected internal error (please report it)"
)

CONTEXT_SETTINGS = {"help_option_names": ["-h", "--help"], "max_content_width": 100}


def command(group: click.Group, name: str, short_help: str):
    """Register a command whose function returns an exit code.

    Expected errors (:class:`CurateError`, missing files) go to stderr with exit 2;
    anything else prints a traceback and exits 3.
    """

    def decorate(func):
        @functools.wraps(func)
        def run(*args, **kwargs):
            try:
                code = func(*args, **kwargs)
            except (CurateError, FileNotFoundError, NotADirectoryError, ValueError) as exc:
                click.echo(f"error: {exc}", err=True)
                sys.exit(EXIT_INPUT)
            except (click.exceptions.Exit, click.ClickException, KeyboardInterrupt):
                raise
            except Exception:  # noqa: BLE001 - last resort, reported as internal
                traceback.print_exc()
                click.echo("internal error: please report this with the traceback above", err=True)
                sys.exit(EXIT_INTERNAL)
            sys.exit(code or EXIT_OK)

        doc = (func.__doc__ or short_help).rstrip() + "\n\n" + EXIT_CODES_HELP
        return group.command(name, short_help=short_help, help=doc)(run)

    return decorate


@click.group(context_settings=CONTEXT_SETTINGS)
@click.version_option(package_name="curate")
def main() -> None:
    """Curate dermatology image datasets before training.

    Find exact and near-duplicate images, keep every patient and lesion in one
    split, map raw labels onto a taxonomy, propose grouped stratified splits,
    check a split for leakage and freeze it as a verifiable manifest.

    curate curates data; it does not diagnose.
    """


# --- init --------------------------------------------------------------------------


@command(main, "init", "Create a workspace folder (one SQLite database).")
@click.argument("workspace", type=click.Path(file_okay=False))
def init_command(workspace: str) -> int:
    """Create WORKSPACE: a folder holding the SQLite database every later step uses."""
    from curate.store import Workspace

    ws = Workspace.create(workspace)
    click.echo(f"workspace ready: {ws.path} (schema version {ws.schema_version()})")
    return EXIT_OK
