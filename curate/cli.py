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
import inspect
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

        doc = inspect.cleandoc(func.__doc__ or short_help) + "\n\n" + EXIT_CODES_HELP
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
@click.option("--workers", type=click.IntRange(min=1), help="Threads reading files (default: up to 2).")
@click.option("--max-rows", type=click.IntRange(0), default=20, show_default=True,
              help="Problems to list under the summary line (all are in the problems table).")
@click.option("-q", "--quiet", is_flag=True, help="No progress bars.")
def scan_command(workspace, folder, source, metadata, columns, root, workers, max_rows, quiet) -> int:
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
        result = scan_folder(
            ws, folder, source=source, metadata=metadata, columns=mapping, progress=not quiet, workers=workers
        )
    else:
        from pathlib import Path

        result = scan_metadata(
            ws, metadata, source=source or Path(metadata).stem, columns=mapping, root=root,
            progress=not quiet, workers=workers,
        )
    click.echo(result.summary())
    for line in result.report.summary(max_rows=max_rows).splitlines()[1:]:
        click.echo(line)
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
@click.option("--csv", "csv_path", type=click.Path(dir_okay=False),
              help="Write the leaks as a CSV table (one row per leak) to this file.")
@click.option("--cache", type=click.Path(file_okay=False),
              help="Folder of the cache of hashes and crop checks (a workspace); default $CURATE_CACHE_DIR "
                   "or ~/.cache/curate.")
@click.option("--no-cache", is_flag=True, help="Do not cache perceptual hashes or crop checks.")
@click.option("--no-near-duplicates", is_flag=True, help="Skip hashing and the near-duplicate search.")
@click.option("--columns", help="Column names when they differ, e.g. path=file,split=fold,patient=pid.")
@click.option("--ignore-id", multiple=True, help="A placeholder patient/lesion id that links nothing (repeatable).")
@click.option("--workers", type=click.IntRange(1), default=None, help="Processes for hashing (default: one per core).")
@click.option("--max-rows", type=click.IntRange(0), default=20, show_default=True,
              help="Leaks listed in the printed summary.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bars.")
def check_command(manifest, root, radius, json_path, csv_path, cache, no_cache, no_near_duplicates,
                  columns, ignore_id, workers, max_rows, quiet) -> int:
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
        cache=False if no_cache else cache, ignore_ids=ignore_id, workers=workers,
        progress=not quiet,
    )
    _write_json(json_path, report.to_json())
    if csv_path:
        report.to_frame(flat=True).to_csv(csv_path, index=False)
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
            out.append(shlex.quote(arg))
        hide = arg == "--salt"
    return "curate " + " ".join(out)


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
@click.option("--image-scale", type=click.FloatRange(0.1, 8), default=1.0, show_default=True,
              help="Multiplies the picture sizes (600x450 clinical, 512x512 dermoscopic).")
@click.option("-q", "--quiet", is_flag=True, help="No progress bars.")
def demo_command(out, n_images, random_state, workers, image_scale, quiet) -> int:
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

    try:
        scenario = generate_scenario(out, n_images=n_images, random_state=random_state,
                                     progress=not quiet, workers=workers, image_scale=image_scale)
    except FileExistsError as exc:  # a folder that is not an earlier demo: nothing was touched
        click.echo(f"error: {exc}", err=True)
        return EXIT_INPUT
    click.echo(scenario.summary())
    run_pipeline(out, progress=not quiet, echo=click.echo)
    return EXIT_OK


# --- taxonomy ----------------------------------------------------------------------


def _load_taxonomy(ws, tree):
    from curate.taxonomy_workspace import workspace_taxonomy

    return workspace_taxonomy(ws, tree)


def _open_workspace(workspace):
    from curate.store import Workspace

    return Workspace.open(workspace)


@command(main, "taxonomy", "Map raw labels onto a taxonomy tree (writes image_nodes); list what is unmapped.")
@click.argument("workspace", type=click.Path(file_okay=False, exists=True))
@click.option("--tree", type=click.Path(dir_okay=False, exists=True),
              help="Taxonomy file (.yaml/.yml/.csv). Default: the tree last used here, else the example tree.")
