"""Run every curation step that exists on a scenario folder and summarise what each found.

A scenario folder (as :func:`curate.demo.generate_scenario` writes it, or one
laid out the same way by hand) holds ``sources.json``: a list of
``{"name", "folder", "metadata", "columns"}`` with paths relative to the
folder. :func:`run_pipeline` creates ``OUT/workspace`` and runs :data:`STEPS`
in order; each step is a plain function of a :class:`PipelineContext` that
returns a small dict for the summary. Adding a step is one entry in the list.

Nothing here reads the scenario's ``truth/`` folder.

curate curates data; it does not diagnose. Clinical use needs validation and
licensed practice; patient data handling follows local law and institutional rules.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

CAUTIONS = (
    "Cautions: curate curates data; it does not diagnose. Clinical use needs validation and "
    "licensed practice; patient data handling follows local law and institutional rules."
)
WORKSPACE_DIR = "workspace"
SOURCE_KEYS = ("name", "folder", "metadata", "columns")


@dataclass
class PipelineContext:
    """What the steps share: the folder, the workspace, the sources and how to report."""

    out_dir: Path
    workspace: object
    sources: list
    progress: bool
    echo: Callable[[str], None]
    results: dict = field(default_factory=dict)
    taxonomy: object = None  # set by the taxonomy step
    leak_free: bool | None = None  # set by the check step


@dataclass(frozen=True)
class Step:
    """One pipeline step: a name and a function of the context returning a summary dict."""

    name: str
    run: Callable[[PipelineContext], dict]


def read_sources(out_dir) -> list[dict]:
    """Read and check ``OUT/sources.json``.

    Parameters
    ----------
    out_dir : str or path

    Returns
    -------
    list of dict
        Each with ``name``, ``folder``, ``metadata`` (paths relative to ``out_dir``)
        and ``columns`` (our field -> the CSV's column).

    Raises
    ------
    FileNotFoundError
        There is no ``sources.json``.
    ValueError
        It is not a list of such entries; the message names the entry and key.

    Examples
    --------
    >>> import tempfile, json, os
    >>> d = tempfile.mkdtemp()
    >>> with open(os.path.join(d, "sources.json"), "w") as f:
    ...     json.dump([{"name": "a", "folder": "a", "metadata": "a.csv", "columns": {}}], f)
    >>> [s["name"] for s in read_sources(d)]
    ['a']
    """
    path = Path(out_dir) / "sources.json"
    if not path.is_file():
        raise FileNotFoundError(f"{path} does not exist; a scenario folder needs a sources.json")
    try:
        entries = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ValueError(f"{path}: not readable JSON ({exc})") from None
    if not isinstance(entries, list) or not entries:
        raise ValueError(f"{path}: expected a non-empty list of sources")
    names = set()
    for i, entry in enumerate(entries):
        where = f"{path}: entry {i}"
        if not isinstance(entry, dict):
            raise ValueError(f"{where}: expected an object with keys {', '.join(SOURCE_KEYS)}")
        missing = [k for k in SOURCE_KEYS if k not in entry]
        if missing:
            raise ValueError(f"{where}: missing key(s) {', '.join(missing)}")
        if not isinstance(entry["columns"], dict):
            raise ValueError(f"{where}: 'columns' must map our fields to CSV column names")
        if entry["name"] in names:
            raise ValueError(f"{where}: source name {entry['name']!r} appears twice")
        names.add(entry["name"])
    return entries


# --- steps ---------------------------------------------------------------------------


def scan_sources(ctx: PipelineContext) -> dict:
    """Scan each source folder with its metadata CSV into the workspace."""
    from curate.ingest import scan_folder

    problems: dict[str, int] = {}
    files = 0
    result = None
    for source in ctx.sources:
        result = scan_folder(
            ctx.workspace,
            ctx.out_dir / source["folder"],
            source=source["name"],
            metadata=ctx.out_dir / source["metadata"],
            columns=source["columns"],
            progress=ctx.progress,
        )
        ctx.echo("  " + result.summary())
        files += result.files_seen
        for kind, n in result.report.counts().items():
            problems[kind] = problems.get(kind, 0) + n
    return {
        "files": files,
        "problems": dict(sorted(problems.items())),
        "exact_duplicate_files": result.exact_duplicate_files if result else 0,
        "exact_duplicate_groups": result.exact_duplicate_groups if result else 0,
    }


def hash_images(ctx: PipelineContext) -> dict:
    """Perceptual hashes of every decodable image (cached per SHA-256 in the workspace)."""
    from curate.hash_files import hash_workspace

    run = hash_workspace(ctx.workspace, progress=ctx.progress)
    return {"hashed": run.hashed, "cached": run.cached, "failed": run.failed}


def find_duplicate_pairs(ctx: PipelineContext) -> dict:
    """Exact and near-duplicate pairs within the Hamming radius (table ``pairs``)."""
    from curate.pair_store import find_pairs

    pairs = find_pairs(ctx.workspace, progress=ctx.progress)
    conflicts = pairs["conflict"].dropna() if len(pairs) else pairs.get("conflict", [])
    return {
        "pairs": len(pairs),
        "verdicts": _counts(pairs["verdict"]) if len(pairs) else {},
        "conflicts": _counts(conflicts) if len(conflicts) else {},
        "crop_checks": pairs.attrs.get("crop_checked", 0),
        "crop_checks_kept_from_earlier_runs": pairs.attrs.get("crop_cached", 0),
        "scored_pairs_read_back": "yes" if pairs.attrs.get("pairs_read_back") else "no",
    }


def map_labels(ctx: PipelineContext) -> dict:
    """Map raw labels onto the example taxonomy through ``workspace/labels.csv``.

    Demo shortcut: proposed mappings are applied without review. With your own
    data, read ``labels.csv``, confirm or fix each row, then run ``curate taxonomy``.
    """
    from curate.taxonomy import example_taxonomy
    from curate.taxonomy_workspace import map_workspace_labels

    ctx.taxonomy = example_taxonomy()
    mapping = ctx.workspace.path / "labels.csv"
    result = map_workspace_labels(ctx.workspace, ctx.taxonomy, mapping, propose=True, accept_proposed=True)
    ctx.echo(f"  proposed mappings applied unreviewed (demo); review {mapping}")
    return {"images": result.images, "mapped": result.mapped, "unmapped_labels": len(result.unmapped)}


def estimate_skin_tones(ctx: PipelineContext) -> dict:
    """Skin tone (ITA bin) of each distinct file, a coverage measure for the dataset."""
    from curate.skin_tone_files import estimate_skin_tone

    table = estimate_skin_tone(ctx.workspace, progress=ctx.progress)
    return {"bins": _counts(table["ita_bin"].fillna("none"))}


def check_class_balance(ctx: PipelineContext) -> dict:
    """Images, lesions and patients per taxonomy node; nodes flagged as too small or imbalanced."""
    from curate.balance import balance
    from curate.taxonomy_workspace import node_frame

    table = balance(node_frame(ctx.workspace), ctx.taxonomy)
    flagged = table[table["flags"].astype(bool)]
    return {"nodes_with_images": int((table["images"] > 0).sum()), "nodes_flagged": len(flagged)}


def build_leakage_groups(ctx: PipelineContext) -> dict:
    """Leakage groups: same patient, lesion, digest, or near-duplicate pair."""
    from curate.split_store import build_groups

    grouping = build_groups(ctx.workspace)
    return {"groups": grouping.n_groups, "findings": grouping.report.counts()}


def propose_demo_split(ctx: PipelineContext) -> dict:
    """A 70/15/15 grouped split stratified by taxonomy node at depth 1."""
    from curate.split_store import split_workspace

    assignment = split_workspace(ctx.workspace, stratify=["node:1"], random_state=0, taxonomy=ctx.taxonomy)
    return {"images": _counts(assignment.splits), "findings": assignment.report.counts()}


#: How many times the check step may check the split; after each check but the last, the
#: near-duplicates it found are joined and the split mended.
CHECK_ROUNDS = 3


def check_split_leakage(ctx: PipelineContext) -> dict:
    """Independent leakage check of the split (shared files, near-duplicates, patients, lesions).

    The check spends its crop checks on pairs across splits, so it can confirm copies
    the pairs step left unsure. Those are stored as pairs (:func:`curate.pair_store.add_found_pairs`),
    the split is mended around them (:func:`curate.split_store.mend_split`) and
    checked again, at most :data:`CHECK_ROUNDS` times. Only a clean last check lets the
    split be frozen; any other kind of leak ends the rounds.
    """
    from curate.freeze import workspace_split_table
    from curate.leakage_check import check_leakage
    from curate.pair_store import add_found_pairs
    from curate.split_store import mend_split

    joined = moved = read_back = 0
    for round_number in range(1, CHECK_ROUNDS + 1):
        table = workspace_split_table(ctx.workspace)
        table = table[["path", "split", "patient_id", "lesion_id", "sha256", "source"]]
        report = check_leakage(table, root="/", cache=ctx.workspace.path,
                               patient_scope="source", lesion_scope="source", progress=ctx.progress)
        read_back += bool(report.parameters.get("scored_pairs_read_back"))
        kinds = set(report.counts())
        if report.ok or kinds != {"near_duplicate"} or round_number == CHECK_ROUNDS:
            break
        added = add_found_pairs(ctx.workspace, report.leaks)
        _, changed = mend_split(ctx.workspace, taxonomy=ctx.taxonomy)
        joined, moved = joined + added, moved + changed
        ctx.echo(f"  check {round_number}: {added} near-duplicate pairs across splits that the pairs "
                 f"step had not joined; joined them and moved {changed} images")
    ctx.leak_free = report.ok
    return {"images": report.n_images, "leaks": report.counts(), "checks": round_number,
            "checks_reading_scored_pairs_back": read_back, "pairs_joined_from_checks": joined,
            "images_moved": moved}


def freeze_demo_split(ctx: PipelineContext) -> dict:
    """Freeze the split as a manifest (refused while the split leaks: by the workspace's own
    evidence, or by the independent check of the step before)."""
    from curate.errors import LeakageError
    from curate.freeze import freeze_split, manifest_name_taken

    if ctx.leak_free is False:
        leaks = ctx.results.get("check", {}).get("leaks", {})
        return {"frozen": "no, the independent leakage check found leaks",
                "reason": ", ".join(f"{n} {kind}" for kind, n in leaks.items()) or "see the check step"}
    # a manifest name is never reused: a second run over the same folder freezes demo-2, ...
    name = next(n for n in ("demo", *(f"demo-{k}" for k in range(2, 10_000)))
                if not manifest_name_taken(ctx.workspace, n))
    try:
        frozen = freeze_split(ctx.workspace, name, progress=ctx.progress, command="curate demo")
    except LeakageError as exc:
        return {"frozen": "no, the split leaks", "reason": str(exc).splitlines()[0]}
    return {"frozen": "yes", "files": ", ".join(str(p) for p in frozen.files.values())}


def find_identifying_metadata(ctx: PipelineContext) -> dict:
    """Embedded metadata (Exif) that may identify patients; nothing is changed."""
    from curate.exif_files import identifying_metadata

    catalog = ctx.workspace.catalog()
    fields = identifying_metadata(catalog.loc[catalog["decodable"] == 1, "path"], progress=ctx.progress)
    found = fields.groupby("finding")["path"].nunique()
    return {"images with identifying fields": int(fields["path"].nunique()),
            "by kind": {str(k): int(v) for k, v in found.items()}}


def write_workspace_report(ctx: PipelineContext) -> dict:
    """Write the Markdown report with its plots into ``WS/report``."""
    from curate.workspace_report import write_report

    return {"report": str(write_report(ctx.workspace))}


def _counts(values) -> dict:
    import pandas as pd

    return {str(k): int(v) for k, v in pd.Series(values).value_counts().sort_index().items()}


#: the steps run in order; a step is added here once its library code exists
STEPS: tuple[Step, ...] = (
    Step("scan", scan_sources),
    Step("exif", find_identifying_metadata),
    Step("hash", hash_images),
    Step("pairs", find_duplicate_pairs),
    Step("taxonomy", map_labels),
    Step("skin_tone", estimate_skin_tones),
    Step("balance", check_class_balance),
    Step("groups", build_leakage_groups),
    Step("split", propose_demo_split),
    Step("check", check_split_leakage),
    Step("freeze", freeze_demo_split),
    Step("report", write_workspace_report),
)


def run_pipeline(out_dir, *, progress: bool = True, echo: Callable[[str], None] = print, steps=None) -> dict:
    """Run the curation steps on a scenario folder and print a short summary.

    Parameters
    ----------
    out_dir : str or path
        A scenario folder holding ``sources.json`` (see :func:`read_sources`).
    progress : bool
        Show progress bars (tqdm, on stderr).
    echo : callable
        Where summary lines go (``print`` by default; ``click.echo`` in the CLI).
    steps : sequence of Step, optional
        Defaults to :data:`STEPS`.

    Returns
    -------
    dict
        ``workspace`` (path), ``steps`` (step name -> its summary dict),
        ``seconds`` (step name -> wall time) and ``cautions``.

    Examples
    --------
    >>> import tempfile, json, os
    >>> from PIL import Image
    >>> d = tempfile.mkdtemp(); os.mkdir(os.path.join(d, "clinic"))
    >>> Image.new("RGB", (8, 8), "tan").save(os.path.join(d, "clinic", "a.png"))
    >>> with open(os.path.join(d, "clinic.csv"), "w") as f:
    ...     _ = f.write("file,pid\\na.png,P1\\n")
    >>> with open(os.path.join(d, "sources.json"), "w") as f:
    ...     json.dump([{"name": "clinic", "folder": "clinic", "metadata": "clinic.csv",
    ...                 "columns": {"path": "file", "patient": "pid"}}], f)
    >>> summary = run_pipeline(d, progress=False, echo=lambda line: None)
    >>> summary["steps"]["scan"]["files"], summary["steps"]["scan"]["problems"]
    (1, {})
    """
    from curate.store import Workspace

    out = Path(out_dir).absolute()
    sources = read_sources(out)
    ws = Workspace.create(out / WORKSPACE_DIR)
    ctx = PipelineContext(out, ws, sources, progress, echo)
    summary = {"workspace": str(ws.path), "steps": ctx.results, "seconds": {}, "cautions": CAUTIONS}
    for step in STEPS if steps is None else steps:
        echo(f"{step.name}:")
        started = time.perf_counter()
        ctx.results[step.name] = step.run(ctx)
        summary["seconds"][step.name] = round(time.perf_counter() - started, 3)
    for line in summary_lines(summary):
        echo(line)
    return summary


def summary_lines(summary: dict) -> list[str]:
    """The closing lines of a pipeline run: one per step, then the cautions.

    Examples
    --------
    >>> summary_lines({"workspace": "ws", "steps": {"scan": {"files": 2}},
    ...                "seconds": {"scan": 0.5}, "cautions": "Cautions: ..."})
    ['summary (workspace ws):', '  scan (0.5 s): files 2', 'Cautions: ...']
    """
    lines = [f"summary (workspace {summary['workspace']}):"]
    for name, result in summary["steps"].items():
        parts = []
        for key, value in result.items():
            if isinstance(value, dict):
                value = ", ".join(f"{n} {k}" for k, n in value.items()) or "none"
            parts.append(f"{key.replace('_', ' ')} {value}")
        lines.append(f"  {name} ({summary['seconds'].get(name, 0):.1f} s): " + "; ".join(parts))
    lines.append(summary["cautions"])
    return lines
