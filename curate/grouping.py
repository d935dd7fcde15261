"""Leakage groups: images that must stay inside one split.

Two images belong to one group when a chain of links joins them. The links are

* the same patient id (keyed per source by default, see ``patient_scope``),
* the same lesion id (keyed per source by default, see ``lesion_scope``),
* the same SHA-256 digest of the file bytes,
* a pair from the near-duplicate engine whose verdict is in ``link_verdicts``
  (``exact`` and ``near`` by default),
* a reviewer's ``same_image`` or ``same_lesion`` decision.

A reviewer's ``different_lesions`` decision removes the near-duplicate link of
that pair (the hashes were fooled by two look-alike lesions). A decision never
overrides an explicit shared patient id, lesion id or digest: such a decision
is reported as a contradiction and the images stay joined.

Groups are the connected components of the graph whose nodes are the images
plus one node per distinct id, found with :func:`scipy.sparse.csgraph.connected_components`.

Placeholder ids ("unknown", "0", "n/a", "" ...) and any single id that covers an
implausible share of the catalog are never used to join images; they are
listed in the report, because a giant group is nearly always a metadata error.

This module is pure: it takes DataFrames and returns values.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from curate.file_probe import copy_digests
from curate.report import Finding, Reason, Report

#: Id values that mean "no id" (compared after stripping and case-folding).
PLACEHOLDER_IDS = frozenset(
    {
        "", "unknown", "unk", "n/a", "na", "n.a.", "none", "null", "nil", "nan", "missing",
        "not available", "not known", "not recorded", "unspecified", "undefined", "anonymous",
        "anon", "tbd", "?", "-", "0", "-1", "x", "xx", "xxx", "999999", "9999999", "99999",
        "9999", "000000", "<na>",
    }
)
_PLACEHOLDER_PATTERN = re.compile(r"^(?:0+|9{4,}|-+|\?+|x+|\.+|_+)$")

#: The group size bins of :meth:`Grouping.size_distribution` (upper bounds, inclusive).
SIZE_BINS = (1, 2, 5, 10, 50, 200)

SCOPES = ("global", "source", "patient")


class GroupIssue(Reason):
    """Why the grouping needs a person's attention."""

    PLACEHOLDER_ID = "placeholder_id"
    OVERSHARED_ID = "overshared_id"
    DECISION_CONTRADICTS_ID = "decision_contradicts_id"
    DECISION_CONTRADICTS_DIGEST = "decision_contradicts_digest"
    KEPT_APART_BUT_LINKED = "kept_apart_but_linked"


def is_placeholder_id(value, *, placeholders=PLACEHOLDER_IDS) -> bool:
    """Whether an id value means "no id".

    Parameters
    ----------
    value : object
        A patient or lesion id as the source gave it (``None``/NaN count as placeholders).
    placeholders : collection of str
        Lower-case values that mean "no id". Runs of one character such as
        ``"0000"``, ``"99999"``, ``"---"`` and ``"???"`` are placeholders too.

    Examples
    --------
    >>> [is_placeholder_id(v) for v in ["Unknown", " 0 ", "N/A", None, "P-0012", "000"]]
    [True, True, True, True, False, True]
    """
    if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NA:
        return True
    text = _id_text(value).casefold()
    return text in placeholders or bool(_PLACEHOLDER_PATTERN.match(text))