@click.option("--labels", "labels", required=True, type=click.Path(dir_okay=False),
              help="Label-mapping CSV you own (raw_label,node,status,...); created by --propose if missing.")
@click.option("--propose", is_flag=True, help="Append proposed mappings for labels the file lacks.")
@click.option("--accept-proposed", is_flag=True,
              help="Also apply rows with status 'proposed' (default: only 'confirmed').")
@click.option("--max-rows", default=20, show_default=True, help="Rows of each list to print.")
def taxonomy_command(workspace, tree, labels, propose, accept_proposed, max_rows) -> int:
    """Map every catalog label of WORKSPACE through the mapping file --labels onto --tree.

    The tree is checked first; every problem is listed with its line number
    (exit 2). Labels are matched by normalised text (case, spacing,
    punctuation, British/American spelling). With --propose, labels the file
    lacks are appended as 'proposed' rows (exact name/id match, synonym or
    abbreviation, fuzzy match with a score) for you to confirm by setting
    status to 'confirmed' (or to fix or reject). Your rows are never changed.

    Images whose label stays unmapped keep an empty node (nothing is dropped)
    and are listed with their counts. Lesions whose images carry different
    nodes, and exact/near-duplicate pairs with different nodes, are listed as
    label conflicts to review.

    Exit code 1 means unmapped labels or label conflicts remain.
    """
    from curate.taxonomy_workspace import map_workspace_labels, workspace_conflicts

    ws = _open_workspace(workspace)
    taxonomy = _load_taxonomy(ws, tree)
    result = map_workspace_labels(ws, taxonomy, labels, propose=propose, accept_proposed=accept_proposed,
                                  tree_path=tree)
    click.echo(f"taxonomy: {len(taxonomy)} nodes, {len(taxonomy.leaves)} leaves ({taxonomy.source})")
    if propose:
        methods = result.proposals["method"].value_counts().to_dict() if len(result.proposals) else {}
        click.echo(f"proposed {len(result.proposals)} new mapping row(s) in {result.mapping_path}: "
                   + (", ".join(f"{n} {m}" for m, n in methods.items()) or "none needed"))
    click.echo(f"mapped {result.mapped} of {result.images} images")
    if not result.ok:
        n_images = int(result.unmapped["images"].sum())
        click.echo(f"{len(result.unmapped)} label(s) unmapped ({n_images} images):")
        click.echo(result.unmapped.head(max_rows).to_string(index=False))
        if len(result.unmapped) > max_rows:
            click.echo(f"  ... and {len(result.unmapped) - max_rows} more")
    conflicts = workspace_conflicts(ws, taxonomy)
    if len(conflicts):
        click.echo(f"{len(conflicts)} label conflict(s) to review "
                   + str(conflicts["kind"].value_counts().to_dict()) + ":")
        click.echo(conflicts.head(max_rows).to_string(index=False))
    return EXIT_FINDINGS if (not result.ok or len(conflicts)) else EXIT_OK


@command(main, "balance", "Images, lesions and patients per taxonomy node, rolled up, per split/source...")
@click.argument("workspace", type=click.Path(file_okay=False, exists=True))
@click.option("--tree", type=click.Path(dir_okay=False, exists=True),
              help="Taxonomy file. Default: the tree last used with `curate taxonomy`.")
@click.option("--depth", type=click.IntRange(min=0), help="Show nodes down to this depth (root = 0).")
@click.option("--by", type=click.Choice(["split", "source", "modality", "ita_bin"]),
              help="Break the counts down by this column.")
@click.option("--min-lesions", default=10, show_default=True, type=click.IntRange(min=0),
              help="Flag nodes with fewer distinct lesions (per split with --by split, else in total).")
@click.option("--max-share-ratio", default=2.0, show_default=True, type=click.FloatRange(min=1),
              help="Flag a node whose share of a group's lesions differs from its overall share by "
                   "more than this factor.")
