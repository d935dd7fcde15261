"""Grouped, stratified splits: whole groups go to splits, class shares stay near the targets.

Three ways in, one optimiser underneath (see :mod:`curate._split_search`):

* :class:`BalancedGroupKFold` follows the scikit-learn splitter protocol
  (``split(X, y, groups)``, ``get_n_splits``), so it drops into
  ``cross_val_score`` and ``GridSearchCV``.
* :func:`assign` returns a split name per row for any number of named splits.
* :func:`propose_split` takes a catalog and returns a :class:`SplitAssignment`
  keyed by ``image_id``, with a report of classes too small for every split and
  of new images that joined a locked group.

Promises (tested): no group is in two splits; every row is assigned once; the
same ``random_state`` gives the same assignment; renaming class labels or
shuffling rows does not change the split of any row (or ``image_id``).

This module is pure: no printing and no file I/O.
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from sklearn.model_selection import BaseCrossValidator
from sklearn.utils import check_random_state

from curate import _split_search
from curate.report import Finding, Reason, Report

DEFAULT_NAMES = {2: ("train", "test"), 3: ("train", "validation", "test")}


class SplitIssue(Reason):
    """What a proposed split wants a person to know."""

    CLASS_TOO_SMALL = "class_too_small"
    JOINED_LOCKED_GROUP = "joined_locked_group"
    LOCKED_GROUP_SPLIT = "locked_group_split"


# --- the problem, as arrays --------------------------------------------------------------


@dataclass
class _Problem:
    group_codes: np.ndarray      # per row: canonical group index
    group_values: np.ndarray     # per canonical group index: the group value
    counts: object               # scipy sparse (G x C)
    sizes: np.ndarray            # images per group
    weights: np.ndarray          # per class
    class_block: np.ndarray      # per class: block (stratification column) index
    class_values: list           # per class: the label value


def _factorize_groups(groups) -> tuple[np.ndarray, np.ndarray]:
    values = pd.Series(np.asarray(groups, dtype=object) if np.ndim(groups) else groups)
    try:
        codes, uniques = pd.factorize(values, sort=True)
    except TypeError:  # mixed types: order by text
        codes, uniques = pd.factorize(values.map(repr), sort=True)
    if (codes < 0).any():
        raise ValueError("groups contains missing values; every row needs a group")
    return codes, np.asarray(uniques, dtype=object)


def _label_blocks(y, n_rows) -> list[pd.Series]:
    if y is None:
        return [pd.Series(np.zeros(n_rows, dtype=np.int64))]
    if isinstance(y, pd.DataFrame):
        return [y[c].reset_index(drop=True) for c in y.columns]
    arr = np.asarray(y, dtype=object) if not isinstance(y, np.ndarray) else y
    if arr.ndim == 1:
        return [pd.Series(arr)]
    if arr.ndim == 2:
        return [pd.Series(arr[:, j]) for j in range(arr.shape[1])]
    raise ValueError(f"y must be 1-D or 2-D, got {arr.ndim} dimensions")


def _build_problem(y, groups) -> _Problem:
    from scipy.sparse import coo_matrix

    codes, uniques = _factorize_groups(groups)
    n_rows, n_groups = len(codes), len(uniques)
    blocks = _label_blocks(y, n_rows)
    rows, cols, data, class_block, class_values, weights = [], [], [], [], [], []
    offset = 0
    for b, labels in enumerate(blocks):
        if len(labels) != n_rows:
            raise ValueError(f"y has {len(labels)} rows but groups has {n_rows}")
        lab, lab_values = pd.factorize(labels, use_na_sentinel=False)
        cells = pd.DataFrame({"g": codes, "c": lab}).value_counts().sort_index()
        g_idx = cells.index.get_level_values(0).to_numpy()
        c_idx = cells.index.get_level_values(1).to_numpy()
        # label-independent class order: by total images, then by the (group, count) list
        keys: dict = {}
        for c, g, k in zip(c_idx, g_idx, cells.to_numpy()):
            keys.setdefault(c, []).append((int(g), int(k)))
        canon = sorted(keys, key=lambda c: (-sum(k for _, k in keys[c]), keys[c]))
        rank = np.empty(len(lab_values), dtype=np.int64)
        rank[canon] = np.arange(len(canon))
        rows.append(g_idx)
        cols.append(rank[c_idx] + offset)
        data.append(cells.to_numpy().astype(np.float64))
        weights.append(np.full(len(canon), 1.0 / len(canon)))
        class_block += [b] * len(canon)
        class_values += [lab_values[c] for c in canon]
        offset += len(canon)
    counts = coo_matrix(
        (np.concatenate(data), (np.concatenate(rows), np.concatenate(cols))), shape=(n_groups, offset)
    ).tocsr()
    sizes = np.bincount(codes, minlength=n_groups).astype(np.float64)
    return _Problem(codes, uniques, counts, sizes, np.concatenate(weights),
                    np.asarray(class_block), class_values)


def _solve(problem: _Problem, targets, *, random_state, locked_groups=None,
           overall_weight=1.0, max_sweeps=100):
    """Split index per group."""
    rng = check_random_state(random_state)
    G = len(problem.sizes)
    rank = rng.permutation(G)
    offsets = rng.randint(0, 2**31 - 1, size=G)
    order = np.lexsort((rank, -problem.sizes))
    locked = np.full(G, -1, dtype=np.int64) if locked_groups is None else locked_groups
    assignment, _ = _split_search.search(
        problem.counts, problem.sizes, np.asarray(targets, dtype=np.float64), problem.weights,
        order=order, locked=locked, offsets=offsets, overall_weight=overall_weight,
        max_sweeps=max_sweeps,
    )
    return assignment


def check_fractions(fractions, names=None) -> tuple[np.ndarray, tuple]:
    """Validated target fractions (summing to 1) and split names (defaults filled in).

    Examples
    --------
    >>> check_fractions([0.8, 0.2])
    (array([0.8, 0.2]), ('train', 'test'))
    """
    try:
        f = np.asarray([float(x) for x in fractions], dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"fractions must be numbers between 0 and 1, got {fractions!r}") from None
    if len(f) < 2:
        raise ValueError(f"fractions needs at least two splits, got {list(f)}")
    if (f <= 0).any() or (f >= 1).any() or not np.isclose(f.sum(), 1.0, atol=1e-6):
        raise ValueError(f"fractions must each lie in (0, 1) and sum to 1, got {list(f)} (sum {f.sum():g})")
    if names is None:
        names = DEFAULT_NAMES.get(len(f), tuple(f"split{i}" for i in range(len(f))))
    names = tuple(str(n) for n in names)
    if len(names) != len(f):
        raise ValueError(f"names has {len(names)} entries but fractions has {len(f)}")
    if len(set(names)) != len(names) or any(not n for n in names):
        raise ValueError(f"names must be distinct and non-empty, got {list(names)}")
    return f / f.sum(), names


def _check_random_state(random_state):
    if random_state is not None and not isinstance(random_state, (numbers.Integral, np.random.RandomState)):
        raise TypeError(f"random_state must be None, an int or a RandomState, got {random_state!r}")


# --- scikit-learn splitter ------------------------------------------------------------------


class BalancedGroupKFold(BaseCrossValidator):
    """K-fold over groups, with each class's images spread evenly over the folds.

    Each group (patient, lesion, leakage group) lands in exactly one test fold.
    Folds are chosen together by an optimiser (greedy by group size, then moves
    and swaps of groups) that keeps every class's share in each fold, and each
    fold's share of all images, as close to ``1 / n_splits`` as possible.

    Parameters
    ----------
    n_splits : int, default=5
        Number of folds, at least 2.
    random_state : int, RandomState instance or None, default=None
        Breaks ties between groups of equal size. Pass an int for reproducible
        output across multiple function calls.
    overall_weight : float, default=1.0
        Weight of the fold-size term against the mean per-class term.
    max_sweeps : int, default=100
        Upper bound on local-search sweeps over all groups.

    Notes
    -----
    Renaming the classes in ``y`` or shuffling the rows does not change which
    fold a row lands in. ``y`` may be 2-D: each column is balanced on its own
    (for example taxonomy node and source). ``y=None`` balances fold sizes only.
    Classes with fewer groups than folds cannot reach every fold.

    See Also
    --------
    sklearn.model_selection.StratifiedGroupKFold : greedy, one pass, one label column.
    assign : named splits with any fractions.

    Examples
    --------
    >>> X = np.zeros((12, 1))
    >>> y = np.array([0, 0, 1, 1, 0, 0, 1, 1, 0, 0, 1, 1])
    >>> groups = np.array([1, 1, 2, 2, 3, 3, 4, 4, 5, 5, 6, 6])
    >>> cv = BalancedGroupKFold(n_splits=2, random_state=0)
    >>> cv
    BalancedGroupKFold(max_sweeps=100, n_splits=2, overall_weight=1.0, random_state=0)
    >>> for train, test in cv.split(X, y, groups):
    ...     print(sorted(set(groups[test].tolist())), np.bincount(y[test]).tolist())
    [2, 5, 6] [2, 4]
    [1, 3, 4] [4, 2]
    """

    def __init__(self, n_splits=5, *, random_state=None, overall_weight=1.0, max_sweeps=100):
        if not isinstance(n_splits, numbers.Integral) or isinstance(n_splits, bool):
            raise ValueError(f"n_splits must be an integer, got {n_splits!r}")
        if n_splits < 2:
            raise ValueError(f"n_splits must be at least 2, got {n_splits}")
        if not overall_weight >= 0:
            raise ValueError(f"overall_weight must be non-negative, got {overall_weight!r}")
        if not isinstance(max_sweeps, numbers.Integral) or max_sweeps < 0:
            raise ValueError(f"max_sweeps must be a non-negative integer, got {max_sweeps!r}")
        _check_random_state(random_state)
        self.n_splits = int(n_splits)
        self.random_state = random_state
        self.overall_weight = overall_weight
        self.max_sweeps = max_sweeps

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in sorted(self.get_params().items()))
        return f"{type(self).__name__}({params})"

    def get_params(self, deep=True) -> dict:
        return {"n_splits": self.n_splits, "random_state": self.random_state,
                "overall_weight": self.overall_weight, "max_sweeps": self.max_sweeps}

    def get_n_splits(self, X=None, y=None, groups=None) -> int:
        """The number of folds, ``n_splits``."""
        return self.n_splits

    def fold_of_rows(self, y, groups) -> np.ndarray:
        """The test fold (0 to ``n_splits - 1``) of every row."""
        if groups is None:
            raise ValueError("The 'groups' parameter should not be None.")
        problem = _build_problem(y, groups)
        n_groups = len(problem.sizes)
        if n_groups < self.n_splits:
            raise ValueError(
                f"Cannot have number of folds n_splits={self.n_splits} greater than the number "
                f"of groups: {n_groups}."
            )
        targets = np.full(self.n_splits, 1.0 / self.n_splits)
        per_group = _solve(problem, targets, random_state=self.random_state,
                           overall_weight=self.overall_weight, max_sweeps=self.max_sweeps)
        return per_group[problem.group_codes]

    def split(self, X, y=None, groups=None):
        """Yield (train, test) integer positions, one pair per fold.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            Only its length is used.
        y : array-like of shape (n_samples,) or (n_samples, n_columns), optional
            Class labels to balance across folds.
        groups : array-like of shape (n_samples,)
            Group of each row; required.

        Yields
        ------
        train, test : ndarray of int
        """
        if groups is None:
            raise ValueError("The 'groups' parameter should not be None.")
        n = len(groups)
        if X is not None and len(X) != n:
            raise ValueError(f"X has {len(X)} rows but groups has {n}")
        fold = self.fold_of_rows(y, groups)
        rows = np.arange(n)
        for k in range(self.n_splits):
            yield rows[fold != k], rows[fold == k]


# --- named splits -------------------------------------------------------------------------


def assign(y, groups, *, fractions, names=None, random_state=0, locked=None,
           overall_weight=1.0, max_sweeps=100) -> np.ndarray:
    """Split name for every row: whole groups per split, class shares near ``fractions``.

    Parameters
    ----------
    y : array-like of shape (n_rows,) or (n_rows, n_columns), or None
        Class labels to balance (each column on its own); None balances sizes only.
    groups : array-like of shape (n_rows,)
        Group of each row (patient, lesion or leakage group id).
    fractions : sequence of float
        Target share of images per split, each in (0, 1), summing to 1.
    names : sequence of str, optional
        Split names; default ``train, validation, test`` for three fractions,
        ``train, test`` for two, ``split0 ...`` otherwise.
    random_state : int, RandomState instance or None, default=0
        Breaks ties between groups of equal size. Pass an int for reproducible
        output across multiple function calls.
    locked : array-like of shape (n_rows,), optional
        A split name per row that must not move, or None/"" for free rows. A
        free row whose group holds locked rows goes to that split.

    Returns
    -------
    numpy.ndarray of str

    Examples
    --------
    >>> groups = np.arange(20) // 2          # 10 groups of 2 images
    >>> y = np.tile(["mel", "nev"], 10)
    >>> out = assign(y, groups, fractions=[0.6, 0.2, 0.2], random_state=0)
    >>> sorted(pd.Series(out).value_counts().items())
    [('test', 4), ('train', 12), ('validation', 4)]
    """
    targets, names = check_fractions(fractions, names)
    _check_random_state(random_state)
    problem = _build_problem(y, groups)
    locked_groups, _, _ = _lock_groups(problem, locked, names)
    per_group = _solve(problem, targets, random_state=random_state, locked_groups=locked_groups,
                       overall_weight=overall_weight, max_sweeps=max_sweeps)
    split_idx = per_group[problem.group_codes]
    if locked is not None:
        row_lock = _row_locks(locked, names)
        split_idx = np.where(row_lock >= 0, row_lock, split_idx)
    return np.asarray(names, dtype=object)[split_idx]


def _row_locks(locked, names) -> np.ndarray:
    index = {n: i for i, n in enumerate(names)}
    out = np.full(len(locked), -1, dtype=np.int64)
    for i, v in enumerate(pd.Series(locked, dtype=object).tolist()):
        if v is None or v == "" or (isinstance(v, float) and np.isnan(v)):
            continue
        if v not in index:
            raise ValueError(f"locked split {v!r} (row {i}) is not one of the split names {list(names)}")
        out[i] = index[v]
    return out


def _lock_groups(problem, locked, names):
    """Per-group lock (majority locked split; ties by split order) and conflicting groups."""
    G = len(problem.sizes)
    lock = np.full(G, -1, dtype=np.int64)
    if locked is None:
        return lock, np.zeros(0, dtype=np.int64), None
    row_lock = _row_locks(locked, names)
    if len(row_lock) != len(problem.group_codes):
        raise ValueError(f"locked has {len(row_lock)} rows but groups has {len(problem.group_codes)}")
    has = row_lock >= 0
    if not has.any():
        return lock, np.zeros(0, dtype=np.int64), row_lock
    table = np.zeros((G, len(names)), dtype=np.int64)
    np.add.at(table, (problem.group_codes[has], row_lock[has]), 1)
    any_lock = table.sum(axis=1) > 0
    lock[any_lock] = table[any_lock].argmax(axis=1)
    conflicted = np.flatnonzero((table > 0).sum(axis=1) > 1)
    return lock, conflicted, row_lock


# --- catalog level ----------------------------------------------------------------------------


@dataclass
class SplitAssignment:
    """A split per image, and how it was made.

    Attributes
    ----------
    splits : pandas.Series
        Split name per ``image_id`` (the index), sorted by ``image_id``.
    groups : pandas.Series
        Group id per ``image_id``.
    names : tuple of str
    fractions : tuple of float
        Target shares of images.
    stratify : tuple of str
        Catalog columns balanced.
    parameters : dict
        Everything needed to redo the split (recorded with a frozen manifest).
    report : Report
        Classes too small for every split, new images that joined locked groups,
        locked groups that span two splits.
    class_table : pandas.DataFrame
        Images per (column, value) and split, with the share of the value's images.
    """

    splits: pd.Series
    groups: pd.Series
    names: tuple
    fractions: tuple
    stratify: tuple
    parameters: dict
    report: Report
    class_table: pd.DataFrame = field(repr=False)

    def to_frame(self) -> pd.DataFrame:
        """``image_id``, ``group_id``, ``split``, sorted by ``image_id``."""
        return pd.DataFrame({"image_id": self.splits.index.to_numpy(),
                             "group_id": self.groups.reindex(self.splits.index).to_numpy(),
                             "split": self.splits.to_numpy()})

    def split_table(self) -> pd.DataFrame:
        """Images and groups per split, achieved share of images and target."""
        frame = self.to_frame()
        images = frame["split"].value_counts().reindex(self.names, fill_value=0)
        groups = frame.groupby("split")["group_id"].nunique().reindex(self.names, fill_value=0)
        return pd.DataFrame({
            "split": list(self.names), "images": images.to_numpy(), "groups": groups.to_numpy(),
            "fraction": (images / max(len(frame), 1)).to_numpy(), "target": list(self.fractions),
        })

    def worst_class_deviation(self) -> float:
        """Largest |share of a class's images in a split - target| over all classes."""
        if self.class_table.empty:
            return 0.0
        return float((self.class_table["fraction"] - self.class_table["target"]).abs().max())

    def summary(self, max_rows: int = 20) -> str:
        lines = ["split         images  groups  fraction  target"]
        for r in self.split_table().itertuples():
            lines.append(f"{r.split:<12} {r.images:>7} {r.groups:>7}  {r.fraction:8.4f}  {r.target:6.4f}")
        if self.stratify:
            lines.append(f"worst per-class deviation from target: {self.worst_class_deviation():.4f} "
                         f"(over {', '.join(self.stratify)})")
        lines.append(self.report.summary(max_rows) if not self.report.ok else "no findings")
        return "\n".join(lines)