@dataclass
class Grouping:
    """Group ids per image and what was found building them.

    Attributes
    ----------
    groups : pandas.Series
        ``group_id`` per ``image_id`` (the index), sorted by ``image_id``.
    members : pandas.DataFrame
        One row per image: ``image_id``, ``group_id``, ``source``, ``patient_key``,
        ``lesion_key`` (keys are ``None`` where not used for joining).
    placeholders : pandas.DataFrame
        Ids refused for joining: ``column``, ``value``, ``source``, ``images``, ``reason``.
    report : Report
        Placeholder ids and contradictions between decisions and metadata.
    parameters : dict
        The options used, for the record.
    """

    groups: pd.Series
    members: pd.DataFrame
    placeholders: pd.DataFrame
    report: Report
    parameters: dict = field(default_factory=dict)

    @property
    def n_groups(self) -> int:
        return int(self.groups.nunique())

    def sizes(self) -> pd.Series:
        """Images per group, largest first (ties by group id)."""
        counts = self.groups.value_counts()
        order = sorted(counts.index, key=lambda g: (-counts[g], g))
        return counts.reindex(order).rename("images")

    def size_distribution(self) -> pd.DataFrame:
        """Number of groups and images per group size bin (1, 2, 3-5, 6-10, ...)."""
        sizes = self.groups.value_counts().to_numpy()
        edges = [0, *SIZE_BINS, np.inf]
        rows = []
        for lo, hi in zip(edges[:-1], edges[1:]):
            inside = (sizes > lo) & (sizes <= hi)
            label = f"{lo + 1}" if hi == lo + 1 else (f"{lo + 1}-{int(hi)}" if np.isfinite(hi) else f">{lo}")
            rows.append({"size": label, "groups": int(inside.sum()), "images": int(sizes[inside].sum())})
        return pd.DataFrame(rows)

    def largest(self, n: int = 10) -> pd.DataFrame:
        """The ``n`` largest groups with their distinct patients, lesions and sources."""
        m = self.members
        agg = m.groupby("group_id").agg(
            images=("image_id", "size"),
            patients=("patient_key", "nunique"),
            lesions=("lesion_key", "nunique"),
            sources=("source", "nunique"),
        )
        agg = agg.reset_index().sort_values(["images", "group_id"], ascending=[False, True])
        return agg.head(n).reset_index(drop=True)

    def summary(self, max_rows: int = 10) -> str:
        """A few lines of text: counts, size distribution, largest groups, findings."""
        lines = [f"{len(self.groups)} images in {self.n_groups} groups"]
        dist = self.size_distribution()
        lines.append("group sizes: " + ", ".join(
            f"{r.size}: {r.groups} groups ({r.images} images)" for r in dist.itertuples() if r.groups
        ))
        lines.append("largest groups:")
        for r in self.largest(max_rows).itertuples():
            lines.append(
                f"  {r.group_id}: {r.images} images, {r.patients} patients, "
                f"{r.lesions} lesions, {r.sources} sources"
            )
        if not self.placeholders.empty:
            lines.append("ids refused for joining:")
            for r in self.placeholders.head(max_rows).itertuples():
                where = f" in {r.source}" if isinstance(r.source, str) else ""
                lines.append(f"  {r.column} {r.value!r}{where}: {r.images} images ({r.reason})")
        lines.append(self.report.summary(max_rows) if not self.report.ok else "no findings")
        return "\n".join(lines)