@click.option("--plot", type=click.Path(dir_okay=False), help="Write a bar plot (PNG) per group.")
@click.option("--measure", default="lesions", show_default=True,
              type=click.Choice(["images", "lesions", "patients"]), help="What the plot shows.")
@click.option("--csv", "csv_path", type=click.Path(dir_okay=False), help="Also write the table as CSV.")
def balance_command(workspace, tree, depth, by, min_lesions, max_share_ratio, plot, measure, csv_path) -> int:
    """Class balance of WORKSPACE over the taxonomy: every node counts all images beneath it.

    Shows images, distinct lesions and distinct patients per node as an
    indented tree (an image without a lesion id counts as its own lesion),
    broken down by --by. Flags nodes below --min-lesions and nodes whose
    share differs strongly between groups. Run `curate taxonomy` first;
    --by split needs a split, --by ita_bin needs `curate skin-tone`.

    Exit code 1 means some node is flagged.
    """
    import pandas as pd

    from curate.balance import balance, plot_balance, tree_view
    from curate.taxonomy_workspace import node_frame

    ws = _open_workspace(workspace)
    taxonomy = _load_taxonomy(ws, tree)
    frame = node_frame(ws)
    if frame["node"].notna().sum() == 0:
        raise ValueError(f"{workspace}: no image has a taxonomy node yet; run `curate taxonomy` first")
    if by is not None and frame[by].notna().sum() == 0:
        hint = {"split": "make a split first", "ita_bin": "run `curate skin-tone` first"}.get(by, "")
        raise ValueError(f"{workspace}: no image has a {by!r} value; {hint}".rstrip("; "))
    table = balance(frame, taxonomy, by=by, depth=depth, min_lesions=min_lesions,
                    max_share_ratio=max_share_ratio)
    with pd.option_context("display.width", 250, "display.max_columns", 60):
        click.echo(tree_view(table).to_string(index=False))
    if table.attrs["unmapped_images"]:
        click.echo(f"({table.attrs['unmapped_images']} images without a node are not counted)")
    if csv_path:
        table.to_csv(csv_path, index_label="node")
        click.echo(f"table written to {csv_path}")
    if plot:
        plot_balance(table, measure=measure, min_lesions=min_lesions if measure == "lesions" else None
                     ).savefig(plot, dpi=100)
        click.echo(f"plot written to {plot}")
    flagged = int(table["flags"].astype(bool).sum())
    click.echo(f"{flagged} node(s) flagged" if flagged else "no node flagged")
    return EXIT_FINDINGS if flagged else EXIT_OK


@command(main, "classes", "Propose training classes from the tree and write the roll-up map.")
@click.argument("workspace", type=click.Path(file_okay=False, exists=True))
@click.option("--max-images", required=True, type=click.IntRange(min=1),
              help="Largest class, in images (a single leaf over it stays one class).")
@click.option("--min-images", default=0, show_default=True, type=click.IntRange(min=0),
              help="Merge smaller classes into their parent's class where possible, else report them.")
@click.option("--out", "out_dir", type=click.Path(file_okay=False),
              help="Folder for classes.csv, image_classes.csv, rollup_depth<D>.csv/.json "
                   "(default: WORKSPACE/classes).")
@click.option("--rollup-depth", "depths", multiple=True, type=click.IntRange(min=0),
              help="Depth(s) of the coarse nodes to roll classes up to (repeatable; default 1 and 2).")
@click.option("--tree", type=click.Path(dir_okay=False, exists=True),
              help="Taxonomy file. Default: the tree last used with `curate taxonomy`.")