def propose_split(
    catalog: pd.DataFrame,
    *,
    fractions=(0.7, 0.15, 0.15),
    names=None,
    stratify=None,
    group_column: str = "group_id",
    keep: pd.Series | None = None,
    random_state=0,
    overall_weight: float = 1.0,
    max_sweeps: int = 100,
) -> SplitAssignment:
    """Propose a split of a catalog: whole groups, balanced classes, locked rows kept.

    Parameters
    ----------
    catalog : pandas.DataFrame
        Needs ``image_id`` and the columns named in ``stratify``; groups come
        from ``group_column`` when present, otherwise from
        :func:`curate.grouping.group_images` on the catalog.
    fractions : sequence of float
        Target share of images per split, each in (0, 1), summing to 1.
    names : sequence of str, optional
        Split names (default ``train, validation, test`` for three fractions).
    stratify : str or sequence of str, optional
        Catalog columns to balance, each on its own (for example
        ``["training_class", "source"]``). Missing values form their own class.
    group_column : str
        Column holding the leakage group id.
    keep : pandas.Series, optional
        Split name per ``image_id`` that must not move (from a frozen manifest).
    random_state : int, RandomState instance or None, default=0
        Breaks ties between groups of equal size. Pass an int for reproducible
        output across multiple function calls.

    Returns
    -------
    SplitAssignment

    Examples
    --------
    >>> cat = pd.DataFrame({"image_id": range(1, 13),
    ...                     "group_id": [f"g{i // 2}" for i in range(12)],
    ...                     "label": ["mel", "mel", "nev", "nev"] * 3})
    >>> sa = propose_split(cat, fractions=[0.5, 0.5], names=["a", "b"], stratify="label")
    >>> sa.split_table()[["split", "images", "groups"]].values.tolist()
    [['a', 6, 3], ['b', 6, 3]]
    >>> sorted(sa.splits.groupby(cat.set_index("image_id")["label"]).value_counts().tolist())
    [2, 2, 4, 4]
    """
    targets, names = check_fractions(fractions, names)
    _check_random_state(random_state)
    if "image_id" not in catalog.columns:
        raise ValueError("catalog needs an 'image_id' column")
    stratify = () if stratify is None else ((stratify,) if isinstance(stratify, str) else tuple(stratify))
    missing = [c for c in stratify if c not in catalog.columns]
    if missing:
        raise ValueError(f"stratify column(s) {missing} not in the catalog (columns: {list(catalog.columns)})")
    cat = catalog.sort_values("image_id", kind="stable").reset_index(drop=True)
    if group_column in cat.columns:
        group_of = cat[group_column]
        if group_of.isna().any():
            bad = cat.loc[group_of.isna(), "image_id"].iloc[0]
            raise ValueError(f"{group_column} is missing for image_id {bad}")
    else:
        from curate.grouping import group_images

        group_of = group_images(cat).groups.reindex(cat["image_id"]).reset_index(drop=True)
    y = cat[list(stratify)] if stratify else None
    problem = _build_problem(y, group_of.to_numpy())

    locked_rows = None
    if keep is not None:
        keep = pd.Series(keep)
        unknown = keep.index.difference(cat["image_id"])
        locked_rows = keep.reindex(cat["image_id"]).to_numpy(dtype=object)
        locked_rows = np.where(pd.isna(locked_rows), None, locked_rows)
    locked_groups, conflicted, row_lock = _lock_groups(problem, locked_rows, names)
    per_group = _solve(problem, targets, random_state=random_state, locked_groups=locked_groups,
                       overall_weight=overall_weight, max_sweeps=max_sweeps)
    split_idx = per_group[problem.group_codes]
    if row_lock is not None:
        split_idx = np.where(row_lock >= 0, row_lock, split_idx)
    split_names = np.asarray(names, dtype=object)[split_idx]
    image_ids = cat["image_id"].to_numpy()

    findings = []
    if row_lock is not None:
        findings += _lock_findings(problem, row_lock, conflicted, image_ids, names, per_group)
    findings += _small_class_findings(cat, stratify, group_of, split_names, names)
    parameters = {
        "fractions": [float(f) for f in targets], "names": list(names), "stratify": list(stratify),
        "random_state": random_state if isinstance(random_state, numbers.Integral) else None,
        "group_column": group_column, "overall_weight": overall_weight, "max_sweeps": max_sweeps,
        "kept_images": int((row_lock >= 0).sum()) if row_lock is not None else 0,
        "kept_unknown_images": int(len(unknown)) if keep is not None else 0,
    }
    index = pd.Index(image_ids, name="image_id")
    return SplitAssignment(
        splits=pd.Series(split_names, index=index, name="split"),
        groups=pd.Series(group_of.to_numpy(), index=index, name="group_id"),
        names=names, fractions=tuple(float(f) for f in targets), stratify=stratify,
        parameters=parameters, report=Report(findings),
        class_table=_class_table(cat, stratify, split_names, names, targets),
    )