def group_images(
    catalog: pd.DataFrame,
    pairs: pd.DataFrame | None = None,
    decisions: pd.DataFrame | None = None,
    *,
    patient_scope: str = "source",
    lesion_scope: str = "source",
    link_verdicts=("exact", "near"),
    max_id_share: float = 0.02,
    min_overshared_images: int = 100,
    placeholders=PLACEHOLDER_IDS,
) -> Grouping:
    """Join images into leakage groups (connected components of all links).

    Parameters
    ----------
    catalog : pandas.DataFrame
        Needs ``image_id``; uses ``source``, ``patient_id``, ``lesion_id``,
        ``sha256`` and ``path`` when present.
    pairs : pandas.DataFrame, optional
        Near-duplicate pairs with ``image_a``, ``image_b``, ``verdict``.
    decisions : pandas.DataFrame, optional
        Review decisions with ``image_a``, ``image_b``, ``decision``, ``decided_at``
        and ``undone``; the latest not-undone decision per pair counts.
    patient_scope : {"source", "global"}
        ``"source"`` (default): patient ids are only unique within a source, so
        the key is (source, patient_id). ``"global"``: sources share one id space.
    lesion_scope : {"source", "patient", "global"}
        ``"source"`` (default): the key is (source, lesion_id), which joins at least
        as much as (source, patient_id, lesion_id). ``"patient"``: lesion ids are
        numbered per patient (1, 2, ...). ``"global"``: one id space for all sources.
    link_verdicts : tuple of str
        Pair verdicts that join images.
    max_id_share : float
        A share between 0 and 1: an id covering more than this share of the
        catalog's images (and more than ``min_overshared_images`` images) is
        refused for joining as implausible.
    min_overshared_images : int
        A count of images, see ``max_id_share``.
    placeholders : collection of str
        Lower-case id values meaning "no id".

    Returns
    -------
    Grouping

    Notes
    -----
    Ids are compared after stripping white space and case-folding, so "P01 " and
    "p01" join (the conservative choice for leakage). A group id is ``"g-"``
    plus 16 hex digits of the SHA-256 of the group's smallest member key (the
    member's SHA-256 digest, or its path when it has none), so it stays the
    same across re-runs when the group did not change, whatever the row order.

    Examples
    --------
    >>> cat = pd.DataFrame({
    ...     "image_id": [1, 2, 3, 4, 5],
    ...     "source": ["a", "a", "a", "b", "b"],
    ...     "patient_id": ["p1", "p1", "p2", "p1", "unknown"],
    ...     "lesion_id": [None, None, None, None, None],
    ...     "sha256": ["aa", "bb", "cc", "dd", "cc"],
    ... })
    >>> g = group_images(cat)
    >>> g.groups.tolist() == [g.groups[1]] * 2 + [g.groups[3], g.groups[4], g.groups[3]]
    True
    >>> g.n_groups, g.report.counts()
    (3, {'placeholder_id': 1})
    """
    _check_scope("patient_scope", patient_scope, ("global", "source"))
    _check_scope("lesion_scope", lesion_scope, SCOPES)
    if not 0 < max_id_share <= 1:
        raise ValueError(f"max_id_share must be a share in (0, 1], got {max_id_share!r}")
    if "image_id" not in catalog.columns:
        raise ValueError("catalog needs an 'image_id' column")
    cat = catalog.sort_values("image_id", kind="stable").reset_index(drop=True)
    if cat["image_id"].duplicated().any():
        dup = cat.loc[cat["image_id"].duplicated(), "image_id"].iloc[0]
        raise ValueError(f"catalog has image_id {dup} more than once")
    n = len(cat)
    source = _column_text(cat, "source")
    patient_raw = _column_text(cat, "patient_id")
    lesion_raw = _column_text(cat, "lesion_id")

    refused = []
    patient_key = _scoped_key(patient_raw, source, None, patient_scope)
    patient_key = _refuse(patient_key, patient_raw, source, "patient_id", placeholders,
                          max_id_share, min_overshared_images, refused)
    lesion_key = _scoped_key(lesion_raw, source, patient_raw, lesion_scope)
    lesion_key = _refuse(lesion_key, lesion_raw, source, "lesion_id", placeholders,
                         max_id_share, min_overshared_images, refused)
    sha = _column_text(cat, "sha256")
    sha = copy_digests(sha)

    findings: list[Finding] = [
        Finding("groups", r["reason"], f"{r['column']} {r['value']!r} on {r['images']} images "
                "is not used to join images", value=r["value"]) for r in refused
    ]

    # bipartite graph: image nodes 0..n-1, then one node per distinct key
    rows, cols = [], []
    offset = n
    for key in (patient_key, lesion_key, sha):
        codes, uniques = pd.factorize(key)
        has = codes >= 0
        rows.append(np.flatnonzero(has))
        cols.append(codes[has] + offset)
        offset += len(uniques)

    position = pd.Series(np.arange(n), index=cat["image_id"].to_numpy())
    pair_a, pair_b = _pair_links(pairs, position, link_verdicts)
    latest = _latest_decisions(decisions, position)
    apart = set()
    join_a, join_b = [], []
    for r in latest.itertuples(index=False):
        a, b = position[r.image_a], position[r.image_b]
        same_lesion = lesion_key[a] is not None and lesion_key[a] == lesion_key[b]
        same_patient = patient_key[a] is not None and patient_key[a] == patient_key[b]
        if r.decision in ("same_image", "same_lesion"):
            join_a.append(a)
            join_b.append(b)
            for what, ka, kb in (("patient", patient_key[a], patient_key[b]),
                                 ("lesion", lesion_key[a], lesion_key[b])):
                if ka is not None and kb is not None and ka != kb:
                    findings.append(Finding(
                        "groups", GroupIssue.DECISION_CONTRADICTS_ID,
                        f"reviewer says {r.decision} but the {what} ids differ "
                        f"({_shown(ka)!r} vs {_shown(kb)!r}); joined anyway",
                        image_id=int(r.image_a), related_image_id=int(r.image_b), value=r.decision))
        elif r.decision == "different_lesions":
            if same_lesion:
                findings.append(Finding(
                    "groups", GroupIssue.DECISION_CONTRADICTS_ID,
                    f"reviewer says different_lesions but both carry lesion id {_shown(lesion_key[a])!r}; "
                    "kept together", image_id=int(r.image_a), related_image_id=int(r.image_b),
                    value=r.decision))
            elif isinstance(sha[a], str) and sha[a] == sha[b]:
                findings.append(Finding(
                    "groups", GroupIssue.DECISION_CONTRADICTS_DIGEST,
                    "reviewer says different_lesions but the files are byte-identical; kept together",
                    image_id=int(r.image_a), related_image_id=int(r.image_b), value=r.decision))
            elif not same_patient:
                apart.add((a, b))
    if apart and len(pair_a):
        keep = np.array([(a, b) not in apart for a, b in zip(pair_a, pair_b)], dtype=bool)
        pair_a, pair_b = pair_a[keep], pair_b[keep]
    rows += [pair_a, np.asarray(join_a, dtype=np.int64)]
    cols += [pair_b, np.asarray(join_b, dtype=np.int64)]

    labels = _components(np.concatenate(rows), np.concatenate(cols), offset)[:n]
    member_key = sha.copy()
    no_sha = member_key.isna()
    path = _column_text(cat, "path") if "path" in cat else cat["image_id"].astype(str)
    member_key[no_sha] = "path:" + path[no_sha]
    smallest = member_key.groupby(labels).transform("min")
    group_id = smallest.map(lambda k: "g-" + hashlib.sha256(k.encode()).hexdigest()[:16])

    for a, b in sorted(apart):
        if labels[a] == labels[b]:
            findings.append(Finding(
                "groups", GroupIssue.KEPT_APART_BUT_LINKED,
                "reviewer says different_lesions, but other links still join the two images",
                image_id=int(cat["image_id"][a]), related_image_id=int(cat["image_id"][b]),
                value=group_id[a]))

    groups = pd.Series(group_id.to_numpy(), index=pd.Index(cat["image_id"].to_numpy(), name="image_id"),
                       name="group_id")
    members = pd.DataFrame({
        "image_id": cat["image_id"].to_numpy(),
        "group_id": group_id.to_numpy(),
        "source": source.to_numpy(),
        "patient_key": patient_key.to_numpy(),
        "lesion_key": lesion_key.to_numpy(),
    })
    refused_frame = pd.DataFrame(refused, columns=["column", "value", "source", "images", "reason"])
    parameters = {
        "patient_scope": patient_scope, "lesion_scope": lesion_scope,
        "link_verdicts": list(link_verdicts), "max_id_share": max_id_share,
        "min_overshared_images": min_overshared_images,
    }
    return Grouping(groups, members, refused_frame, Report(findings), parameters)


