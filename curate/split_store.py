"""Workspace side of grouping and splitting: read the tables, run the pure steps, write back.

* :func:`build_groups` reads ``images``, ``pairs`` and ``decisions``, runs
  :func:`curate.grouping.group_images` and writes table ``groups`` plus the
  parameters under meta key ``group_parameters``; findings go to ``problems``
  with step ``groups``.
* :func:`split_workspace` reads the catalog with its groups, taxonomy nodes
  (table ``image_nodes``) and skin-tone bins (table ``skin_tone``), runs
  :func:`curate.splitting.propose_split` and writes table ``splits`` plus the
  parameters under meta key ``split_parameters`` (JSON), which the freeze step
  records in the manifest.
* :func:`read_keep_manifest` turns a frozen manifest (or any split table with
  ``sha256`` or ``path`` and ``split``) into the locked split per ``image_id``.
"""

from __future__ import annotations

import json
import os
from pathlib import PurePath

import pandas as pd

from curate.grouping import Grouping, group_images
from curate.splitting import SplitAssignment, check_fractions, propose_split
from curate.store import Workspace, record_problems, utc_now

GROUP_META_KEY = "group_parameters"
SPLIT_META_KEY = "split_parameters"

#: Stratification columns read from tables other than ``images``.
EXTRA_COLUMNS = ("node", "training_class", "ita_bin")


def _table_rows(ws: Workspace, table: str) -> int:
    exists = ws.read_sql("SELECT name FROM sqlite_master WHERE type='table' AND name=?", (table,))
    if exists.empty:
        return 0
    return int(ws.read_sql(f"SELECT COUNT(*) AS n FROM {table}")["n"].iloc[0])


def build_groups(ws: Workspace, **options) -> Grouping:
    """Group the workspace's present images and store the result.

    Parameters
    ----------
    ws : Workspace
    **options
        Passed to :func:`curate.grouping.group_images` (``patient_scope``,
        ``lesion_scope``, ``link_verdicts``, ``max_id_share`` ...).

    Returns
    -------
    Grouping
    """
    catalog = ws.catalog()
    pairs = ws.read_sql("SELECT image_a, image_b, verdict FROM pairs") if _table_rows(ws, "pairs") else None
    decisions = ws.read_sql("SELECT * FROM decisions") if _table_rows(ws, "decisions") else None
    grouping = group_images(catalog, pairs, decisions, **options)
    record = dict(grouping.parameters, images=len(grouping.groups), groups=grouping.n_groups,
                  pairs_used=0 if pairs is None else len(pairs),
                  decisions_used=0 if decisions is None else len(decisions), created_at=utc_now())
    rows = list(zip(grouping.groups.index.astype(int).tolist(), grouping.groups.tolist()))
    with ws.transaction() as con:
        con.execute("DELETE FROM groups")
        con.executemany("INSERT INTO groups(image_id, group_id) VALUES (?, ?)", rows)
        con.execute("DELETE FROM problems WHERE step = 'groups'")
        record_problems(con, "groups", grouping.report)
        con.execute("INSERT OR REPLACE INTO meta(key, value) VALUES (?, ?)",
                    (GROUP_META_KEY, json.dumps(record, sort_keys=True)))
    return grouping


def stored_group_options(ws: Workspace) -> dict:
    """The grouping options of the last :func:`build_groups` run (empty: defaults)."""
    record = json.loads(ws.get_meta(GROUP_META_KEY, "{}") or "{}")
    keys = ("patient_scope", "lesion_scope", "link_verdicts", "max_id_share", "min_overshared_images")
    return {k: (tuple(record[k]) if k == "link_verdicts" else record[k]) for k in keys if k in record}


def split_catalog(ws: Workspace) -> pd.DataFrame:
    """The present catalog with ``group_id``, ``node``, ``training_class`` and ``ita_bin``."""
    catalog = ws.catalog()
    groups = ws.read_sql("SELECT image_id, group_id FROM groups")
    catalog = catalog.merge(groups, on="image_id", how="left")
    if _table_rows(ws, "image_nodes"):
        nodes = ws.read_sql("SELECT image_id, node, training_class FROM image_nodes")
        catalog = catalog.merge(nodes, on="image_id", how="left")
    if _table_rows(ws, "skin_tone"):
        tone = ws.read_sql("SELECT sha256, ita_bin FROM skin_tone")
        catalog = catalog.merge(tone, on="sha256", how="left")
    return catalog