def _lock_findings(problem, row_lock, conflicted, image_ids, names, per_group):
    findings = []
    for g in conflicted:
        rows = np.flatnonzero(problem.group_codes == g)
        used = sorted({names[s] for s in row_lock[rows] if s >= 0})
        findings.append(Finding(
            "split", SplitIssue.LOCKED_GROUP_SPLIT,
            f"group {problem.group_values[g]} has kept images in {', '.join(used)}; they stay there "
            f"and its new images go to {names[per_group[g]]}",
            image_id=int(image_ids[rows[0]]), value=str(problem.group_values[g]),
            split=names[per_group[g]]))
    locked_group = np.zeros(len(problem.sizes), dtype=bool)
    locked_group[problem.group_codes[row_lock >= 0]] = True
    new_in_locked = (row_lock < 0) & locked_group[problem.group_codes]
    for g in np.unique(problem.group_codes[new_in_locked]):
        rows = np.flatnonzero((problem.group_codes == g) & new_in_locked)
        findings.append(Finding(
            "split", SplitIssue.JOINED_LOCKED_GROUP,
            f"{len(rows)} new image(s) join group {problem.group_values[g]}, kept in "
            f"{names[per_group[g]]}, and go there too",
            image_id=int(image_ids[rows[0]]), value=str(problem.group_values[g]),
            split=names[per_group[g]]))
    return findings


