"""Class balance over a disease tree: images, lesions and patients per node, rolled up.

:func:`balance` counts, for every taxonomy node, the images, distinct lesions
and distinct patients at or beneath it (a node counts everything in its
subtree), in total and broken down by one column (``split``, ``source``,
``modality``, ``ita_bin`` ...). :func:`check_balance` turns the table into a
:class:`~curate.report.Report` of nodes below a minimum and nodes whose share
differs strongly between groups. :func:`tree_view` and :func:`plot_balance`
render it (indented table; horizontal bars per group).

Counting rules
--------------
* An image without a lesion id counts as a lesion of its own; an image without
  a patient id counts as a patient of its own lesion (so it never merges with
  other unidentified images).
* A lesion whose images map to several nodes counts once at each node that
  holds any of its images, and once (not twice) at their common ancestors.
* Images without a node (unmapped labels) are not in the table; their number is
  kept in ``table.attrs["unmapped_images"]``.

The roll-up is vectorised: nodes are kept in pre-order so that each subtree is a
contiguous range, and a cumulative sum gives every subtree total at once.
Lesions or patients seen at more than one node are expanded to their ancestors
and de-duplicated instead.

This module never prints and never writes files.
"""

from __future__ import annotations

import sys
import types
from typing import Sequence

import numpy as np
import pandas as pd

from curate.report import Finding, Reason, Report
from curate.taxonomy import Taxonomy

__all__ = ["BalanceIssue", "balance", "check_balance", "tree_view", "plot_balance", "MEASURES"]

MEASURES = ("images", "lesions", "patients")
ALL = "all"
MISSING_GROUP = "(none)"


class BalanceIssue(Reason):
    """Why a node of the balance table is flagged."""

    BELOW_MINIMUM = "below_minimum"
    IMBALANCED = "imbalanced"


def _positions(nodes: pd.Series, taxonomy: Taxonomy) -> np.ndarray:
    index = pd.Index(taxonomy.order)
    return index.get_indexer(nodes.astype(object)).astype(np.int64)


def _keys(frame: pd.DataFrame, col: str, fallback: np.ndarray) -> np.ndarray:
    """Integer codes of a key column; missing values get a fresh code each (own entity)."""
    if col in frame.columns:
        values = frame[col]
        codes, uniques = pd.factorize(values.astype("string"), use_na_sentinel=True)
    else:
        codes, uniques = np.full(len(frame), -1, dtype=np.int64), []
    codes = codes.astype(np.int64)
    missing = codes < 0
    if missing.any():
        # fresh codes, one per distinct fallback value
        fb, _ = pd.factorize(fallback[missing])
        codes[missing] = len(uniques) + fb
    return codes


def _sorted_unique(values: np.ndarray) -> np.ndarray:
    """Sorted distinct values (sort + compare; faster here than ``np.unique``'s hashing path)."""
    a = np.sort(values)
    if a.size == 0:
        return a
    return a[np.r_[True, a[1:] != a[:-1]]]