def _stratify_columns(catalog: pd.DataFrame, stratify, ws: Workspace, taxonomy) -> tuple[pd.DataFrame, list]:
    """Resolve ``node:DEPTH`` entries into ancestor columns; check the others exist."""
    columns = []
    for spec in stratify or ():
        spec = spec.strip()
        if spec.startswith("node:"):
            try:
                depth = int(spec.split(":", 1)[1])
            except ValueError:
                raise ValueError(f"--stratify {spec!r}: the depth after 'node:' must be an integer") from None
            if "node" not in catalog.columns:
                raise ValueError(f"--stratify {spec!r}: no taxonomy nodes in the workspace (run `curate taxonomy` first)")
            if taxonomy is None:
                from curate.taxonomy_workspace import workspace_taxonomy

                taxonomy = workspace_taxonomy(ws)
            catalog[spec] = catalog["node"].map(
                lambda n: taxonomy.ancestor_at_depth(n, depth) if isinstance(n, str) and n in taxonomy else n)
        elif spec not in catalog.columns:
            hint = " (run `curate taxonomy` first)" if spec in ("node", "training_class") else (
                " (no skin-tone table yet)" if spec == "ita_bin" else "")
            raise ValueError(f"--stratify {spec!r}: no such column{hint}; columns: "
                             f"{', '.join(c for c in catalog.columns if c not in ('path', 'root'))}")
        columns.append(spec)
    return catalog, columns


def read_keep_manifest(path: str | os.PathLike, catalog: pd.DataFrame) -> tuple[pd.Series, dict]:
    """Locked split per ``image_id`` from a manifest, and how its rows matched.

    Rows are matched by ``sha256`` when the manifest has it (every catalog image
    with that digest is locked), otherwise by ``path``: an absolute path must
    equal a catalog path; a relative one must equal the end of exactly one
    catalog path. Unmatched rows are counted, not fatal (the file may be gone).
    """
    from curate.manifest_io import read_manifest, read_table, table_path

    raw = read_table(table_path(path))
    lower = {str(c).strip().lower(): c for c in raw.columns}
    if "sha256" in lower and "split" in lower:  # a digest-keyed table needs no path column
        table = pd.DataFrame({"sha256": raw[lower["sha256"]], "split": raw[lower["split"]]})
    else:
        table = read_manifest(path)  # path + split, in any of the usual spellings
    counts = {"rows": len(table), "matched_rows": 0, "unmatched_rows": 0}
    if "sha256" in table.columns and table["sha256"].notna().all():
        by_sha = catalog.dropna(subset=["sha256"]).groupby("sha256")["image_id"].apply(list)
        pairs = []
        for row, (digest, split) in enumerate(zip(table["sha256"].str.lower(), table["split"]), start=2):
            ids = by_sha.get(digest)
            if ids is None:
                counts["unmatched_rows"] += 1
                continue
            counts["matched_rows"] += 1
            pairs += [(i, split, row) for i in ids]
    else:
        if "path" not in table.columns:
            raise ValueError(f"{path}: needs a sha256 or a path column")
        pairs = _match_paths(table, catalog, path, counts)
    frame = pd.DataFrame(pairs, columns=["image_id", "split", "row"])
    clash = frame.groupby("image_id")["split"].nunique()
    if (clash > 1).any():
        image_id = int(clash[clash > 1].index[0])
        rows = frame.loc[frame["image_id"] == image_id, "row"].tolist()
        raise ValueError(f"{path}: rows {rows} put image {image_id} (same file) in different splits")
    keep = frame.drop_duplicates("image_id").set_index("image_id")["split"].sort_index()
    return keep, counts


def _match_paths(table, catalog, path, counts):
    cat_parts = [PurePath(p).parts for p in catalog["path"]]
    ids = catalog["image_id"].tolist()
    tails: dict[int, dict] = {}
    pairs = []
    for row, (p, split) in enumerate(zip(table["path"], table["split"]), start=2):
        parts = PurePath(str(p).replace("\\", "/")).parts
        if PurePath(str(p)).is_absolute():
            hits = [i for i, cp in zip(ids, cat_parts) if cp == parts]
        else:
            m = len(parts)
            if m not in tails:
                index: dict = {}
                for i, cp in zip(ids, cat_parts):
                    index.setdefault(cp[-m:], []).append(i)
                tails[m] = index
            hits = tails[m].get(parts, [])
        if len(hits) > 1:
            raise ValueError(f"{path} row {row}: path {p!r} matches {len(hits)} catalog images; "
                             "use a manifest with a sha256 column")
        if not hits:
            counts["unmatched_rows"] += 1
            continue
        counts["matched_rows"] += 1
        pairs.append((hits[0], split, row))
    return pairs