# --- helpers ---------------------------------------------------------------------------


def _check_scope(name, value, allowed):
    if value not in allowed:
        raise ValueError(f"{name} must be one of {', '.join(allowed)}; got {value!r}")


def _shown(key: str) -> str:
    """The id part of a scoped key."""
    return key.rsplit("\x1f", 1)[-1]


def _id_text(value) -> str:
    if isinstance(value, float) and value.is_integer():
        value = int(value)
    return str(value).strip()


def _column_text(cat: pd.DataFrame, column: str) -> pd.Series:
    """A column as stripped text (missing values become None); all None if absent."""
    if column not in cat.columns:
        return pd.Series([None] * len(cat), dtype=object)
    col = cat[column]
    out = [None if (v is None or v is pd.NA or (isinstance(v, float) and np.isnan(v))) else _id_text(v)
           for v in col.tolist()]
    return pd.Series(out, dtype=object)


def _scoped_key(raw: pd.Series, source: pd.Series, patient: pd.Series | None, scope: str) -> pd.Series:
    """Case-folded id, prefixed by its scope (source, or source and patient)."""
    folded = [None if v is None else v.casefold() for v in raw.tolist()]
    if scope == "global":
        return pd.Series(folded, dtype=object)
    prefix = ["" if p is None else p for p in source.tolist()]
    if scope == "patient":
        prefix = [f"{p}\x1f{'' if q is None else q.casefold()}" for p, q in zip(prefix, patient.tolist())]
    return pd.Series([None if v is None else f"{p}\x1f{v}" for p, v in zip(prefix, folded)], dtype=object)


