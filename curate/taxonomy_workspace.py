"""Workspace side of the taxonomy steps: read the catalog with nodes, write image_nodes.

A thin I/O layer over :mod:`curate.taxonomy`, :mod:`curate.label_mapping`,
:mod:`curate.balance` and :mod:`curate.training_classes`: the computation is
there; this module only moves tables between them and the workspace (and
writes the class files).
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from curate.label_mapping import (
    apply_mapping,
    label_conflicts,
    merge_mappings,
    normalise_label,
    propose_mappings,
    read_mapping,
    write_mapping,
)
from curate.report import Finding
from curate.store import Workspace, record_problems
from curate.taxonomy import Taxonomy, example_taxonomy, read_taxonomy
from curate.training_classes import ClassProposal

__all__ = [
    "LabelResult",
    "map_workspace_labels",
    "node_frame",
    "workspace_taxonomy",
    "workspace_conflicts",
    "write_training_classes",
    "write_class_files",
]

TAXONOMY_META_KEY = "taxonomy_path"


@dataclass
class LabelResult:
    """What :func:`map_workspace_labels` did."""

    images: int
    mapped: int
    unmapped: pd.DataFrame  # raw_label, images, status
    proposals: pd.DataFrame  # rows added to the mapping file (empty unless propose)
    mapping_path: Path

    @property
    def ok(self) -> bool:
        return self.unmapped.empty


def workspace_taxonomy(ws: Workspace, tree: str | os.PathLike | None = None) -> Taxonomy:
    """The tree given, else the one last used with this workspace, else the example tree."""
    if tree is not None:
        return read_taxonomy(tree)
    stored = ws.get_meta(TAXONOMY_META_KEY)
    if stored and Path(stored).exists():
        return read_taxonomy(stored)
    return example_taxonomy()


def _table_exists(ws: Workspace, name: str) -> bool:
    got = ws.read_sql("SELECT name FROM sqlite_master WHERE type='table' AND name=?", (name,))
    return len(got) > 0


def map_workspace_labels(
    ws: Workspace,
    taxonomy: Taxonomy,
    mapping_path: str | os.PathLike,
    *,
    propose: bool = False,
    accept_proposed: bool = False,
    tree_path: str | os.PathLike | None = None,
) -> LabelResult:
    """Map every catalog label through the mapping file and write ``image_nodes``.

    With ``propose``, proposals for labels the file lacks are appended to it
    (the user's rows are kept as they are). Unmapped labels are listed and
    recorded as problems of step ``taxonomy`` (reason ``unmapped_label``);
    their images get a NULL node, so nothing is dropped.
    """
    mapping_path = Path(mapping_path)
    catalog = ws.catalog()
    labels = catalog["label"]
    mapping = read_mapping(mapping_path, taxonomy)
    proposals = pd.DataFrame()
    if propose:
        known = set(mapping["raw_label"].map(normalise_label)) if len(mapping) else set()
        proposals = propose_mappings(labels, taxonomy, known=known)
        mapping = merge_mappings(mapping, proposals)
        write_mapping(mapping, mapping_path)
    nodes, unmapped = apply_mapping(labels, mapping, accept_proposed=accept_proposed)
    rows = list(zip(catalog["image_id"].astype(int), nodes.where(nodes.notna(), None)))
    findings = [
        Finding("taxonomy", "unmapped_label",
                f"label {r.raw_label!r} ({r.images} images) has no {'confirmed ' if r.status != 'absent' else ''}"
                f"mapping ({r.status})", file=str(mapping_path), value=str(r.raw_label))
        for r in unmapped.itertuples()
    ]
    with ws.transaction() as con:
        con.execute("DELETE FROM image_nodes")
        con.executemany("INSERT INTO image_nodes(image_id, node, training_class) VALUES (?, ?, NULL)", rows)
        con.execute("DELETE FROM problems WHERE step = 'taxonomy'")
        record_problems(con, "taxonomy", findings)
        if tree_path is not None:
            con.execute("INSERT OR REPLACE INTO meta(key, value) VALUES (?, ?)",
                        (TAXONOMY_META_KEY, str(Path(tree_path).absolute())))
    return LabelResult(images=len(catalog), mapped=int(nodes.notna().sum()), unmapped=unmapped,
                       proposals=proposals, mapping_path=mapping_path)


def node_frame(ws: Workspace) -> pd.DataFrame:
    """The catalog joined with ``node``, ``training_class``, ``split`` (if any), ``ita``, ``ita_bin``.

    ``split`` is missing (NaN) for images without a split, and the column is
    all-missing when no split has been made yet.
    """
    return ws.read_sql(
        """
        SELECT i.*, n.node, n.training_class, s.split, t.ita, t.ita_bin
        FROM images i
        LEFT JOIN image_nodes n ON n.image_id = i.image_id
        LEFT JOIN splits s ON s.image_id = i.image_id
        LEFT JOIN skin_tone t ON t.sha256 = i.sha256
        WHERE i.present = 1
        ORDER BY i.image_id
        """
    )


def workspace_conflicts(ws: Workspace, taxonomy: Taxonomy | None = None) -> pd.DataFrame:
    """:func:`curate.label_mapping.label_conflicts` over the workspace (uses ``pairs`` if present)."""
    frame = node_frame(ws)
    pairs = None
    if _table_exists(ws, "pairs"):
        pairs = ws.read_sql("SELECT image_a, image_b, verdict FROM pairs")
    return label_conflicts(frame, pairs, taxonomy)


def write_training_classes(ws: Workspace, proposal: ClassProposal) -> int:
    """Set ``image_nodes.training_class`` from a proposal; returns images given a class."""
    frame = ws.read_sql("SELECT image_id, node FROM image_nodes")
    classes = proposal.class_of(frame["node"])
    rows = [(None if pd.isna(c) else c, int(i)) for c, i in zip(classes, frame["image_id"])]
    with ws.transaction() as con:
        con.executemany("UPDATE image_nodes SET training_class = ? WHERE image_id = ?", rows)
    return int(classes.notna().sum())


def write_class_files(
    proposal: ClassProposal,
    taxonomy: Taxonomy,
    out_dir: str | os.PathLike,
    *,
    depths: list[int],
    image_classes: pd.DataFrame | None = None,
) -> list[Path]:
    """Write classes.csv, image_classes.csv and the roll-up map per depth (CSV matrix + JSON lists)."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    written = []

    def atomic(path: Path, write):
        tmp = path.with_name(path.name + ".tmp")
        write(tmp)
        os.replace(tmp, path)
        written.append(path)

    atomic(out / "classes.csv", lambda p: proposal.to_frame().to_csv(p, index=False))
    if image_classes is not None:
        atomic(out / "image_classes.csv", lambda p: image_classes.to_csv(p, index=False))
    for depth in depths:
        matrix = proposal.rollup(taxonomy, depth)
        atomic(out / f"rollup_depth{depth}.csv", lambda p: matrix.to_csv(p, index_label="class"))
        lists = {col: [str(c) for c in matrix.index[matrix[col] == 1]] for col in matrix.columns}
        doc = {"format_version": 1, "depth": depth, "classes": list(map(str, matrix.index)), "rollup": lists}
        atomic(out / f"rollup_depth{depth}.json",
               lambda p: p.write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8"))
    return written