def split_workspace(
    ws: Workspace,
    *,
    fractions=(0.7, 0.15, 0.15),
    names=None,
    stratify=None,
    random_state=0,
    keep: str | os.PathLike | pd.Series | None = None,
    taxonomy=None,
    group_options: dict | None = None,
) -> SplitAssignment:
    """Propose a split of the workspace's present images and store it in table ``splits``.

    Groups are rebuilt first (with ``group_options``, or else the options of the
    last :func:`build_groups` run), so new pairs and decisions count. ``stratify``
    takes catalog columns (``source``, ``modality`` ...),
    ``node``, ``training_class``, ``ita_bin``, and ``node:DEPTH`` for the taxonomy
    ancestor at that depth. ``keep`` is a manifest whose assignments must not move, or
    a Series of split names by ``image_id`` (as :func:`mend_split` passes).
    """
    if ws.catalog().empty:
        raise ValueError(f"{ws.path}: the catalog is empty; run `curate scan` first")
    # groups are always rebuilt, with the options of the last `curate groups` run, so
    # pairs and review decisions added since then are honoured
    build_groups(ws, **(group_options if group_options is not None else stored_group_options(ws)))
    return _split_grouped(ws, fractions=fractions, names=names, stratify=stratify, random_state=random_state,
                          keep=keep, taxonomy=taxonomy)


def _split_grouped(ws: Workspace, *, fractions, names, stratify, random_state, keep, taxonomy) -> SplitAssignment:
    """:func:`split_workspace` once the groups are built: split, store, return."""
    catalog = split_catalog(ws)
    catalog, columns = _stratify_columns(catalog, stratify, ws, taxonomy)
    locked, keep_counts, kept = None, None, keep
    if isinstance(keep, pd.Series):
        locked, keep_counts, kept = keep, {"kept_from": "the previous split", "rows": int(len(keep))}, "previous split"
    elif keep is not None:
        locked, keep_counts = read_keep_manifest(keep, catalog)
    if keep is not None:
        _, effective = check_fractions(fractions, names)
        strange = sorted(set(locked) - set(effective))
        if strange:
            raise ValueError(f"{kept}: split(s) {strange} are not among the split names {list(effective)}")
    assignment = propose_split(catalog, fractions=fractions, names=names, stratify=columns,
                               keep=locked, random_state=random_state)
    parameters = dict(assignment.parameters, keep=None if kept is None else str(kept),
                      keep_rows=keep_counts, group_parameters=stored_group_options(ws),
                      images=len(assignment.splits),
                      created_at=utc_now())
    assignment.parameters = parameters
    rows = list(zip(assignment.splits.index.astype(int).tolist(), assignment.splits.tolist()))
    with ws.transaction() as con:
        con.execute("DELETE FROM splits")
        con.executemany("INSERT INTO splits(image_id, split) VALUES (?, ?)", rows)
        con.execute("DELETE FROM problems WHERE step = 'split'")
        record_problems(con, "split", assignment.report)
        con.execute("INSERT OR REPLACE INTO meta(key, value) VALUES (?, ?)",
                    (SPLIT_META_KEY, json.dumps(parameters, sort_keys=True, default=str)))
    return assignment


def mend_split(ws: Workspace, *, taxonomy=None) -> tuple[SplitAssignment, int]:
    """Bring the stored split up to date with new pairs, decisions and images, moving as few
    images as possible.

    Groups are rebuilt (options of the last :func:`build_groups`). Every image whose
    group still sits in one split keeps it; the images of groups that now span
    splits (joined by a new pair or decision), and images without a split yet, are
    placed by the same optimiser, with the fractions, names, stratification and seed
    of the stored split.

    Returns
    -------
    SplitAssignment, int
        The new split (also stored, as :func:`split_workspace` does) and how many
        images changed split.

    Raises
    ------
    ValueError
        The workspace has no stored split to mend.
    """
    record = ws.get_meta(SPLIT_META_KEY)
    current = ws.read_sql("SELECT image_id, split FROM splits").set_index("image_id")["split"]
    if record is None or current.empty:
        raise ValueError(f"{ws.path}: no split to mend; propose one first (`curate split`)")
    stored = json.loads(record)
    groups = build_groups(ws, **stored_group_options(ws)).groups
    current = current[current.index.isin(groups.index)]
    spans = current.groupby(groups.reindex(current.index)).nunique()
    torn = groups.reindex(current.index).isin(spans.index[spans > 1])
    assignment = _split_grouped(ws, fractions=stored["fractions"], names=stored["names"],
                                stratify=stored["stratify"], random_state=stored["random_state"],
                                keep=current[~torn.to_numpy()], taxonomy=taxonomy)
    moved = assignment.splits.reindex(current.index) != current
    return assignment, int(moved.sum())
