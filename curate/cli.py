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


# --- leakage check and manifests ---------------------------------------------------


def _split_table_columns(text: str | None) -> dict[str, str]:
    """``path=file,split=fold`` -> {"path": "file", "split": "fold"} (checked by the library)."""
    pairs = [part.partition("=") for part in (text or "").split(",") if part.strip()]
    bad = [name for name, sep, column in pairs if not sep or not name.strip() or not column.strip()]
    if bad:
        raise click.BadParameter(f"expected field=column, got {bad[0]!r}", param_hint="--columns")
    return {name.strip(): column.strip() for name, _, column in pairs}


@command(main, "check", "Check any split manifest or split folder for leakage.")
@click.argument("manifest", type=click.Path(exists=True))
@click.option("--root", type=click.Path(file_okay=False, exists=True),
              help="Folder the manifest's relative paths start from.")
@click.option("--radius", type=click.IntRange(0, 64), default=None,
              help="Largest Hamming distance (bits, inclusive) for a near-duplicate.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, allow_dash=True),
              help="Write the full report as JSON to this file ('-' for standard output).")
@click.option("--cache", type=click.Path(file_okay=False),
              help="Folder of the hash cache (a workspace); default $CURATE_CACHE_DIR or ~/.cache/curate.")
@click.option("--no-cache", is_flag=True, help="Do not cache perceptual hashes.")
@click.option("--no-near-duplicates", is_flag=True, help="Skip hashing and the near-duplicate search.")
@click.option("--columns", help="Column names when they differ, e.g. path=file,split=fold,patient=pid.")
@click.option("--ignore-id", multiple=True, help="A placeholder patient/lesion id that links nothing (repeatable).")
@click.option("--max-rows", type=click.IntRange(0), default=20, show_default=True,
              help="Leaks listed in the printed summary.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bars.")
def check_command(manifest, root, radius, json_path, cache, no_cache, no_near_duplicates, columns,
                  ignore_id, max_rows, quiet) -> int:
    """Check MANIFEST for leakage between its splits; needs no workspace.

    MANIFEST is a CSV/TSV or Parquet table with a path column and a split
    column (optional patient, lesion and sha256 columns), a frozen manifest's
    .manifest.json sidecar, or a folder with one subfolder per split. Every
    file is re-digested (SHA-256) and hashed; reported are byte-identical
    files, near-duplicates, shared patient ids and shared lesion ids across
    splits, plus missing and unreadable files.

    Exit code 1 means leakage (or an unreadable/missing file) was found; 2
    means the manifest cannot be used (no path or split column, rows without a
    split, unknown file type).
    """
    from curate.leakage_check import check_leakage

    report = check_leakage(
        manifest, root=root, columns=_split_table_columns(columns),
        near_duplicates=not no_near_duplicates, radius=radius,
        cache=False if no_cache else cache, ignore_ids=ignore_id, progress=not quiet,
    )
    _write_json(json_path, report.to_json())
    click.echo(report.summary(max_rows=max_rows), err=json_path == "-")
    return EXIT_OK if report.ok else EXIT_FINDINGS


def _write_json(json_path: str | None, text: str) -> None:
    if json_path == "-":
        click.echo(text)
    elif json_path:
        from pathlib import Path

        Path(json_path).write_text(text + "\n", encoding="utf-8")


@command(main, "verify", "Re-digest a frozen manifest's files and compare.")
@click.argument("manifest", type=click.Path(exists=True, dir_okay=False))
@click.option("--root", type=click.Path(file_okay=False, exists=True),
              help="Folder the manifest's relative paths start from (default: the recorded root).")
@click.option("--no-unexpected", is_flag=True, help="Do not list image files the manifest does not name.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False, allow_dash=True),
              help="Write the findings as JSON to this file ('-' for standard output).")
@click.option("--max-rows", type=click.IntRange(0), default=20, show_default=True,
              help="Findings listed in the printed summary.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bar.")
def verify_command(manifest, root, no_unexpected, json_path, max_rows, quiet) -> int:
    """Verify the frozen MANIFEST (NAME.csv, NAME.parquet or NAME.manifest.json).

    Every listed file is re-digested (SHA-256) and compared; reported are
    missing, unreadable and changed files, image files under the root the
    manifest does not name, a fingerprint mismatch (digest or split column
    edited after freezing) and a table file changed since freezing.

    Exit code 0: everything matches; 1: a mismatch was found; 2: the manifest
    cannot be used (no sidecar, unknown format_version, not a table).
    """
    import json

    from curate.manifest_io import verify_manifest

    result = verify_manifest(manifest, root=root, unexpected=not no_unexpected, progress=not quiet)
    _write_json(json_path, json.dumps(result.to_dict(), indent=2))
    click.echo(result.summary(max_rows=max_rows), err=json_path == "-")
    return EXIT_OK if result.ok else EXIT_FINDINGS


SALT_ENV = "CURATE_PSEUDONYM_SALT"