def classes_command(workspace, max_images, min_images, out_dir, depths, tree) -> int:
    """Partition the taxonomy of WORKSPACE into training classes of at most --max-images images.

    Top-down: a node whose subtree holds at most --max-images images becomes a
    class, otherwise its children are tried; images labelled at an inner node
    form the class '<node>:other'. Writes each image's class into the
    workspace, the class list, and 0/1 roll-up maps (CSV matrix and JSON
    lists) from classes to the nodes at each --rollup-depth, so a training
    script can sum class probabilities to coarse nodes.

    Exit code 1 means some class is under --min-images and could not be merged.
    """
    from pathlib import Path

    from curate.taxonomy_workspace import node_frame, write_class_files, write_training_classes
    from curate.training_classes import propose_classes

    ws = _open_workspace(workspace)
    taxonomy = _load_taxonomy(ws, tree)
    frame = node_frame(ws)
    if frame["node"].notna().sum() == 0:
        raise ValueError(f"{workspace}: no image has a taxonomy node yet; run `curate taxonomy` first")
    proposal = propose_classes(frame["node"].value_counts(), taxonomy, max_images=max_images,
                               min_images=min_images)
    write_training_classes(ws, proposal)
    frame["training_class"] = proposal.class_of(frame["node"])
    out = Path(out_dir) if out_dir else Path(workspace) / "classes"
    depths = sorted(set(depths)) or [d for d in (1, 2) if d <= taxonomy.max_depth]
    written = write_class_files(proposal, taxonomy, out, depths=depths,
                                image_classes=frame[["image_id", "sha256", "node", "training_class"]])
    click.echo(proposal.to_frame().to_string(index=False))
    click.echo(f"{len(proposal.trainable())} training classes with images; files in {out}: "
               + ", ".join(p.name for p in written))
    if proposal.reported:
        click.echo(f"under --min-images and not mergeable: {', '.join(proposal.reported)}")
        return EXIT_FINDINGS
    return EXIT_OK


@command(main, "skin-tone", "Estimate each image's skin tone (ITA) and its bin (stored per SHA-256).")
@click.argument("workspace", type=click.Path(file_okay=False, exists=True))
@click.option("--recompute", is_flag=True, help="Recompute files already estimated.")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="Processes reading the files (default: every core).")
@click.option("-q", "--quiet", is_flag=True, help="No progress bar.")
def skin_tone_command(workspace, recompute, workers, quiet) -> int:
    """Estimate the Individual Typology Angle of the skin around each lesion in WORKSPACE.

    ITA = arctan((L* - 50) / b*) in degrees, from the median L* and b* of the
    skin in a border band of a thumbnail (darkest pixels and the black field
    of dermoscopes left out), binned very_light / light / intermediate / tan /
    brown / dark (Chardon et al. 1991; Del Bino et al. 2006). A coverage
    measure for the dataset, not a measurement of a person. Then
    `curate balance WORKSPACE --by ita_bin`.

    Exit code 1 means some images got no estimate (unreadable or too little skin).
    """
    from curate.skin_tone import ITA_BINS
    from curate.skin_tone_files import estimate_skin_tone

    ws = _open_workspace(workspace)
    table = estimate_skin_tone(ws, recompute=recompute, progress=not quiet, workers=workers)
    counts = table["ita_bin"].value_counts()
    order = [name for name, _ in ITA_BINS]
    click.echo("skin tone (distinct files): "
               + ", ".join(f"{name} {int(counts.get(name, 0))}" for name in order))
    missing = int(table["ita"].isna().sum())
    if missing:
        click.echo(f"{missing} file(s) without an estimate")
        return EXIT_FINDINGS
    return EXIT_OK


# --- groups and splits -------------------------------------------------------------


def _comma_list(text):
    return None if text is None else [part.strip() for part in text.split(",") if part.strip()]


@command(main, "groups", "Build leakage groups (patient, lesion, digest, near-duplicates, decisions).")
@click.argument("workspace", type=click.Path(file_okay=False, exists=True))
@click.option("--patient-scope", type=click.Choice(["source", "global"]), default="source", show_default=True,
              help="Patient ids are unique per source, or shared by all sources.")
@click.option("--lesion-scope", type=click.Choice(["source", "patient", "global"]), default="source",
              show_default=True, help="Lesion ids are unique per source, per patient, or shared by all sources.")
@click.option("--link-verdicts", default="exact,near", show_default=True,
              help="Pair verdicts (table pairs) that join images.")
