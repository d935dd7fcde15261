"""A readable report of a workspace: what is in it, what was found, how it is split.

:func:`summarise` turns the workspace's tables (as DataFrames) into small
summary tables; it is pure. :func:`render_markdown` turns those into Markdown;
also pure. :func:`write_report` reads the workspace, draws the plots and writes
``report.md`` with its PNG files, atomically.

Every report carries the cautions: curate curates data, it does not diagnose.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

CAUTIONS = [
    "curate curates data; it does not diagnose. Nothing in this report is a clinical finding.",
    "Clinical use of any model trained on this data needs its own validation and licensed clinical practice.",
    "Patient data handling follows local law and the institution's rules; pseudonymised identifiers "
    "are not anonymous, and embedded image metadata (Exif) may identify patients.",
]


@dataclass
class WorkspaceSummary:
    """Small tables describing a workspace, each ready to print."""

    sources: pd.DataFrame
    problems: pd.DataFrame
    verdicts: pd.DataFrame
    decisions: pd.DataFrame
    mapping: pd.DataFrame
    groups: pd.DataFrame
    largest_groups: pd.DataFrame
    splits: pd.DataFrame
    skin_tone: pd.DataFrame
    manifests: pd.DataFrame
    embedded_metadata: pd.DataFrame = field(default_factory=pd.DataFrame)
    notes: list[str] = field(default_factory=list)


def _distinct(frame: pd.DataFrame, by: str, column: str) -> pd.Series:
    return frame.dropna(subset=[column]).groupby(by)[column].nunique()


def summarise(
    images: pd.DataFrame,
    *,
    problems: pd.DataFrame | None = None,
    pairs: pd.DataFrame | None = None,
    decisions: pd.DataFrame | None = None,
    groups: pd.DataFrame | None = None,
    manifests: pd.DataFrame | None = None,
    embedded_metadata: pd.DataFrame | None = None,
) -> WorkspaceSummary:
    """Summary tables from a workspace's tables.

    Parameters
    ----------
    images : DataFrame
        One row per image: catalog columns plus ``node``, ``split``, ``ita_bin``
        where known (as :func:`curate.taxonomy_workspace.node_frame` gives).
    problems, pairs, decisions, groups, manifests : DataFrame, optional
        The workspace tables of those names.
    embedded_metadata : DataFrame, optional
        Identifying Exif fields found (:func:`curate.exif_files.identifying_metadata`).

    Examples
    --------
    >>> images = pd.DataFrame({"image_id": [1, 2, 3], "source": ["a", "a", "b"],
    ...     "patient_id": ["p1", "p1", "p2"], "lesion_id": ["l1", "l2", None],
    ...     "decodable": [1, 1, 0], "node": ["x", None, "y"], "split": ["train", "test", None]})
    >>> s = summarise(images)
    >>> s.sources.loc["a", ["images", "patients", "lesions"]].tolist()
    [2, 1, 2]
    >>> s.splits["images"].to_dict()
    {'test': 1, 'train': 1}
    """
    images = images.copy()
    for col in ("patient_id", "lesion_id", "node", "split", "ita_bin", "modality"):
        if col not in images:
            images[col] = None
    sources = pd.DataFrame(
        {
            "images": images.groupby("source").size(),
            "decodable": images.groupby("source")["decodable"].sum(),
            "patients": _distinct(images, "source", "patient_id"),
            "lesions": _distinct(images, "source", "lesion_id"),
        }
    ).fillna(0).astype(int)
    problem_counts = (
        problems.groupby(["step", "kind"]).size().rename("count").reset_index()
        if problems is not None and len(problems)
        else pd.DataFrame(columns=["step", "kind", "count"])
    )
    verdicts = (
        pairs.groupby("verdict").size().rename("pairs").to_frame()
        if pairs is not None and len(pairs)
        else pd.DataFrame(columns=["pairs"])
    )
    if pairs is not None and len(pairs) and "conflict" in pairs:
        verdicts["with conflicting label or patient"] = pairs.dropna(subset=["conflict"]).groupby("verdict").size()
        verdicts = verdicts.fillna(0).astype(int)
    decision_counts = pd.DataFrame(columns=["decisions"])
    if decisions is not None and len(decisions):
        live = decisions[decisions["undone"] == 0].sort_values("decision_id")
        latest = live.groupby(["image_a", "image_b"]).tail(1)
        decision_counts = latest.groupby("decision").size().rename("decisions").to_frame()
    mapped = images["node"].notna()
    mapping = pd.DataFrame(
        {"images": [int(mapped.sum()), int((~mapped).sum())]},
        index=pd.Index(["mapped to a node", "unmapped"], name="label"),
    )
    exif = pd.DataFrame(columns=["images"])
    if embedded_metadata is not None and len(embedded_metadata):
        exif = embedded_metadata.groupby("finding")["path"].nunique().rename("images").to_frame()
    group_sizes = pd.DataFrame(columns=["groups"])
    largest = pd.DataFrame(columns=["group_id", "images", "patients", "lesions", "sources"])
    if groups is not None and len(groups):
        g = images.merge(groups, on="image_id", how="inner")
        sizes = g.groupby("group_id").size()
        bins = pd.cut(sizes, [0, 1, 2, 5, 10, 50, float("inf")], labels=["1", "2", "3-5", "6-10", "11-50", ">50"])
        group_sizes = bins.value_counts().sort_index().rename("groups").to_frame()
        group_sizes.index.name = "images per group"
        top = sizes.sort_values(ascending=False, kind="stable").head(5).index
        largest = (
            g[g["group_id"].isin(top)]
            .groupby("group_id")
            .agg(
                images=("image_id", "size"),
                patients=("patient_id", "nunique"),
                lesions=("lesion_id", "nunique"),
                sources=("source", "nunique"),
            )
            .sort_values("images", ascending=False, kind="stable")
            .reset_index()
        )
    in_split = images.dropna(subset=["split"])
    splits = pd.DataFrame(
        {
            "images": in_split.groupby("split").size(),
            "patients": _distinct(in_split, "split", "patient_id"),
            "lesions": _distinct(in_split, "split", "lesion_id"),
            "mapped nodes": _distinct(in_split, "split", "node"),
        }
    ).fillna(0).astype(int)
    if len(splits):
        splits["share of images"] = (splits["images"] / splits["images"].sum()).round(3)
    skin = (
        pd.crosstab(in_split["ita_bin"], in_split["split"])
        if len(in_split) and in_split["ita_bin"].notna().any()
        else pd.DataFrame()
    )
    manifests = manifests if manifests is not None else pd.DataFrame(columns=["name", "fingerprint", "created_at"])
    return WorkspaceSummary(
        sources=sources,
        problems=problem_counts,
        verdicts=verdicts,
        decisions=decision_counts,
        mapping=mapping,
        groups=group_sizes,
        largest_groups=largest,
        splits=splits,
        skin_tone=skin,
        manifests=manifests[[c for c in ("name", "fingerprint", "created_at") if c in manifests]],
        embedded_metadata=exif,
    )


def _table(frame: pd.DataFrame, *, index: bool = True) -> str:
    if frame is None or frame.empty:
        return "_none_\n"
    shown = frame.reset_index() if index else frame
    header = "| " + " | ".join(str(c) for c in shown.columns) + " |"
    rule = "|" + "|".join("---" for _ in shown.columns) + "|"
    rows = ["| " + " | ".join("" if pd.isna(v) else str(v) for v in row) + " |" for row in shown.itertuples(index=False)]
    return "\n".join([header, rule, *rows]) + "\n"


def render_markdown(summary: WorkspaceSummary, *, title: str, plots: dict[str, str] | None = None,
                    balance: pd.DataFrame | None = None) -> str:
    """The report as Markdown; ``plots`` maps a caption to a PNG file name beside the report.

    Examples
    --------
    >>> s = summarise(pd.DataFrame({"image_id": [1], "source": ["a"], "decodable": [1]}))
    >>> text = render_markdown(s, title="t")
    >>> "does not diagnose" in text and text.startswith("# t")
    True
    """
    plots = plots or {}
    parts = [f"# {title}\n", "## Cautions\n", *(f"- {c}" for c in CAUTIONS), ""]
    parts += ["## Catalog\n", "Images, patients and lesions per source (ids as each source recorded them).\n",
              _table(summary.sources)]
    parts += ["## Problems found\n", _table(summary.problems, index=False)]
    parts += ["## Duplicate pairs\n",
              "`exact`: same bytes; `near`: several perceptual hashes agree; `possible`: needs a person's review.\n",
              _table(summary.verdicts), "### Review decisions (latest per pair)\n", _table(summary.decisions)]
    parts += ["## Embedded metadata that may identify patients\n",
              "Images whose Exif carries such fields (`curate exif WS --clean-copies DIR` writes copies without them).\n",
              _table(summary.embedded_metadata)]
    parts += ["## Labels and taxonomy\n", _table(summary.mapping)]
    if balance is not None and not balance.empty:
        parts += ["### Class balance per split (rolled up the tree)\n", _table(balance, index=False)]
    parts += ["## Leakage groups\n", _table(summary.groups), "### Largest groups\n",
              _table(summary.largest_groups, index=False)]
    parts += ["## Splits\n", _table(summary.splits)]
    if not summary.skin_tone.empty:
        parts += ["### Skin tone (ITA bin) per split\n", _table(summary.skin_tone)]
    parts += ["## Frozen manifests\n", _table(summary.manifests, index=False)]
    for caption, file in plots.items():
        parts += [f"![{caption}]({file})\n"]
    parts += [f"- {n}" for n in summary.notes]
    return "\n".join(parts) + "\n"


def _read_optional(ws, table: str) -> pd.DataFrame | None:
    exists = ws.read_sql("SELECT name FROM sqlite_master WHERE type='table' AND name=?", (table,))
    return ws.read_sql(f"SELECT * FROM {table}") if len(exists) else None


def write_report(ws, out_dir: str | os.PathLike | None = None, *, depth: int = 2) -> Path:
    """Write ``report.md`` and its plots for a workspace; returns the report's path.

    ``out_dir`` defaults to ``WS/report``. Files are written to a temporary
    name and renamed into place.
    """
    from curate.balance import balance, plot_balance, tree_view
    from curate.exif_files import identifying_metadata
    from curate.taxonomy_workspace import node_frame, workspace_taxonomy

    out = Path(out_dir) if out_dir is not None else ws.path / "report"
    out.mkdir(parents=True, exist_ok=True)
    images = node_frame(ws)
    summary = summarise(
        images,
        problems=ws.problems(),
        pairs=_read_optional(ws, "pairs"),
        decisions=_read_optional(ws, "decisions"),
        groups=_read_optional(ws, "groups"),
        manifests=_read_optional(ws, "manifests"),
        embedded_metadata=identifying_metadata(images.loc[images["decodable"] == 1, "path"]),
    )
    plots, table = {}, None
    if images["node"].notna().any():
        by = "split" if images["split"].notna().any() else None
        table = balance(images, workspace_taxonomy(ws), by=by, depth=depth)
        fig = plot_balance(table, measure="lesions")
        _atomic_save(out / "balance.png", lambda p: fig.savefig(p, dpi=110, format="png"))
        plots["Lesions per taxonomy node" + (" and split" if by else "")] = "balance.png"
        table = tree_view(table, indent="&nbsp;&nbsp;")
    text = render_markdown(summary, title=f"curate report: {ws.path.name}", plots=plots, balance=table)
    _atomic_save(out / "report.md", lambda p: Path(p).write_text(text, encoding="utf-8"))
    return out / "report.md"


def _atomic_save(target: Path, write) -> None:
    tmp = target.with_name(f".{target.name}.part")
    write(str(tmp))
    os.replace(tmp, target)
