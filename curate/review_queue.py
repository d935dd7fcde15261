"""The review queue: candidate pairs a person decides on, and every decision kept at once.

The hashes propose candidate pairs (table ``pairs``); a curator decides on the
uncertain ones. This module holds the logic of that review, apart from any
screen: :class:`ReviewSession` walks the candidate pairs of a workspace, most
uncertain first, records each decision in the workspace's SQLite store the
moment it is made (its own transaction, with the reviewer's name and the UTC
time), undoes, filters, counts progress and resumes where the last session
stopped. The widget in :mod:`curate.review` is a thin view over it.

Decisions are stored as codes in table ``decisions``; the words shown are ours:

==================  =====================================================
code                shown as
==================  =====================================================
same_image          Same image (a copy, re-save, resize, crop or turn)
same_lesion         Same lesion, another image (e.g. a follow-up visit)
different_lesions   Different lesions
skip                Skip for now (asked again after the rest)
==================  =====================================================

Rows are never deleted or changed except for the ``undone`` flag: the latest
decision on a pair that is not undone is the one that counts
(:func:`current_decisions`), so the table is also the review's history.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import Iterable

import numpy as np
import pandas as pd

from curate.store import Workspace, utc_now

#: Decision codes, in the order the review offers them.
DECISIONS: tuple[str, ...] = ("same_image", "same_lesion", "different_lesions", "skip")

#: Plain words shown for each decision code.
DECISION_WORDS: dict[str, str] = {
    "same_image": "Same image",
    "same_lesion": "Same lesion, other image",
    "different_lesions": "Different lesions",
    "skip": "Skip for now",
}

#: Per-hash distance columns of table ``pairs`` (Hamming distances in bits).
DISTANCE_COLUMNS: tuple[str, ...] = (
    "d_ahash", "d_dhash", "d_phash", "d_whash", "d_colorhash", "d_crop")

#: Catalog fields a reviewer sees beside each image.
IMAGE_FIELDS: tuple[str, ...] = (
    "image_id",
    "path",
    "sha256",
    "source",
    "patient_id",
    "lesion_id",
    "label",
    "node",
    "modality",
    "body_site",
    "capture_date",
    "width",
    "height",
    "size",
)


def check_decision(decision: str) -> str:
    """Return ``decision`` if it is a known code, else raise ``ValueError``.

    Examples
    --------
    >>> check_decision("same_lesion")
    'same_lesion'
    """
    if decision not in DECISIONS:
        raise ValueError(f"decision must be one of {', '.join(DECISIONS)}; got {decision!r}")
    return decision


def uncertainty(score) -> np.ndarray:
    """How undecided a pair's similarity ``score`` (0..1) leaves us: 1 at 0.5, 0 at 0 or 1.

    ``1 - |2 * score - 1|``; the review asks about the most uncertain pairs first.

    Examples
    --------
    >>> uncertainty([0.5, 0.75, 1.0, 0.0]).tolist()
    [1.0, 0.5, 0.0, 0.0]
    """
    s = np.clip(np.asarray(score, dtype=float), 0.0, 1.0)
    return 1.0 - np.abs(2.0 * s - 1.0)


def record_decision(
    workspace: Workspace,
    image_a: int,
    image_b: int,
    decision: str,
    *,
    reviewer: str,
) -> int:
    """Write one decision on a pair in its own transaction; return its ``decision_id``.

    The pair is stored with ``image_a < image_b`` whichever order it is given in.
    """
    return record_decisions(workspace, [(image_a, image_b)], decision, reviewer=reviewer)[0]


def record_decisions(
    workspace: Workspace, pairs: Iterable[tuple[int, int]], decision: str, *, reviewer: str
) -> list[int]:
    """Write one decision on several pairs in a single transaction (all or nothing)."""
    check_decision(decision)
    reviewer = _check_reviewer(reviewer)
    rows = [(*_ordered_pair(a, b), decision, reviewer, utc_now()) for a, b in pairs]
    ids = []
    with workspace.transaction() as con:
        for row in rows:
            cur = con.execute(
                "INSERT INTO decisions(image_a, image_b, decision, reviewer, decided_at, undone) "
                "VALUES (?, ?, ?, ?, ?, 0)",
                row,
            )
            ids.append(int(cur.lastrowid))
    return ids


def current_decisions(workspace: Workspace) -> pd.DataFrame:
    """The decision that counts for each decided pair: the latest one not undone.

    Columns: ``decision_id, image_a, image_b, decision, reviewer, decided_at``,
    one row per pair, sorted by ``(image_a, image_b)``. This is what grouping reads.

    Examples
    --------
    >>> import tempfile
    >>> ws = Workspace.create(tempfile.mkdtemp())
    >>> _ = record_decision(ws, 7, 3, "same_lesion", reviewer="ana")
    >>> _ = record_decisions(ws, [(3, 7), (1, 2)], "different_lesions", reviewer="ben")
    >>> current_decisions(ws)[["image_a", "image_b", "decision", "reviewer"]].values.tolist()
    [[1, 2, 'different_lesions', 'ben'], [3, 7, 'different_lesions', 'ben']]
    """
    return workspace.read_sql(
        "SELECT d.decision_id, d.image_a, d.image_b, d.decision, d.reviewer, d.decided_at "
        "FROM decisions d JOIN ("
        "  SELECT MAX(decision_id) AS decision_id FROM decisions WHERE undone = 0 "
        "  GROUP BY image_a, image_b) latest ON d.decision_id = latest.decision_id "
        "ORDER BY d.image_a, d.image_b"
    )


@dataclass(frozen=True)
class Progress:
    """How far the review of the current queue has got (counts of pairs)."""

    decided: int  # pairs with a decision other than skip
    skipped: int  # pairs whose current decision is skip
    total: int  # pairs in the queue (after the filter)

    @property
    def remaining(self) -> int:
        """Pairs with no decision yet (skipped pairs not counted)."""
        return self.total - self.decided - self.skipped

    def __str__(self) -> str:
        text = f"{self.decided} of {self.total} decided"
        if self.skipped:
            text += f", {self.skipped} skipped"
        return text


@dataclass(frozen=True)
class PairItem:
    """One candidate pair as the review shows it."""

    image_a: int
    image_b: int
    score: float
    verdict: str
    conflict: str | None
    orientation: int
    crop: bool
    distances: dict = field(default_factory=dict)
    decision: str | None = None  # the current decision, if any

    @property
    def key(self) -> tuple[int, int]:
        return (self.image_a, self.image_b)


@dataclass(frozen=True)
class ReviewFilter:
    """Which candidate pairs to review; ``None`` means any.

    Parameters
    ----------
    verdict : str or collection of str, optional
        The pair's verdict (``exact``, ``near``, ``possible``).
    source : str or collection of str, optional
        Keep a pair when either image comes from one of these sources.
    conflict : bool or str, optional
        ``True``: only pairs with a conflict (label and/or patient disagree);
        ``False``: only pairs without; a string: that conflict code exactly.
    node : str or collection of str, optional
        Keep a pair when either image maps to one of these taxonomy nodes (or
        training classes), as table ``image_nodes`` holds them.
    """

    verdict: str | tuple | None = None
    source: str | tuple | None = None
    conflict: bool | str | None = None
    node: str | tuple | None = None

    def apply(self, pairs: pd.DataFrame, images: pd.DataFrame) -> pd.DataFrame:
        """The rows of ``pairs`` that pass the filter (``images`` indexed by image_id)."""
        keep = pd.Series(True, index=pairs.index)
        if self.verdict is not None:
            keep &= pairs["verdict"].isin(_as_set(self.verdict))
        if self.conflict is not None:
            has = pairs["conflict"].notna() & (pairs["conflict"].astype(str) != "")
            if self.conflict is True:
                keep &= has
            elif self.conflict is False:
                keep &= ~has
            else:
                keep &= pairs["conflict"] == self.conflict
        for column, wanted in (("source", self.source), ("node", self.node)):
            if wanted is None:
                continue
            wanted = _as_set(wanted)
            hit = images[column].isin(wanted)
            if column == "node":
                hit |= images["training_class"].isin(wanted)
            hit_ids = set(images.index[hit])
            keep &= pairs["image_a"].isin(hit_ids) | pairs["image_b"].isin(hit_ids)
        return pairs[keep]


class ReviewSession:
    """Walk a workspace's candidate pairs, most uncertain first, recording each decision.

    Parameters
    ----------
    workspace : Workspace or path
        The workspace whose ``pairs`` table is reviewed.
    reviewer : str
        Name stored with every decision (required: decisions are signed).
    verdict, source, conflict, node : optional
        A :class:`ReviewFilter`; see there.

    Notes
    -----
    The queue holds the filtered pairs, ordered by :func:`uncertainty` of their
    score (most uncertain first), then pairs with a conflict before those
    without, then by ``(image_a, image_b)``; the order is stable for a given
    ``pairs`` table. The session starts at the first pair without a decision,
    so a new session after a crash or restart resumes where the last one
    stopped. Skipped pairs come back once no undecided pair is left. Nothing
    is held only in memory: every decision and undo is committed before the
    method returns.

    Examples
    --------
    >>> import tempfile
    >>> ws = Workspace.create(tempfile.mkdtemp())
    >>> with ws.transaction() as con:
    ...     for i in (1, 2, 3):
    ...         _ = con.execute("INSERT INTO images(image_id, path, root, source, first_seen, "
    ...                         "last_seen) VALUES (?, ?, '/', 'clinic', '', '')", (i, f"/{i}.jpg"))
    ...     _ = con.execute("INSERT INTO pairs(image_a, image_b, score, verdict) "
    ...                     "VALUES (1, 2, 0.9, 'near'), (1, 3, 0.55, 'possible')")
    >>> s = ReviewSession(ws, reviewer="ana")
    >>> s.current.key
    (1, 3)
    >>> _ = s.decide("different_lesions"); s.current.key
    (1, 2)
    >>> str(s.progress())
    '1 of 2 decided'
    >>> ReviewSession(ws, reviewer="ana").current.key  # a new session resumes
    (1, 2)
    >>> s.undo().key, str(s.progress())
    ((1, 3), '0 of 2 decided')
    """

    def __init__(
        self,
        workspace: Workspace | str | os.PathLike,
        *,
        reviewer: str,
        verdict=None,
        source=None,
        conflict=None,
        node=None,
    ):
        self.workspace = workspace if isinstance(workspace, Workspace) else Workspace.open(workspace)
        self.reviewer = _check_reviewer(reviewer)
        self._all_pairs = _load_pairs(self.workspace)
        self.images = _load_images(self.workspace)
        self._decisions = _decision_map(self.workspace)
        self.filter = ReviewFilter()
        self._queue = self._all_pairs
        self.position = 0
        self.set_filter(verdict=verdict, source=source, conflict=conflict, node=node)

    def __repr__(self) -> str:
        return (
            f"ReviewSession({str(self.workspace.path)!r}, reviewer={self.reviewer!r}, "
            f"{self.progress()})"
        )

    def __len__(self) -> int:
        return len(self._queue)

    # --- the queue -----------------------------------------------------------------

    def set_filter(self, *, verdict=None, source=None, conflict=None, node=None) -> None:
        """Replace the filter and go to the first undecided pair of the new queue."""
        self.filter = ReviewFilter(verdict=verdict, source=source, conflict=conflict, node=node)
        self._queue = self.filter.apply(self._all_pairs, self.images).reset_index(drop=True)
        self._index_of = {
            (int(a), int(b)): i
            for i, (a, b) in enumerate(zip(self._queue["image_a"], self._queue["image_b"]))
        }
        found = self._find(lambda d: d is None, start=0)
        if found is None:
            found = self._find(lambda d: d == "skip", start=0)
        self.position = 0 if found is None else found

    def options(self, column: str) -> list[str]:
        """The values a filter on ``column`` (verdict, source, conflict, node) can take."""
        if column in ("verdict", "conflict"):
            values = self._all_pairs[column]
        elif column in ("source", "node"):
            values = self.images[column]
        else:
            raise ValueError(f"column must be verdict, source, conflict or node; got {column!r}")
        return sorted({str(v) for v in values.dropna() if str(v)})

    @property
    def done(self) -> bool:
        """True when every pair in the queue has a decision other than skip."""
        return self.progress().remaining == 0 and self.progress().skipped == 0

    @property
    def current(self) -> PairItem | None:
        """The pair being looked at, or None if the queue is empty."""
        return self.item(self.position) if len(self._queue) else None

    def item(self, index: int) -> PairItem:
        """The pair at ``index`` in the queue."""
        row = self._queue.iloc[index]
        a, b = int(row["image_a"]), int(row["image_b"])
        distances = {
            c[2:]: (None if pd.isna(row.get(c)) else int(row[c]))
            for c in DISTANCE_COLUMNS if c in row.index
        }
        return PairItem(
            image_a=a,
            image_b=b,
            score=float(row["score"]),
            verdict=str(row["verdict"]),
            conflict=None if pd.isna(row["conflict"]) or row["conflict"] == "" else str(row["conflict"]),
            orientation=0 if pd.isna(row["orientation"]) else int(row["orientation"]),
            crop=bool(row["crop"]),
            distances=distances,
            decision=self._decisions.get((a, b)),
        )

    def pairs(self) -> pd.DataFrame:
        """The queue as a table, in review order, with each pair's current decision."""
        out = self._queue.copy()
        out["decision"] = [
            self._decisions.get((int(a), int(b))) for a, b in zip(out["image_a"], out["image_b"])
        ]
        return out

    def image_info(self, image_id: int) -> dict:
        """Catalog fields of one image (:data:`IMAGE_FIELDS`), with None for missing values."""
        try:
            row = self.images.loc[int(image_id)]
        except KeyError:
            raise ValueError(f"image {image_id} is not in the catalog of {self.workspace}") from None
        info = {"image_id": int(image_id)}
        for f in IMAGE_FIELDS[1:]:
            v = row.get(f)
            info[f] = None if v is None or (not isinstance(v, str) and pd.isna(v)) else v
        return info

    def progress(self) -> Progress:
        codes = [self._decisions.get(k) for k in self._index_of]
        skipped = sum(c == "skip" for c in codes)
        decided = sum(c is not None and c != "skip" for c in codes)
        return Progress(decided=decided, skipped=skipped, total=len(codes))

    # --- moving --------------------------------------------------------------------

    def go_to(self, index: int) -> PairItem | None:
        if not 0 <= index < len(self._queue):
            raise ValueError(f"index must be in 0..{len(self._queue) - 1}, got {index}")
        self.position = int(index)
        return self.current

    def next(self) -> PairItem | None:
        """Step to the next pair in the queue, decided or not (wraps around)."""
        if len(self._queue):
            self.position = (self.position + 1) % len(self._queue)
        return self.current

    def previous(self) -> PairItem | None:
        """Step to the previous pair in the queue (wraps around)."""
        if len(self._queue):
            self.position = (self.position - 1) % len(self._queue)
        return self.current

    def next_undecided(self) -> PairItem | None:
        """Go to the next pair without a decision after this one; then to skipped pairs.

        Stays put and returns None when every pair has a decision other than skip.
        """
        start = self.position + 1
        found = self._find(lambda d: d is None, start=start)
        if found is None:
            found = self._find(lambda d: d == "skip", start=start)
        if found is None:
            return None
        self.position = found
        return self.current

    def _find(self, wanted, *, start: int) -> int | None:
        n = len(self._queue)
        keys = list(self._index_of)
        for step in range(n):
            i = (start + step) % n
            if wanted(self._decisions.get(keys[i])):
                return i
        return None

    # --- deciding ------------------------------------------------------------------

    def decide(self, decision: str, *, advance: bool = True) -> int:
        """Record ``decision`` on the current pair now; then move to the next undecided pair.

        Returns the new ``decision_id``.
        """
        item = self.current
        if item is None:
            raise ValueError("the review queue is empty: nothing to decide on")
        decision_id = record_decision(
            self.workspace, item.image_a, item.image_b, decision, reviewer=self.reviewer
        )
        self._decisions[item.key] = decision
        if advance:
            self.next_undecided()
        return decision_id

    def skip(self) -> int:
        """Record ``skip`` on the current pair and move on; it comes back after the rest."""
        return self.decide("skip")

    def undo(self) -> PairItem | None:
        """Undo this reviewer's latest decision that is not yet undone, and go back to its pair.

        Works across sessions (it reads the store). Returns the pair whose
        decision was undone, or None if there was nothing to undo.
        """
        with self.workspace.transaction() as con:
            row = con.execute(
                "SELECT decision_id, image_a, image_b FROM decisions "
                "WHERE reviewer = ? AND undone = 0 ORDER BY decision_id DESC LIMIT 1",
                (self.reviewer,),
            ).fetchone()
            if row is None:
                return None
            decision_id, a, b = row
            con.execute("UPDATE decisions SET undone = 1 WHERE decision_id = ?", (decision_id,))
            latest = con.execute(
                "SELECT decision FROM decisions WHERE image_a = ? AND image_b = ? AND undone = 0 "
                "ORDER BY decision_id DESC LIMIT 1",
                (a, b),
            ).fetchone()
        key = (int(a), int(b))
        if latest is None:
            self._decisions.pop(key, None)
        else:
            self._decisions[key] = latest[0]
        if key in self._index_of:
            self.position = self._index_of[key]
            return self.current
        return PairItem(key[0], key[1], float("nan"), "", None, 0, False, {}, self._decisions.get(key))

    # --- clusters ------------------------------------------------------------------

    def clusters(self, *, min_size: int = 2) -> list[list[int]]:
        """Connected groups of images linked by the queue's pairs, largest first.

        A pair whose current decision is ``different_lesions`` does not link.
        Each cluster is a sorted list of image ids; ties in size are ordered
        by the smallest image id.
        """
        from scipy.sparse import coo_matrix
        from scipy.sparse.csgraph import connected_components

        links = [
            k for k in self._index_of if self._decisions.get(k) != "different_lesions"
        ]
        ids = sorted({i for k in self._index_of for i in k})
        if not ids:
            return []
        pos = {image_id: n for n, image_id in enumerate(ids)}
        rows = [pos[a] for a, _ in links]
        cols = [pos[b] for _, b in links]
        graph = coo_matrix((np.ones(len(links)), (rows, cols)), shape=(len(ids), len(ids)))
        _, labels = connected_components(graph, directed=False)
        groups: dict[int, list[int]] = {}
        for image_id, label in zip(ids, labels):
            groups.setdefault(int(label), []).append(image_id)
        out = [g for g in groups.values() if len(g) >= min_size]
        return sorted(out, key=lambda g: (-len(g), g[0]))

    def split_off(self, cluster: Iterable[int], members: Iterable[int]) -> list[int]:
        """Record that ``members`` are different lesions from the rest of ``cluster``.

        Writes ``different_lesions`` for every pair of one member and one
        other image of the cluster, in one transaction, and returns their ids.
        """
        cluster = sorted({int(i) for i in cluster})
        members = sorted({int(i) for i in members})
        if not members:
            raise ValueError("members is empty: choose at least one image to split off")
        outside = set(members) - set(cluster)
        if outside:
            raise ValueError(f"images {sorted(outside)} are not in the cluster {cluster}")
        rest = [i for i in cluster if i not in members]
        if not rest:
            raise ValueError("members covers the whole cluster: nothing to split it from")
        pairs = [_ordered_pair(m, r) for m in members for r in rest]
        ids = record_decisions(self.workspace, pairs, "different_lesions", reviewer=self.reviewer)
        for key in pairs:
            self._decisions[key] = "different_lesions"
        return ids

    def confirm_cluster(self, cluster: Iterable[int], decision: str = "same_lesion") -> list[int]:
        """Record ``decision`` for each undecided candidate pair inside ``cluster``."""
        check_decision(decision)
        inside = set(int(i) for i in cluster)
        pairs = [
            k for k in self._index_of
            if k[0] in inside and k[1] in inside and self._decisions.get(k) is None
        ]
        if not pairs:
            return []
        ids = record_decisions(self.workspace, pairs, decision, reviewer=self.reviewer)
        for key in pairs:
            self._decisions[key] = decision
        return ids