@click.option("--max-id-share", type=click.FloatRange(0, 1, min_open=True), default=0.02, show_default=True,
              help="An id on more than this share of images (and --min-overshared images) joins nothing.")
@click.option("--min-overshared", type=click.IntRange(min=1), default=100, show_default=True,
              help="See --max-id-share (a count of images).")
@click.option("--max-rows", type=click.IntRange(min=0), default=10, show_default=True,
              help="Largest groups and findings to print.")
@click.option("--plot", type=click.Path(dir_okay=False), help="Write a histogram of group sizes (PNG).")
def groups_command(workspace, patient_scope, lesion_scope, link_verdicts, max_id_share, min_overshared,
                   max_rows, plot) -> int:
    """Join the images of WORKSPACE into leakage groups and store them (table groups).

    Links: same patient id, same lesion id, same SHA-256, near-duplicate pairs with
    a verdict in --link-verdicts, and reviewers' same_image / same_lesion decisions;
    a different_lesions decision removes the near-duplicate link of that pair.
    Placeholder ids ("unknown", "0", "n/a" ...) and ids covering an implausible
    share of the images join nothing and are listed.

    Exit code 1 means placeholder ids or contradictions between decisions and
    metadata were found.
    """
    from curate.split_store import build_groups
    from curate.store import Workspace

    grouping = build_groups(
        Workspace.open(workspace), patient_scope=patient_scope, lesion_scope=lesion_scope,
        link_verdicts=tuple(_comma_list(link_verdicts)), max_id_share=max_id_share,
        min_overshared_images=min_overshared)
    click.echo(grouping.summary(max_rows))
    if plot:
        from curate.split_plots import plot_group_sizes

        plot_group_sizes(grouping).savefig(plot, dpi=120)
        click.echo(f"plot: {plot}")
    return EXIT_OK if grouping.report.ok else EXIT_FINDINGS


@command(main, "split", "Propose a grouped, stratified split (writes table splits).")
@click.argument("workspace", type=click.Path(file_okay=False, exists=True))
@click.option("--fractions", default="0.7,0.15,0.15", show_default=True,
              help="Target share of images per split, summing to 1.")
@click.option("--names", help="Split names, comma-separated [default: train,validation,test for three].")
@click.option("--stratify", help="Columns to balance, comma-separated: node, node:DEPTH, training_class, "
              "source, modality, ita_bin or any catalog column.")
@click.option("--random-state", "--seed", "random_state", type=int, default=0, show_default=True,
              help="Breaks ties between groups of equal size; same value, same split.")
@click.option("--keep", type=click.Path(exists=True),
              help="A frozen manifest (CSV/Parquet with sha256 or path, and split) whose images must not move.")
@click.option("--mend", is_flag=True,
              help="Update the stored split instead: only new images and groups that new pairs or decisions "
              "joined across splits are placed; its fractions, names, stratification and seed are reused.")
@click.option("--max-rows", type=click.IntRange(min=0), default=20, show_default=True,
              help="Findings to print.")
@click.option("--plot", type=click.Path(dir_okay=False), help="Write each class's share per split (PNG).")
def split_command(workspace, fractions, names, stratify, random_state, keep, mend, max_rows, plot) -> int:
    """Assign whole leakage groups of WORKSPACE to splits, balancing class shares.

    Groups are rebuilt first, with the options of the last `curate groups` run,
    so new pairs and review decisions count. With
    --keep, images of the manifest stay in their split, and new images that join
    one of their groups follow them. With --mend, the stored split is kept except
    for new images and groups that now span splits (after a review joined two
    images, or a leakage check's near-duplicates were added as pairs). Classes
    with fewer groups than splits are reported with where their groups went.

    Exit code 1 means findings: classes too small for every split, new images
    joining kept groups, or kept groups spanning two splits.
    """
    from curate.split_store import mend_split, split_workspace
    from curate.store import Workspace

    if mend:
        if keep:
            raise click.UsageError("--mend keeps the stored split; it cannot be combined with --keep")
        assignment, moved = mend_split(Workspace.open(workspace))
        click.echo(f"mended the stored split: {moved} image(s) changed split")
    else:
        try:
            fraction_values = [float(x) for x in _comma_list(fractions)]
        except ValueError:
            raise click.BadParameter(f"{fractions!r} is not a comma-separated list of numbers",
                                     param_hint="--fractions") from None
        assignment = split_workspace(
            Workspace.open(workspace), fractions=fraction_values, names=_comma_list(names),
            stratify=_comma_list(stratify), random_state=random_state, keep=keep)
    click.echo(assignment.summary(max_rows))
    if plot:
        from curate.split_plots import plot_split_shares

        plot_split_shares(assignment).savefig(plot, dpi=120)
        click.echo(f"plot: {plot}")
    return EXIT_OK if assignment.report.ok else EXIT_FINDINGS


