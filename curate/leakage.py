"""Find what leaks between the splits of a split table: shared files, patients, lesions.

:func:`find_leaks` judges any split (ours, a hand-made one, one published with
a dataset) from a table of paths, splits and optional SHA-256 digests, patient
ids and lesion ids, plus optional near-duplicate pairs and file problems found
by whoever read the files. It returns a :class:`LeakageReport`. Pure: it reads
no files (see :func:`curate.leakage_check.check_leakage` for the one call that
takes a manifest file or folder) and it never imports the splitting code, so a
bug in the splitter cannot hide in shared code.

How leaks are listed
--------------------
For an identifier shared across splits (a digest, a patient id, a lesion id) the
split holding most of that identifier's images is its *main* split (ties go to
the earlier split in :func:`split_order`). Every image of that identifier
outside its main split is one leak: ``path_b``/``split_b`` is that image and
``path_a``/``split_a`` the first image (by path) of the main split. So each
image that would have to move or go is listed exactly once per kind, and the
evidence says how many images the identifier has in each split. Near-duplicate
pairs are listed pair by pair. A missing or unreadable file is listed alone
(``path_b`` empty), because the check could not judge it.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Iterable, Mapping

import numpy as np
import pandas as pd

from curate.errors import LeakageError
from curate.file_probe import copy_digests
from curate.grouping import is_placeholder_id
from curate.hashing import INVERSE_ORIENTATION
from curate.manifest_table import standard_columns
from curate.report import Finding, LeakReason, Report

#: Evidence columns of a near-duplicate pair holding the code that turns image b onto image a.
ORIENTATION_EVIDENCE = ("orientation", "crop_orientation")
#: columns of :meth:`LeakageReport.to_frame`, one row per leak
LEAK_COLUMNS = ["kind", "path_a", "split_a", "path_b", "split_b", "value", "distance", "evidence"]

#: order in which kinds are listed
KIND_ORDER = [
    LeakReason.EXACT_DUPLICATE.value,
    LeakReason.NEAR_DUPLICATE.value,
    LeakReason.SAME_LESION.value,
    LeakReason.SAME_PATIENT.value,
    LeakReason.MISSING_FILE.value,
    LeakReason.UNREADABLE_FILE.value,
]

#: conventional split names first, in this order; any other names follow alphabetically
CONVENTIONAL_SPLITS = ("train", "training", "val", "valid", "validation", "dev", "test", "holdout")

REPORT_FORMAT_VERSION = 1


def split_order(names: Iterable[str]) -> list[str]:
    """Split names in listing order: train, validation, test first, then the rest sorted.

    Examples
    --------
    >>> split_order(["test", "b", "train", "val", "a"])
    ['train', 'val', 'test', 'a', 'b']
    """
    names = set(names)
    known = [n for n in CONVENTIONAL_SPLITS if n in names]
    return known + sorted(names - set(known))


@dataclass
class LeakageReport:
    """Every leak found between the splits of one split table.

    Attributes
    ----------
    leaks : DataFrame
        One row per leak, columns :data:`LEAK_COLUMNS`: ``kind`` (a
        :class:`~curate.report.LeakReason` value), both paths and their splits,
        ``value`` (the shared digest, patient id or lesion id), ``distance``
        (Hamming distance in bits for near-duplicates, else missing) and
        ``evidence`` (a dict).
    n_images : int
        Rows in the split table.
    split_counts : dict
        Images per split.
    checks : dict
        What was checked: ``{"exact_duplicate": True, "near_duplicate": False, ...}``
        (a check is False when its column or the hashes were not available).
    source : str, optional
        The manifest the table came from.
    parameters : dict
        Settings used (radius, root ...), echoed in the JSON output.
    ignored : DataFrame
        Placeholder ids (``"unknown"``, ``"0"`` ...) found in more than one
        split: ``column``, ``value``, ``images``, ``splits``. They link nothing
        and are not leaks, but are listed so a person can see them.
    to_review : DataFrame
        Cross-split pairs the near-duplicate engine was unsure about (verdict
        ``possible``), in the layout of :attr:`leaks`. Not leaks and not
        counted in :attr:`ok`: a person should look at them (a heavy crop, or
        two look-alike lesions).
    """

    leaks: pd.DataFrame
    n_images: int
    split_counts: dict
    checks: dict
    source: str | None = None
    parameters: dict = field(default_factory=dict)
    ignored: pd.DataFrame = field(
        default_factory=lambda: pd.DataFrame(columns=["column", "value", "images", "splits"])
    )
    to_review: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=LEAK_COLUMNS))

    @property
    def ok(self) -> bool:
        """True when nothing leaks and every file could be read."""
        return len(self.leaks) == 0

    def __len__(self) -> int:
        return len(self.leaks)

    def counts(self) -> dict[str, int]:
        """Number of leaks per kind, in :data:`KIND_ORDER`."""
        c = self.leaks["kind"].value_counts()
        return {k: int(c[k]) for k in KIND_ORDER if k in c.index}

    def to_frame(self, *, flat: bool = False) -> pd.DataFrame:
        """The leaks as a table (a copy); ``flat=True`` writes ``evidence`` as JSON text (for CSV)."""
        frame = self.leaks.copy()
        if flat:
            frame["evidence"] = [json.dumps(_plain(e or {}), sort_keys=True) for e in frame["evidence"]]
        return frame

    def to_dict(self) -> dict:
        """A plain mapping, ready for ``json.dumps`` (the ``--json`` output)."""
        leaks = [_leak_record(row) for row in self.leaks.itertuples(index=False)]
        return {
            "format_version": REPORT_FORMAT_VERSION,
            "source": self.source,
            "ok": self.ok,
            "n_images": int(self.n_images),
            "split_counts": {k: int(v) for k, v in self.split_counts.items()},
            "checks": dict(self.checks),
            "parameters": _plain(self.parameters),
            "counts": self.counts(),
            "leaks": leaks,
            "ignored_ids": _plain(self.ignored.to_dict("records")),
            "to_review": [_leak_record(row) for row in self.to_review.itertuples(index=False)],
        }

    def to_json(self, *, indent: int | None = 2) -> str:
        """:meth:`to_dict` as JSON text."""
        return json.dumps(self.to_dict(), indent=indent, sort_keys=False)

    def as_report(self) -> Report:
        """The leaks as a generic :class:`~curate.report.Report` (check ``"leakage"``)."""
        findings = []
        for row in self.leaks.itertuples(index=False):
            other = "" if _missing(row.path_b) else f" and {row.path_b} ({row.split_b})"
            findings.append(
                Finding(
                    "leakage",
                    row.kind,
                    f"{row.path_a} ({row.split_a}){other}",
                    file=row.path_b if not _missing(row.path_b) else row.path_a,
                    value=None if _missing(row.value) else str(row.value),
                    split=row.split_b if not _missing(row.split_b) else row.split_a,
                )
            )
        return Report(findings)

    def summary(self, max_rows: int = 20) -> str:
        """A few readable lines: the counts, then the first ``max_rows`` leaks."""
        where = f" in {self.source}" if self.source else ""
        if self.ok:
            text = f"no leakage{where}: {self.n_images} images, splits {self.split_counts}"
            if len(self.to_review):
                text += (f"\n  {len(self.to_review)} cross-split pair(s) judged 'possible' "
                         "near-duplicates: look at them (to_review)")
            return text
        counts = ", ".join(f"{n} {kind}" for kind, n in self.counts().items())
        lines = [f"leakage{where}: {counts} ({self.n_images} images)"]
        for row in self.leaks.head(max_rows).itertuples(index=False):
            if _missing(row.path_b):
                lines.append(f"  {row.kind}: {row.path_a} ({row.split_a})")
                continue
            detail = "" if _missing(row.value) else f" [{row.value}]"
            if not _missing(row.distance):
                detail += f" distance {int(row.distance)}"
            lines.append(
                f"  {row.kind}: {row.path_a} ({row.split_a}) <-> {row.path_b} ({row.split_b})"
                f"{detail}"
            )
        if len(self.leaks) > max_rows:
            lines.append(f"  ... and {len(self.leaks) - max_rows} more")
        if len(self.to_review):
            lines.append(f"  {len(self.to_review)} cross-split pair(s) judged 'possible' near-duplicates, "
                         "not counted as leaks: look at them (to_review)")
        unchecked = [k for k, done in self.checks.items() if not done]
        if unchecked:
            lines.append(f"  not checked: {', '.join(unchecked)}")
        return "\n".join(lines)

    def raise_if_leaking(self, max_rows: int = 20) -> "LeakageReport":
        """Raise :class:`~curate.errors.LeakageError` with :meth:`summary` unless :attr:`ok`.

        Returns the report itself when it is clean, so it can be chained.
        """
        if not self.ok:
            raise LeakageError(self.summary(max_rows=max_rows))
        return self


def find_leaks(
    table: pd.DataFrame,
    *,
    pairs: pd.DataFrame | None = None,
    review_pairs: pd.DataFrame | None = None,
    problems: pd.DataFrame | None = None,
    ignore_ids: Iterable[str] = (),
    patient_scope: str = "global",
    lesion_scope: str = "global",
    columns: Mapping[str, str] | None = None,
    source: str | None = None,
    parameters: Mapping | None = None,
) -> LeakageReport:
    """Every cross-split leak in a split table.

    Parameters
    ----------
    table : DataFrame
        One row per image: ``path`` and ``split``; optional ``sha256`` (exact
        duplicates are found on it), ``patient_id`` and ``lesion_id``. Other
        spellings are accepted, see :func:`curate.manifest_table.standard_columns`.
    pairs : DataFrame, optional
        Near-duplicate pairs: ``path_a``, ``path_b`` and optionally ``distance``
        (bits); any further columns are kept as evidence. Pairs inside one
        split, and pairs whose digests are equal (already exact duplicates),
        are not leaks. When None the near-duplicate check counts as not run.
    review_pairs : DataFrame, optional
        Pairs the near-duplicate engine was unsure about, in the layout of
        ``pairs``; those across splits become :attr:`LeakageReport.to_review`.
    problems : DataFrame, optional
        Files the caller could not read: ``path``, ``reason`` (``missing_file``
        or ``unreadable_file``) and optionally ``message``.
    ignore_ids : iterable of str
        More patient or lesion id values that are placeholders, not identities.
        Values :func:`curate.grouping.is_placeholder_id` calls placeholders
        (``"unknown"``, ``"0"``, ``"n/a"`` ...) never link images either; those
        spanning splits are listed in :attr:`LeakageReport.ignored`.
    patient_scope : {"global", "source"}
        ``"global"`` (default, the cautious reading of a foreign manifest): one
        patient id space for all rows. ``"source"``: ids are unique only within
        the table's ``source`` column, so the key is (source, patient id).
    lesion_scope : {"global", "source", "patient"}
        As ``patient_scope``; ``"patient"`` keys lesions by (source, patient, lesion).
        Ids are compared after stripping white space and case-folding.
    columns : mapping, optional
        Passed to :func:`~curate.manifest_table.standard_columns`.
    source, parameters
        Recorded in the report.

    Returns
    -------
    LeakageReport

    Examples
    --------
    >>> t = pd.DataFrame({
    ...     "path": ["a.png", "b.png", "c.png", "d.png"],
    ...     "split": ["train", "test", "train", "test"],
    ...     "sha256": ["11", "11", "22", "33"],
    ...     "patient_id": ["P1", "P2", "P3", "P3"]})
    >>> report = find_leaks(t)
    >>> report.counts()
    {'exact_duplicate': 1, 'same_patient': 1}
    >>> report.to_frame()[["kind", "path_a", "path_b", "value"]].values.tolist()
    [['exact_duplicate', 'a.png', 'b.png', '11'], ['same_patient', 'c.png', 'd.png', 'P3']]
    """
    t = standard_columns(table, columns=columns, source=source or "table")
    order = split_order(t["split"].unique())
    extra_placeholders = {str(v).strip().casefold() for v in ignore_ids}
    found: list[pd.DataFrame] = []
    checks = {}
    ignored = []

    if "sha256" in t.columns:
        checks[LeakReason.EXACT_DUPLICATE.value] = True
        digest = copy_digests(t["sha256"])
        found.append(_shared_key_leaks(t, digest, LeakReason.EXACT_DUPLICATE, order))
    else:
        checks[LeakReason.EXACT_DUPLICATE.value] = False
    checks[LeakReason.NEAR_DUPLICATE.value] = pairs is not None
    if pairs is not None:
        found.append(_pair_leaks(t, pairs, order))
    for column, reason, scope, allowed in (
        ("lesion_id", LeakReason.SAME_LESION, lesion_scope, ("global", "source", "patient")),
        ("patient_id", LeakReason.SAME_PATIENT, patient_scope, ("global", "source")),
    ):
        if scope not in allowed:
            raise ValueError(f"{column[:-3]}_scope must be one of {', '.join(allowed)}; got {scope!r}")
        checks[reason.value] = column in t.columns
        if column in t.columns:
            values = t[column].dropna().unique()
            flagged = {v for v in values if is_placeholder_id(v) or v.casefold() in extra_placeholders}
            placeholder = t[column].isna() | t[column].isin(flagged)
            ignored.append(_spanning_placeholders(t[placeholder & t[column].notna()], column))
            key = _scoped_key(t, column, scope).where(~placeholder, None)
            found.append(_shared_key_leaks(t, key, reason, order))
    if problems is not None and len(problems):
        found.append(_problem_rows(t, problems))

    leaks = pd.concat([f for f in found if len(f)], ignore_index=True) if any(
        len(f) for f in found
    ) else pd.DataFrame(columns=LEAK_COLUMNS)
    if len(leaks):
        leaks["_k"] = leaks["kind"].map({k: i for i, k in enumerate(KIND_ORDER)})
        leaks["_v"] = leaks["value"].fillna("").astype(str)
        leaks["_b"] = leaks["path_b"].fillna("").astype(str)
        leaks = leaks.sort_values(["_k", "_v", "path_a", "_b"], kind="stable")
        leaks = leaks.drop(columns=["_k", "_v", "_b"]).reset_index(drop=True)
    leaks = leaks[LEAK_COLUMNS]
    counts = t["split"].value_counts()
    review = _pair_leaks(t, review_pairs, order) if review_pairs is not None else None
    return LeakageReport(
        leaks=leaks,
        n_images=len(t),
        split_counts={s: int(counts[s]) for s in order},
        checks=checks,
        source=source,
        parameters=dict(parameters or {}, patient_scope=patient_scope, lesion_scope=lesion_scope),
        ignored=pd.concat(ignored, ignore_index=True) if ignored else _spanning_placeholders(t[:0], "x"),
        to_review=review if review is not None else pd.DataFrame(columns=LEAK_COLUMNS),
    )


def _scoped_key(t: pd.DataFrame, column: str, scope: str) -> pd.Series:
    """Case-folded id, prefixed by its scope (source, or source and patient)."""
    key = t[column].map(lambda v: None if v is None else v.casefold())
    if scope == "global":
        return key
    if "source" not in t.columns:
        raise ValueError(f"a {scope!r} scope for {column} needs a 'source' column")
    prefix = t["source"].fillna("").astype(str)
    if scope == "patient":
        patient = t["patient_id"] if "patient_id" in t.columns else pd.Series("", index=t.index)
        prefix = prefix + "\x1f" + patient.fillna("").astype(str).str.casefold()
    return (prefix + "\x1f" + key.fillna("")).where(key.notna(), None)


def _spanning_placeholders(rows: pd.DataFrame, column: str) -> pd.DataFrame:
    """Placeholder id values that occur in more than one split."""
    out = pd.DataFrame(columns=["column", "value", "images", "splits"])
    if rows.empty:
        return out
    folded = rows[column].str.casefold().rename("value")
    stats = rows.groupby(folded)["split"].agg(["size", "nunique", lambda s: sorted(set(s))])
    stats = stats[stats["nunique"] > 1]
    return pd.DataFrame(
        {"column": column, "value": stats.index, "images": stats["size"].to_numpy(),
         "splits": stats.iloc[:, 2].to_numpy()}
    ).reset_index(drop=True)


def _shared_key_leaks(
    t: pd.DataFrame, key_values: pd.Series, reason: LeakReason, order: list[str]
) -> pd.DataFrame:
    """One row per image that shares a key with images of another split, outside its main split."""
    key = "_key"
    value_column = {LeakReason.EXACT_DUPLICATE: "sha256", LeakReason.SAME_PATIENT: "patient_id",
                    LeakReason.SAME_LESION: "lesion_id"}[reason]
    t = t.assign(_key=key_values.to_numpy(), _value=t[value_column].to_numpy())
    sub = t.loc[t[key].notna(), [key, "_value", "split", "path"]]
    n_splits = sub.groupby(key)["split"].nunique()
    sub = sub[sub[key].isin(n_splits.index[n_splits > 1])]
    if sub.empty:
        return pd.DataFrame(columns=LEAK_COLUMNS)
    rank = {s: i for i, s in enumerate(order)}
    per_split = sub.groupby([key, "split"]).size().rename("n").reset_index()
    per_split["rank"] = per_split["split"].map(rank)
    main = (
        per_split.sort_values([key, "n", "rank"], ascending=[True, False, True])
        .drop_duplicates(key)
        .set_index(key)["split"]
    )
    sub = sub.assign(main=sub[key].map(main)).sort_values([key, "path"], kind="stable")
    anchor_rows = sub[sub["split"] == sub["main"]].drop_duplicates(key).set_index(key)
    anchors, anchor_values = anchor_rows["path"], anchor_rows["_value"]
    evidence: dict = {}
    ordered = per_split.sort_values([key, "rank"])
    for k, split, n in zip(ordered[key], ordered["split"], ordered["n"]):
        evidence.setdefault(k, {"images_per_split": {}})["images_per_split"][split] = int(n)
    outside = sub[sub["split"] != sub["main"]]
    return pd.DataFrame(
        {
            "kind": reason.value,
            "path_a": outside[key].map(anchors).to_numpy(),
            "split_a": outside["main"].to_numpy(),
            "path_b": outside["path"].to_numpy(),
            "split_b": outside["split"].to_numpy(),
            "value": outside[key].map(anchor_values).to_numpy(),
            "distance": np.nan,
            "evidence": [
                dict(evidence[k], **{value_column: v}) for k, v in zip(outside[key], outside["_value"])
            ],
        },
        columns=LEAK_COLUMNS,
    )


def _pair_leaks(t: pd.DataFrame, pairs: pd.DataFrame, order: list[str]) -> pd.DataFrame:
    """Near-duplicate pairs whose two images sit in different splits."""
    missing = {"path_a", "path_b"} - set(pairs.columns)
    if missing:
        raise ValueError(f"pairs needs columns path_a and path_b; missing {sorted(missing)}")
    if pairs.empty:
        return pd.DataFrame(columns=LEAK_COLUMNS)
    first = t.drop_duplicates("path").set_index("path")
    split = first["split"]
    digest = first["sha256"] if "sha256" in first.columns else pd.Series(dtype=object)
    p = pairs.assign(
        path_a=pairs["path_a"].astype(str), path_b=pairs["path_b"].astype(str)
    ).reset_index(drop=True)
    p["split_a"] = p["path_a"].map(split)
    p["split_b"] = p["path_b"].map(split)
    da, db = p["path_a"].map(digest), p["path_b"].map(digest)
    keep = p["split_a"].notna() & p["split_b"].notna() & (p["split_a"] != p["split_b"])
    keep &= ~(da.notna() & (da == db))
    p = p[keep]
    if p.empty:
        return pd.DataFrame(columns=LEAK_COLUMNS)
    rank = {s: i for i, s in enumerate(order)}
    swap = p["split_a"].map(rank) > p["split_b"].map(rank)
    for a, b in (("path_a", "path_b"), ("split_a", "split_b")):
        p.loc[swap, [a, b]] = p.loc[swap, [b, a]].to_numpy()
    # an orientation turns image b onto image a: with the two swapped it is undone the other way
    for column in ORIENTATION_EVIDENCE:
        if column in p.columns:
            turned = swap & p[column].notna()
            p[column] = p[column].astype(object)
            p.loc[turned, column] = [INVERSE_ORIENTATION[int(o)] for o in p.loc[turned, column]]
    extra = [c for c in p.columns if c not in ("path_a", "path_b", "split_a", "split_b", "distance")]
    evidence = []
    for row in p[extra].to_dict("records"):
        evidence.append({k: v for k, v in row.items() if not _missing(v)})
    for ev, a, b in zip(evidence, p["path_a"], p["path_b"]):
        if len(digest):
            ev["sha256_a"], ev["sha256_b"] = digest.get(a), digest.get(b)
    distance = p["distance"] if "distance" in p.columns else pd.Series(np.nan, index=p.index)
    return pd.DataFrame(
        {
            "kind": LeakReason.NEAR_DUPLICATE.value,
            "path_a": p["path_a"].to_numpy(),
            "split_a": p["split_a"].to_numpy(),
            "path_b": p["path_b"].to_numpy(),
            "split_b": p["split_b"].to_numpy(),
            "value": None,
            "distance": distance.to_numpy(dtype=float),
            "evidence": evidence,
        },
        columns=LEAK_COLUMNS,
    )


def _problem_rows(t: pd.DataFrame, problems: pd.DataFrame) -> pd.DataFrame:
    """Missing and unreadable files, each listed alone."""
    allowed = {LeakReason.MISSING_FILE.value, LeakReason.UNREADABLE_FILE.value}
    reasons = problems["reason"].map(lambda r: str(getattr(r, "value", r)))
    bad = sorted(set(reasons) - allowed)
    if bad:
        raise ValueError(f"problems: reason must be one of {sorted(allowed)}, got {bad}")
    split = t.drop_duplicates("path").set_index("path")["split"]
    messages = problems["message"] if "message" in problems.columns else [""] * len(problems)
    return pd.DataFrame(
        {
            "kind": reasons.to_numpy(),
            "path_a": problems["path"].astype(str).to_numpy(),
            "split_a": problems["path"].astype(str).map(split).to_numpy(),
            "path_b": None,
            "split_b": None,
            "value": None,
            "distance": np.nan,
            "evidence": [{"message": str(m)} if m else {} for m in messages],
        },
        columns=LEAK_COLUMNS,
    )


def _leak_record(row) -> dict:
    """One row of a leak table as a JSON-ready mapping."""
    d = row._asdict()
    d["distance"] = None if _missing(d["distance"]) else int(d["distance"])
    for k in ("path_b", "split_b", "value"):
        d[k] = None if _missing(d[k]) else d[k]
    d["evidence"] = _plain(d["evidence"] or {})
    return d


def _missing(value) -> bool:
    if value is None:
        return True
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def _plain(value):
    """Numpy scalars and containers turned into JSON-ready Python values."""
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_plain(v) for v in value]
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return None if math.isnan(value) else float(value)
    if isinstance(value, float) and math.isnan(value):
        return None
    if isinstance(value, np.bool_):
        return bool(value)
    return value