def _command_line_without_secrets(argv: list[str]) -> str:
    """The command line as typed, with the value of ``--salt`` replaced by ``***``."""
    import shlex

    out, hide = [], False
    for arg in argv:
        if hide:
            out.append("***")
        elif arg.startswith("--salt="):
            out.append("--salt=***")
        else:
            out.append(arg)
        hide = arg == "--salt"
    return "curate " + " ".join(shlex.quote(a) for a in out)


@command(main, "freeze", "Freeze the workspace's split as a verifiable manifest.")
@click.argument("workspace", type=click.Path(file_okay=False, exists=True))
@click.option("--name", required=True, help="Manifest name: writes manifests/NAME.csv, .parquet, .manifest.json.")
@click.option("--root", type=click.Path(file_okay=False, exists=True),
              help="Declared root the manifest's paths are relative to (default: deepest common folder).")
@click.option("--pseudonymise", is_flag=True,
              help="Replace patient, lesion and group ids by salted HMAC-SHA256 pseudonyms.")
@click.option("--salt", help=f"The secret for --pseudonymise (at least 16 bytes); or set ${SALT_ENV}.")
@click.option("--salt-file", type=click.Path(dir_okay=False, exists=True),
              help="Read the secret for --pseudonymise from this file (first line).")
@click.option("--allow-leaks", is_flag=True, help="Freeze even though the split leaks (recorded in the sidecar).")
@click.option("-q", "--quiet", is_flag=True, help="No progress bar.")
def freeze_command(workspace, name, root, pseudonymise, salt, salt_file, allow_leaks, quiet) -> int:
    """Freeze the split of WORKSPACE as manifest NAME.

    Writes WORKSPACE/manifests/NAME.csv and NAME.parquet (one row per image,
    sorted by path relative to the declared root: sha256, split, group id,
    patient and lesion ids, source, taxonomy node, training class, skin-tone
    bin) and the sidecar NAME.manifest.json (fingerprint over the sorted
    (sha256, split) pairs, split parameters and seed, package versions,
    creation time, this command). Files are written atomically and an
    existing name is never overwritten. No EXIF or other file metadata is
    copied. Pseudonymised ids are not anonymous: keep the salt secret, and
    handle the data according to local law and your institution's rules.

    Exit code 1: the split leaks, so nothing was written (with --allow-leaks
    it is written and the exit code is still 1); 2: the name exists, there is no split, a file changed since the scan, or
    --pseudonymise lacks a salt.
    """
    import os

    from curate.errors import LeakageError
    from curate.freeze import freeze_split
    from curate.store import Workspace

    if salt_file:
        with open(salt_file, encoding="utf-8") as f:
            salt = f.readline().rstrip("\r\n")
    salt = salt or os.environ.get(SALT_ENV) if pseudonymise else salt
    if salt and not pseudonymise:
        raise click.UsageError("--salt/--salt-file only make sense with --pseudonymise")
    try:
        frozen = freeze_split(
            Workspace.open(workspace), name, root=root, pseudonymise=pseudonymise, salt=salt,
            allow_leaks=allow_leaks, command=_command_line_without_secrets(sys.argv[1:]),
            progress=not quiet,
        )
    except LeakageError as exc:
        click.echo(f"error: {exc}", err=True)
        return EXIT_FINDINGS
    click.echo(frozen.summary())
    return EXIT_OK if frozen.leakage.ok else EXIT_FINDINGS


# --- demo --------------------------------------------------------------------------


@command(main, "demo", "Generate the invented demo scenario and run the pipeline on it.")
@click.argument("out", type=click.Path(file_okay=False))
@click.option("--images", "n_images", type=click.IntRange(min=40), default=600, show_default=True,
              help="Files to generate, copies and planted bad files included (n_images).")
@click.option("--seed", "--random-state", "random_state", type=int, default=0, show_default=True,
              help="Seed; the same seed gives byte-identical files.")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="Processes drawing images (default: up to 2).")
@click.option("-q", "--quiet", is_flag=True, help="No progress bars.")
def demo_command(out, n_images, random_state, workers, quiet) -> int:
    """Generate the demo scenario in OUT, then run every pipeline step that exists on it.

    The scenario is invented: a regional teledermatology network pooling
    procedurally drawn lesion pictures from three clinics and a dermoscopy
    archive, with per-source metadata CSVs that name columns and spell labels
    differently, follow-up visits, copies (byte-identical, re-encoded, resized,
    rotated, flipped, cropped, colour-shifted) and planted problems (corrupt and
    empty files, patient-like EXIF, placeholder ids, a copy with another label).
    OUT/truth/ holds the ground truth, which the pipeline never reads; the
    workspace is OUT/workspace.

    OUT must be new, empty, or an earlier demo folder (which is replaced).
    The planted problems are expected, so exit code 0 means the run completed.
    """
    from curate.demo import generate_scenario
    from curate.pipeline import run_pipeline

    scenario = generate_scenario(out, n_images=n_images, random_state=random_state,
                                 progress=not quiet, workers=workers)
    click.echo(scenario.summary())
    run_pipeline(out, progress=not quiet, echo=click.echo)
    return EXIT_OK