# --- hashing -----------------------------------------------------------------------


@command(main, "hash", "Compute perceptual hashes of catalog images not hashed yet.")
@click.argument("workspace", type=click.Path(file_okay=False))
@click.option("--workers", type=int, default=None,
              help="Local processes (default: one per CPU core); 1 runs in this process.")
@click.option("--scheduler", metavar="ADDRESS", default=None,
              help="Run on the Dask cluster at this scheduler address; workers read files by path.")
@click.option("--quiet", "-q", is_flag=True, help="No progress bar.")
@click.option("--max-rows", type=click.IntRange(min=0), default=20, show_default=True,
              help="Problems to print.")
def hash_command(workspace, workers, scheduler, quiet, max_rows) -> int:
    """Hash every decodable catalog image of WORKSPACE whose content has no cached hashes.

    One reduced decode per file gives the average, difference, DCT, wavelet and
    colour hashes, the DCT hash of the 8 rotations/flips and of 69 crop windows
    (see docs/hashing.md). Hashes are cached by SHA-256, so a re-run only hashes
    new content. Files that cannot be hashed are listed and recorded as problems
    of step "hash"; exit code 1 means there were some.
    """
    from curate.hash_files import hash_workspace
    from curate.store import Workspace

    run = hash_workspace(Workspace.open(workspace), workers=workers, scheduler=scheduler,
                         progress=not quiet)
    click.echo(f"{run.hashed} hashed, {run.cached} already cached, {run.failed} failed")
    if not run.report.ok:
        click.echo(run.report.summary(max_rows))
        return EXIT_FINDINGS
    return EXIT_OK


# --- pairs -------------------------------------------------------------------------


@command(main, "pairs", "Find exact and near-duplicate image pairs (table pairs).")
@click.argument("workspace", type=click.Path(file_okay=False))
@click.option("--radius", type=click.IntRange(0, 64), default=None,
              help="Largest Hamming distance (bits, inclusive) for a candidate on any hash "
                   "(default 8).")
@click.option("--out", "out_path", type=click.Path(dir_okay=False),
              help="Also write the pairs as CSV (sorted by score, highest first).")
@click.option("--workers", type=click.IntRange(1), default=None,
              help="Processes for hashing and threads for the search (default: one per core).")
@click.option("--max-rows", type=click.IntRange(0), default=10, show_default=True,
              help="Pairs to print.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bars.")