def _rolled_distinct(group: np.ndarray, key: np.ndarray, pos: np.ndarray, n_groups: int,
                     taxonomy: Taxonomy) -> np.ndarray:
    """Distinct ``key`` values per (group, node) over each node's subtree: (n_groups, n_nodes)."""
    n = len(taxonomy)
    out = np.zeros((n_groups, n), dtype=np.int64)
    if len(pos) == 0:
        return out
    n_keys = int(key.max()) + 1
    gk = group * n_keys + key
    triple = _sorted_unique(gk * n + pos)
    gk_u = triple // n
    pos_u = triple % n
    # how many distinct nodes each (group, key) has
    starts = np.flatnonzero(np.r_[True, gk_u[1:] != gk_u[:-1]])
    counts = np.diff(np.r_[starts, len(gk_u)])
    per_row = np.repeat(counts, counts)
    single = per_row == 1
    # keys at one node: count at that node, then roll up by pre-order ranges
    g_single = gk_u[single] // n_keys
    at_node = np.bincount(g_single * n + pos_u[single], minlength=n_groups * n).reshape(n_groups, n)
    cs = np.zeros((n_groups, n + 1), dtype=np.int64)
    np.cumsum(at_node, axis=1, out=cs[:, 1:])
    idx = np.arange(n)
    out += cs[:, taxonomy.subtree_end] - cs[:, idx]
    # keys at several nodes: expand to ancestors and de-duplicate
    if (~single).any():
        A = taxonomy.ancestor_matrix  # (depth + 1, n)
        anc = A[:, pos_u[~single]]  # (depth + 1, m)
        gk_multi = np.broadcast_to(gk_u[~single], anc.shape)
        keep = anc >= 0
        pairs = _sorted_unique(gk_multi[keep] * n + anc[keep])
        g_multi = (pairs // n) // n_keys
        out += np.bincount(g_multi * n + pairs % n, minlength=n_groups * n).reshape(n_groups, n)
    return out


def _rolled_images(group: np.ndarray, pos: np.ndarray, n_groups: int, taxonomy: Taxonomy) -> np.ndarray:
    n = len(taxonomy)
    at_node = np.bincount(group * n + pos, minlength=n_groups * n).reshape(n_groups, n)
    cs = np.zeros((n_groups, n + 1), dtype=np.int64)
    np.cumsum(at_node, axis=1, out=cs[:, 1:])
    return cs[:, taxonomy.subtree_end] - cs[:, np.arange(n)]


def balance(
    frame: pd.DataFrame,
    taxonomy: Taxonomy,
    *,
    by: str | None = None,
    depth: int | None = None,
    min_lesions: int = 10,
    max_share_ratio: float = 2.0,
    node_col: str = "node",
    lesion_col: str = "lesion_id",
    patient_col: str = "patient_id",
) -> pd.DataFrame:
    """Counts of images, lesions and patients per taxonomy node, rolled up the tree.

    Parameters
    ----------
    frame : DataFrame
        One row per image with a ``node`` column (taxonomy node id, or missing
        for unmapped labels) and optionally ``lesion_id``, ``patient_id``,
        ``image_id`` and the ``by`` column.
    taxonomy : Taxonomy
    by : str, optional
        Column to break the counts down by (``split``, ``source``, ``modality``,
        ``ita_bin``...). Missing values form the group ``"(none)"``.
    depth : int, optional
        Keep only nodes at this depth or shallower (the root is depth 0). The
        counts still include everything beneath.
    min_lesions : int, default 10
        Minimum distinct lesions a node needs (see :func:`check_balance`).
    max_share_ratio : float, default 2.0
        Imbalance threshold (see :func:`check_balance`).

    Returns
    -------
    DataFrame
        Indexed by node id in pre-order; columns ``name``, ``depth``,
        ``is_leaf``, ``images``, ``lesions``, ``patients`` (totals), then
        ``images:<group>``, ``lesions:<group>``, ``patients:<group>`` per group
        of ``by``, and ``flags`` (reason codes with the group in brackets).
        ``attrs`` holds ``by``, ``groups``, ``unmapped_images``, ``min_lesions``
        and ``max_share_ratio``.

    Raises
    ------
    ValueError
        If a node is not in the taxonomy, or ``by`` is not a column.

    See Also
    --------
    check_balance, tree_view, plot_balance

    Examples
    --------
    >>> from curate.taxonomy import Taxonomy
    >>> t = Taxonomy.from_records([{"id": "skin", "parent": None, "name": "Skin"},
    ...     {"id": "mel", "parent": "skin", "name": "Melanoma"},
    ...     {"id": "nev", "parent": "skin", "name": "Naevus"}])
    >>> df = pd.DataFrame({"node": ["mel", "mel", "nev", None],
    ...                    "lesion_id": ["L1", "L1", "L2", "L3"],
    ...                    "patient_id": ["P1", "P1", "P1", "P2"],
    ...                    "split": ["train", "train", "test", "test"]})
    >>> b = balance(df, t, by="split", min_lesions=1)
    >>> print(b[["images", "lesions", "patients", "lesions:train"]].to_string(index_names=False))
          images  lesions  patients  lesions:train
    skin       3        2         1              1
    mel        2        1         1              1
    nev        1        1         1              0
    >>> b.attrs["unmapped_images"]
    1
    """
    if by is not None and by not in frame.columns:
        raise ValueError(f"by={by!r} is not a column of the frame ({', '.join(map(str, frame.columns))})")
    if node_col not in frame.columns:
        raise ValueError(f"the frame has no {node_col!r} column")
    if depth is not None and (not isinstance(depth, (int, np.integer)) or depth < 0):
        raise ValueError(f"depth must be a non-negative integer, got {depth!r}")
    mapped = frame[node_col].notna()
    unmapped = int((~mapped).sum())
    work = frame.loc[mapped]
    pos = _positions(work[node_col], taxonomy)
    if (pos < 0).any():
        unknown = sorted(set(work[node_col][pos < 0].astype(str)))
        raise ValueError(
            f"{len(unknown)} node(s) not in the taxonomy: {', '.join(unknown[:10])}"
            + (" ..." if len(unknown) > 10 else "")
        )
    row_ids = (work["image_id"].to_numpy() if "image_id" in work.columns else np.arange(len(work))).astype(str)
    lesion = _keys(work, lesion_col, np.char.add("image:", row_ids))
    lesion_text = pd.Series(lesion).astype(str).to_numpy()
    patient = _keys(work, patient_col, np.char.add("lesion:", lesion_text))

    out = pd.DataFrame(index=pd.Index(taxonomy.order, name="node"))
    out["name"] = [taxonomy.name(n) for n in taxonomy.order]
    out["depth"] = taxonomy.depths
    out["is_leaf"] = [taxonomy.is_leaf(n) for n in taxonomy.order]
    zeros = np.zeros(len(work), dtype=np.int64)
    out["images"] = _rolled_images(zeros, pos, 1, taxonomy)[0]
    out["lesions"] = _rolled_distinct(zeros, lesion, pos, 1, taxonomy)[0]
    out["patients"] = _rolled_distinct(zeros, patient, pos, 1, taxonomy)[0]
    groups: list[str] = []
    if by is not None:
        values = work[by].astype("string").fillna(MISSING_GROUP)
        codes, uniques = pd.factorize(values, sort=True)
        groups = [str(u) for u in uniques]
        g = codes.astype(np.int64)
        k = len(groups)
        per = {
            "images": _rolled_images(g, pos, k, taxonomy),
            "lesions": _rolled_distinct(g, lesion, pos, k, taxonomy),
            "patients": _rolled_distinct(g, patient, pos, k, taxonomy),
        }
        for measure in MEASURES:
            for j, name in enumerate(groups):
                out[f"{measure}:{name}"] = per[measure][j]
    out.attrs.update(
        by=by, groups=groups, unmapped_images=unmapped, min_lesions=min_lesions,
        max_share_ratio=max_share_ratio,
    )
    if depth is not None:
        out = out[out["depth"] <= depth]
    flags: dict[str, list[str]] = {}
    for f in check_balance(out, min_lesions=min_lesions, max_share_ratio=max_share_ratio):
        flags.setdefault(f.value, []).append(f.reason if f.split is None else f"{f.reason}[{f.split}]")
    out["flags"] = ["; ".join(flags.get(n, [])) for n in out.index]
    return out


def check_balance(
    table: pd.DataFrame,
    *,
    min_lesions: int = 10,
    max_share_ratio: float = 2.0,
    needed_groups: Sequence[str] | None = None,
) -> Report:
    """Flag nodes of a :func:`balance` table.

    * ``below_minimum``: a node holding images has fewer than ``min_lesions``
      distinct lesions in a group that needs them. By default every split needs
      them when the table is broken down by ``split``; for any other breakdown
      (or none) the total is checked. ``needed_groups`` overrides this.
    * ``imbalanced``: the node's share of a group's lesions differs from its
      share of all lesions by more than a factor ``max_share_ratio`` (either
      way). Checked only for nodes with at least ``min_lesions`` lesions in
      total, below the root.

    Returns
    -------
    Report
        ``check="balance"``, ``value`` = node id, ``split`` = the group.

    Examples
    --------
    >>> t = pd.DataFrame({"depth": [0, 1], "lesions": [40, 10], "lesions:train": [30, 9],
    ...                   "lesions:test": [10, 1]}, index=pd.Index(["skin", "mel"], name="node"))
    >>> t.attrs.update(by="split", groups=["test", "train"])
    >>> sorted((f.reason, f.value, f.split) for f in check_balance(t))
    [('below_minimum', 'mel', 'test'), ('below_minimum', 'mel', 'train'), ('imbalanced', 'mel', 'test')]
    """
    if min_lesions < 0:
        raise ValueError(f"min_lesions must be >= 0, got {min_lesions!r}")
    if max_share_ratio < 1:
        raise ValueError(f"max_share_ratio must be >= 1, got {max_share_ratio!r}")
    by = table.attrs.get("by")
    groups = list(table.attrs.get("groups") or [])
    if needed_groups is None:
        needed_groups = groups if by == "split" else []
    findings: list[Finding] = []
    total = table["lesions"].to_numpy()
    root_total = int(total.max()) if len(total) else 0
    for node, row in table.iterrows():
        if row["lesions"] == 0:
            continue
        if needed_groups:
            for gname in needed_groups:
                n = int(row.get(f"lesions:{gname}", 0))
                if n < min_lesions:
                    findings.append(Finding(
                        "balance", BalanceIssue.BELOW_MINIMUM.value,
                        f"{node}: {n} lesion(s) in {gname}, fewer than {min_lesions}",
                        value=node, split=gname))
        elif row["lesions"] < min_lesions:
            findings.append(Finding(
                "balance", BalanceIssue.BELOW_MINIMUM.value,
                f"{node}: {int(row['lesions'])} lesion(s), fewer than {min_lesions}", value=node))
    if groups and root_total:
        group_totals = {g: table[f"lesions:{g}"].max() for g in groups}
        for node, row in table.iterrows():
            if row["depth"] == 0 or row["lesions"] < max(min_lesions, 1):
                continue
            overall = row["lesions"] / root_total
            for gname in groups:
                gt = group_totals[gname]
                if not gt:
                    continue
                share = row[f"lesions:{gname}"] / gt
                ratio = share / overall
                if ratio > max_share_ratio or ratio < 1 / max_share_ratio:
                    findings.append(Finding(
                        "balance", BalanceIssue.IMBALANCED.value,
                        f"{node}: {share:.1%} of lesions in {gname} against {overall:.1%} overall",
                        value=node, split=gname))
    return Report(findings)


def tree_view(
    table: pd.DataFrame,
    *,
    measures: Sequence[str] = MEASURES,
    indent: str = "  ",
    show_flags: bool = True,
) -> pd.DataFrame:
    """The balance table with an indented node column, for the terminal or a notebook.

    In a notebook pass ``indent="\\u00a0\\u00a0"`` (HTML collapses plain spaces).

    Examples
    --------
    >>> t = pd.DataFrame({"depth": [0, 1], "images": [3, 2], "lesions": [2, 1], "flags": ["", ""]},
    ...                  index=pd.Index(["skin", "mel"], name="node"))
    >>> print(tree_view(t, measures=["images"]).to_string(index=False))
     node  images
    skin        3
      mel       2
    """
    cols = [c for c in table.columns if c.split(":", 1)[0] in measures]
    view = table[cols].copy()
    labels = [indent * int(d) + str(n) for n, d in zip(table.index, table["depth"])]
    width = max((len(x) for x in labels), default=0)
    view.insert(0, "node", [x.ljust(width) for x in labels])
    if show_flags and "flags" in table.columns and table["flags"].astype(bool).any():
        view["flags"] = table["flags"].to_numpy()
    return view.reset_index(drop=True)


def plot_balance(table: pd.DataFrame, *, measure: str = "lesions", min_lesions: int | None = None):
    """Horizontal bar plot of one measure per node, one panel per group.

    Returns a :class:`matplotlib.figure.Figure` (Agg canvas, no pyplot state);
    save it with ``fig.savefig(path)``.

    Examples
    --------
    >>> t = pd.DataFrame({"depth": [0, 1], "lesions": [2, 1]}, index=pd.Index(["skin", "mel"]))
    >>> fig = plot_balance(t)
    >>> len(fig.axes)
    1
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    if measure not in MEASURES:
        raise ValueError(f"measure must be one of {MEASURES}, got {measure!r}")
    groups = list(table.attrs.get("groups") or [])
    panels = [(f"{measure}:{g}", g) for g in groups] or [(measure, "all")]
    if min_lesions is None and measure == "lesions":
        min_lesions = table.attrs.get("min_lesions")
    labels = ["  " * int(d) + str(n) for n, d in zip(table.index, table["depth"])]
    width = max((len(x) for x in labels), default=0)
    labels = [x.ljust(width) for x in labels]  # monospace, right-aligned ticks: keeps the indent
    height = max(3.0, 0.22 * len(table) + 1.2)
    fig = Figure(figsize=(4.2 * len(panels) + 2.5, height), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, len(panels), sharey=True, squeeze=False)[0]
    y = np.arange(len(table))
    for ax, (col, title) in zip(axes, panels):
        values = table[col].to_numpy()
        colors = ["#c0504d" if (min_lesions and 0 < v < min_lesions) else "#4f81bd" for v in values]
        ax.barh(y, values, color=colors)
        if min_lesions:
            ax.axvline(min_lesions, color="grey", linestyle="--", linewidth=0.8)
        ax.set_title(title)
        ax.set_xlabel(measure)
        ax.grid(axis="x", alpha=0.3)
    axes[0].set_yticks(y, labels, fontsize=7, family="monospace")
    axes[0].invert_yaxis()
    by = table.attrs.get("by")
    fig.suptitle(f"{measure} per taxonomy node" + (f" by {by}" if by else "")
                 + (f" (red: fewer than {min_lesions})" if min_lesions else ""))
    return fig


class _CallableModule(types.ModuleType):
    """Lets ``curate.balance(...)`` work as the function even once the submodule is imported.

    Importing ``curate.balance`` binds the package attribute ``balance`` to this
    module, shadowing the lazily exported function of the same name; calling
    the module calls :func:`balance`.
    """

    def __call__(self, *args, **kwargs):
        return balance(*args, **kwargs)


sys.modules[__name__].__class__ = _CallableModule