def _refuse(key, raw, source, column, placeholders, max_share, min_images, refused) -> pd.Series:
    """Blank out placeholder and overshared keys, recording each refused id once."""
    key = key.copy()
    listed = pd.Series([v is not None and is_placeholder_id(v, placeholders=placeholders)
                        for v in raw.tolist()], dtype=bool)
    counts = key[~listed].value_counts()
    limit = max(min_images, max_share * len(key))
    over = set(counts.index[counts > limit])
    for mask, reason in ((listed, GroupIssue.PLACEHOLDER_ID), (key.isin(over) & ~listed, GroupIssue.OVERSHARED_ID)):
        if not mask.any():
            continue
        frame = pd.DataFrame({"value": raw[mask], "source": source[mask]})
        for (value, src), n in frame.groupby(["value", "source"], dropna=False).size().items():
            refused.append({"column": column, "value": value, "source": src, "images": int(n),
                            "reason": reason.value})
        key[mask] = None
    return key


def _pair_links(pairs, position, verdicts):
    empty = np.zeros(0, dtype=np.int64)
    if pairs is None or len(pairs) == 0:
        return empty, empty
    p = pairs[pairs["verdict"].isin(list(verdicts))]
    known = p["image_a"].isin(position.index) & p["image_b"].isin(position.index)
    p = p[known]
    a = position.reindex(p["image_a"]).to_numpy()
    b = position.reindex(p["image_b"]).to_numpy()
    return np.minimum(a, b).astype(np.int64), np.maximum(a, b).astype(np.int64)


def _latest_decisions(decisions, position) -> pd.DataFrame:
    """The latest not-undone decision per unordered pair of known images."""
    cols = ["image_a", "image_b", "decision"]
    if decisions is None or len(decisions) == 0:
        return pd.DataFrame(columns=cols)
    d = decisions.copy()
    if "undone" in d:
        d = d[d["undone"].fillna(0).astype(int) == 0]
    a, b = d["image_a"].to_numpy(), d["image_b"].to_numpy()
    d["image_a"], d["image_b"] = np.minimum(a, b), np.maximum(a, b)
    order = [c for c in ("decided_at", "decision_id") if c in d]
    d = d.sort_values(order, kind="stable") if order else d
    d = d.groupby(["image_a", "image_b"], sort=True).tail(1)
    d = d[d["image_a"].isin(position.index) & d["image_b"].isin(position.index)]
    d = d[d["decision"] != "skip"]
    return d[cols].sort_values(["image_a", "image_b"]).reset_index(drop=True)


def _components(rows, cols, n_nodes) -> np.ndarray:
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    graph = coo_matrix((np.ones(len(rows), dtype=np.int8), (rows, cols)), shape=(n_nodes, n_nodes))
    return connected_components(graph.tocsr(), directed=False)[1]