def _small_class_findings(cat, stratify, group_of, split_names, names):
    findings = []
    for column in stratify:
        frame = pd.DataFrame({"value": cat[column].astype(object).where(cat[column].notna(), None),
                              "group": group_of.to_numpy(), "split": split_names,
                              "image_id": cat["image_id"].to_numpy()})
        for value, part in frame.groupby("value", dropna=False, sort=True):
            n_groups = part["group"].nunique()
            if n_groups >= len(names):
                continue
            where = part.groupby("split")["group"].nunique().reindex(names).dropna().astype(int)
            text = ", ".join(f"{s}: {k}" for s, k in where.items())
            findings.append(Finding(
                "split", SplitIssue.CLASS_TOO_SMALL,
                f"{column}={value!s} has {n_groups} group(s) for {len(names)} splits; groups went to {text}",
                image_id=int(part["image_id"].iloc[0]), value=f"{column}={value!s}",
                split=",".join(where.index)))
    return findings


def _class_table(cat, stratify, split_names, names, targets) -> pd.DataFrame:
    parts = []
    for column in stratify:
        frame = pd.DataFrame({"value": cat[column].astype(str).where(cat[column].notna(), "<missing>"),
                              "split": split_names})
        table = pd.crosstab(frame["value"], frame["split"]).reindex(columns=list(names), fill_value=0)
        share = table.div(table.sum(axis=1), axis=0)
        long = table.stack().rename("images").to_frame().join(share.stack().rename("fraction"))
        long = long.reset_index()
        long.insert(0, "column", column)
        long["target"] = long["split"].map(dict(zip(names, targets)))
        parts.append(long)
    if not parts:
        return pd.DataFrame(columns=["column", "value", "split", "images", "fraction", "target"])
    return pd.concat(parts, ignore_index=True)