def pairs_command(workspace, radius, out_path, workers, max_rows, quiet) -> int:
    """Find exact and near-duplicate pairs among the images of WORKSPACE.

    Hashes what is not hashed yet, searches every hash family, the 8
    rotations/flips and the crop windows within the radius, scores each pair and
    gives a verdict: exact (same SHA-256), near (several hash families agree),
    possible (a person should look). Conflicts mark pairs whose labels or
    patient ids differ. The table pairs is replaced. Exit code 1 means exact or
    near duplicates were found (see docs/near_duplicates.md).
    """
    from curate.near_duplicates import DEFAULT_RADIUS
    from curate.pair_store import find_pairs, pairs_for_output
    from curate.store import Workspace

    ws = Workspace.open(workspace)
    found = find_pairs(ws, radius=DEFAULT_RADIUS if radius is None else radius, workers=workers,
                       progress=not quiet)
    pairs = pairs_for_output(found)
    if out_path:
        pairs.to_csv(out_path, index=False)
    counts = pairs["verdict"].value_counts()
    conflicts = int(pairs["conflict"].notna().sum())
    click.echo(f"{len(pairs)} pairs: {int(counts.get('exact', 0))} exact, {int(counts.get('near', 0))} near, "
               f"{int(counts.get('possible', 0))} possible; {conflicts} with conflicting labels/patients")
    click.echo(f"crop check: {found.attrs['crop_checked']} pairs looked at, {found.attrs['crop_cached']} of them "
               "answered by an earlier run")
    if found.attrs.get("pairs_read_back"):
        click.echo("radius search and scoring: read back (same contents, codes and settings as an earlier run)")
    if max_rows and len(pairs):
        click.echo(pairs[["path_a", "path_b", "verdict", "score", "conflict"]].head(max_rows).to_string(index=False))
    return EXIT_FINDINGS if counts.get("exact", 0) or counts.get("near", 0) else EXIT_OK


# --- embedded metadata (privacy) ---------------------------------------------------


@command(main, "exif", "List embedded metadata that may identify patients; write clean copies.")
@click.argument("workspace", type=click.Path(exists=True, file_okay=False))
@click.option("--clean-copies", "clean_copies", type=click.Path(file_okay=False),
              help="Write copies without identifying metadata into this folder (pixels untouched).")
@click.option("--csv", "csv_path", type=click.Path(dir_okay=False),
              help="Write the fields found to this CSV.")
@click.option("--quiet", is_flag=True, help="No progress bar.")
def exif_command(workspace: str, clean_copies: str | None, csv_path: str | None, quiet: bool) -> int:
    """List Exif fields in the catalog's images that may identify a patient
    (GPS position, capture times, free-text descriptions, names, serial numbers).

    With --clean-copies, write copies of JPEG and PNG files with that metadata
    removed and the pixels untouched; the original files are never modified.
    Exit 1 when identifying fields were found.
    """
    from curate.exif_files import identifying_metadata, write_clean_copies
    from curate.store import Workspace

    ws = Workspace.open(workspace)
    catalog = ws.catalog()
    catalog = catalog[catalog["decodable"] == 1]
    fields = identifying_metadata(catalog["path"], progress=not quiet)
    if csv_path:
        fields.to_csv(csv_path, index=False)
    n_files = fields["path"].nunique()
    counts = fields.groupby("finding")["path"].nunique().to_dict()
    detail = ", ".join(f"{n} {kind}" for kind, n in sorted(counts.items()))
    click.echo(f"{n_files} of {len(catalog)} images carry identifying metadata" + (f" ({detail})" if detail else ""))
    if clean_copies:
        copies = write_clean_copies(catalog, clean_copies, progress=not quiet)
        done = copies["status"].value_counts().to_dict()
        click.echo("clean copies in " + clean_copies + ": " + ", ".join(f"{n} {s}" for s, n in sorted(done.items())))
    return EXIT_FINDINGS if n_files else EXIT_OK


# --- report ------------------------------------------------------------------------


@command(main, "report", "Write a Markdown report of the workspace (with plots and cautions).")
@click.argument("workspace", type=click.Path(exists=True, file_okay=False))
@click.option("--out", "out_dir", type=click.Path(file_okay=False),
              help="Folder for report.md and its plots (default: WORKSPACE/report).")
@click.option("--depth", type=int, default=2, show_default=True,
              help="Deepest taxonomy level shown in the balance table.")
def report_command(workspace: str, out_dir: str | None, depth: int) -> int:
    """Write report.md: catalog per source, problems, duplicate pairs, review decisions,
    identifying embedded metadata, label mapping, class balance per split, leakage
    groups, splits, skin-tone coverage and frozen manifests."""
    from curate.store import Workspace
    from curate.workspace_report import write_report

    path = write_report(Workspace.open(workspace), out_dir, depth=depth)
    click.echo(f"report written: {path}")
    return EXIT_OK