# --- loading -------------------------------------------------------------------------


def _load_pairs(ws: Workspace) -> pd.DataFrame:
    pairs = ws.read_sql("SELECT * FROM pairs")
    if pairs.empty:
        return pairs.assign(_uncertainty=pd.Series(dtype=float), _no_conflict=pd.Series(dtype=bool))
    pairs["_uncertainty"] = uncertainty(pairs["score"])
    pairs["_no_conflict"] = pairs["conflict"].isna() | (pairs["conflict"].astype(str) == "")
    return pairs.sort_values(
        ["_uncertainty", "_no_conflict", "image_a", "image_b"],
        ascending=[False, True, True, True],
        kind="mergesort",
    ).reset_index(drop=True)


def _load_images(ws: Workspace) -> pd.DataFrame:
    return ws.read_sql(
        "SELECT i.image_id, i.path, i.sha256, i.source, i.patient_id, i.lesion_id, i.label, "
        "n.node, n.training_class, i.modality, i.body_site, i.capture_date, i.width, i.height, "
        "i.size FROM images i LEFT JOIN image_nodes n ON n.image_id = i.image_id "
        "WHERE i.image_id IN (SELECT image_a FROM pairs UNION SELECT image_b FROM pairs) "
        "ORDER BY i.image_id"
    ).set_index("image_id", drop=False)


def _decision_map(ws: Workspace) -> dict[tuple[int, int], str]:
    cur = current_decisions(ws)
    return {
        (int(a), int(b)): str(d) for a, b, d in zip(cur["image_a"], cur["image_b"], cur["decision"])
    }


def _ordered_pair(a, b) -> tuple[int, int]:
    a, b = int(a), int(b)
    if a == b:
        raise ValueError(f"a pair needs two different images, got image {a} twice")
    return (a, b) if a < b else (b, a)


def _check_reviewer(reviewer) -> str:
    if not isinstance(reviewer, str) or not reviewer.strip():
        raise ValueError(f"reviewer must be a non-empty name, got {reviewer!r}")
    return reviewer.strip()


def _as_set(value) -> set:
    if isinstance(value, str):
        return {value}
    return set(value)
