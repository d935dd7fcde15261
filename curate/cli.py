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


# --- ingest ------------------------------------------------------------------------


@command(main, "scan", "Take a folder of images (and its metadata CSV) into the catalog.")
@click.argument("workspace", type=click.Path(file_okay=False))
@click.argument("folder", required=False, type=click.Path())
@click.option("--source", help="Name of the source (clinic, archive); default: the folder's or CSV's name.")
@click.option("--metadata", type=click.Path(), help="CSV with one row per image, joined by path.")
@click.option(
    "--columns",
    help="Which CSV column holds each field: path=...,patient=...,lesion=...,label=...,"
    "modality=...,body_site=...,capture_date=... (default: columns named like the fields).",
)
@click.option("--root", type=click.Path(), help="Without FOLDER: where the CSV's relative paths start "
              "(default: the CSV's folder); every listed file must lie under it.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bars.")
def scan_command(workspace, folder, source, metadata, columns, root, quiet) -> int:
    """Scan FOLDER (JPEG, PNG, TIFF, BMP, WebP) into WORKSPACE, or only the files --metadata lists.

    Records per file its path, size, modification time, SHA-256, pixel size,
    mode and format, plus the metadata joined by path. A re-scan reuses what it
    knows of unchanged files (same path, size and modification time) and marks
    files that are gone. Every bad file or CSV row is recorded in the problems
    table and counted in the one-line summary; exact duplicates (same SHA-256)
    are counted across the workspace.

    Exit code 1 means problems were recorded; 2 means the input cannot be used
    (missing folder, metadata CSV unreadable or missing a required column).
    """
    from curate.ingest import scan_folder, scan_metadata
    from curate.metadata import parse_columns
    from curate.store import Workspace

    mapping = parse_columns(columns)
    if folder is None and metadata is None:
        raise click.UsageError("give a FOLDER to walk, or --metadata FILE.csv listing the files")
    if folder is not None and root is not None:
        raise click.UsageError("--root is for a metadata-only scan; with FOLDER, paths start at FOLDER")
    ws = Workspace.create(workspace)
    if folder is not None:
        result = scan_folder(ws, folder, source=source, metadata=metadata, columns=mapping, progress=not quiet)
    else:
        from pathlib import Path

        result = scan_metadata(
            ws, metadata, source=source or Path(metadata).stem, columns=mapping, root=root,
            progress=not quiet,
        )
    click.echo(result.summary())
    return EXIT_FINDINGS if not result.report.ok else EXIT_OK
