"""Training classes proposed from a disease tree, and the roll-up map back to coarse nodes.

Teams often train on fine classes and sum the predicted probabilities up the
tree to the coarse classes they report on. :func:`propose_classes` partitions
the tree top-down so that each class is a node whose subtree holds at most
``max_images`` images:

1. Start at the root. A node whose subtree holds ``<= max_images`` images, or
   a leaf (however many images it holds), becomes one class covering its
   subtree.
2. Otherwise descend into its children. Images labelled at the node itself
   (e.g. "melanoma, not otherwise specified") and children without any
   images form the node's *remainder* class, named ``"<node>:other"``.
3. Classes with fewer than ``min_images`` images (but some) are merged into
   the remainder class of their parent, deepest first, unless that would take
   the remainder over ``max_images`` or there is no parent; such classes stay
   as they are and are listed in :attr:`ClassProposal.reported`.

Every node holding images is in exactly one class, and so is every leaf. A
remainder class may hold no images (it only collects empty children); the
class list for training (:meth:`ClassProposal.trainable`) leaves those out.

:meth:`ClassProposal.rollup` gives a 0/1 matrix from classes to the nodes at a
chosen depth: each class row has exactly one 1, so summing class
probabilities over a column gives that coarse node's probability, and any
subset of columns can be renormalised by its own total.

This module never prints and never writes files.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from curate.taxonomy import Taxonomy

__all__ = ["TrainingClass", "ClassProposal", "propose_classes", "REMAINDER_SUFFIX"]

REMAINDER_SUFFIX = ":other"


@dataclass
class TrainingClass:
    """One proposed training class.

    ``name`` is the node id for a subtree class, ``"<node>:other"`` for a
    remainder class; ``node`` is the anchor node; ``members`` the nodes whose
    own images belong to the class (pre-order).
    """

    name: str
    node: str
    kind: str  # "subtree" or "remainder"
    members: list[str]
    images: int


@dataclass
class ClassProposal:
    """The result of :func:`propose_classes`."""

    classes: list[TrainingClass]
    max_images: int
    min_images: int
    reported: list[str] = field(default_factory=list)

    def __post_init__(self):
        self._node_class = {m: c.name for c in self.classes for m in c.members}

    @property
    def node_class(self) -> dict[str, str]:
        """Node id -> class name, for every node that belongs to a class."""
        return dict(self._node_class)

    def trainable(self) -> list[str]:
        """Class names holding at least one image, in tree order."""
        return [c.name for c in self.classes if c.images > 0]

    def to_frame(self) -> pd.DataFrame:
        """One row per class: name, node, kind, images, n_members, under_minimum."""
        return pd.DataFrame(
            {
                "class": [c.name for c in self.classes],
                "node": [c.node for c in self.classes],
                "kind": [c.kind for c in self.classes],
                "images": [c.images for c in self.classes],
                "n_members": [len(c.members) for c in self.classes],
                "reported": [c.name in self.reported for c in self.classes],
            }
        )

    def class_of(self, nodes: pd.Series) -> pd.Series:
        """The class of each image, given its node (missing stays missing)."""
        return nodes.map(self._node_class).astype("object")

    def rollup(self, taxonomy: Taxonomy, depth: int, *, include_empty: bool = False) -> pd.DataFrame:
        """0/1 matrix: rows = classes, columns = coarse targets at ``depth``.

        A class whose node lies at ``depth`` or deeper maps to its ancestor at
        ``depth``; a shallower subtree class maps to itself; a shallower
        remainder class maps to the column ``"<node>:other"`` (its images are
        known only down to that node). Each row has exactly one 1.

        Examples
        --------
        >>> t = Taxonomy.from_records([{"id": "r", "parent": None, "name": "R"},
        ...     {"id": "a", "parent": "r", "name": "A"}, {"id": "a1", "parent": "a", "name": "A1"},
        ...     {"id": "a2", "parent": "a", "name": "A2"}, {"id": "b", "parent": "r", "name": "B"}])
        >>> p = propose_classes(pd.Series({"a1": 5, "a2": 6, "b": 3}), t, max_images=8)
        >>> p.rollup(t, 1)
            a  b
        a1  1  0
        a2  1  0
        b   0  1
        """
        if depth < 0:
            raise ValueError(f"depth must be >= 0, got {depth!r}")
        rows, targets = [], []
        for c in self.classes:
            if c.images == 0 and not include_empty:
                continue
            if taxonomy.depth(c.node) >= depth or c.kind == "subtree":
                target = taxonomy.ancestor_at_depth(c.node, depth)
            else:
                target = c.name
            rows.append(c.name)
            targets.append(target)

        def order(t):
            node = t[: -len(REMAINDER_SUFFIX)] if t.endswith(REMAINDER_SUFFIX) else t
            return (taxonomy.position(node), t.endswith(REMAINDER_SUFFIX))

        columns = sorted(set(targets), key=order)
        col_index = {t: j for j, t in enumerate(columns)}
        matrix = np.zeros((len(rows), len(columns)), dtype=np.int64)
        matrix[np.arange(len(rows)), [col_index[t] for t in targets]] = 1
        return pd.DataFrame(matrix, index=pd.Index(rows), columns=columns)


def propose_classes(
    node_images: pd.Series,
    taxonomy: Taxonomy,
    *,
    max_images: int,
    min_images: int = 0,
) -> ClassProposal:
    """Partition the tree into training classes of at most ``max_images`` images.

    Parameters
    ----------
    node_images : Series
        Images labelled at each node (index: node id, not rolled up); nodes
        missing from the index hold none. ``frame["node"].value_counts()``
        gives it.
    taxonomy : Taxonomy
    max_images : int
        Largest class (images), except a single leaf, which is never split.
    min_images : int, default 0
        Classes with fewer images are merged into their parent's remainder
        class where possible, else reported.

    Returns
    -------
    ClassProposal

    Examples
    --------
    >>> t = Taxonomy.from_records([{"id": "r", "parent": None, "name": "R"},
    ...     {"id": "a", "parent": "r", "name": "A"}, {"id": "a1", "parent": "a", "name": "A1"},
    ...     {"id": "a2", "parent": "a", "name": "A2"}, {"id": "b", "parent": "r", "name": "B"}])
    >>> p = propose_classes(pd.Series({"a1": 5, "a2": 1, "b": 30}), t, max_images=8, min_images=2)
    >>> [(c.name, c.images) for c in p.classes]
    [('a', 6), ('b', 30)]
    >>> p = propose_classes(pd.Series({"a1": 5, "a2": 6, "b": 3}), t, max_images=8, min_images=4)
    >>> [(c.name, c.images) for c in p.classes], p.reported
    ([('r:other', 3), ('a1', 5), ('a2', 6)], ['r:other'])
    """
    if not isinstance(max_images, (int, np.integer)) or max_images < 1:
        raise ValueError(f"max_images must be a positive integer, got {max_images!r}")
    if not isinstance(min_images, (int, np.integer)) or min_images < 0:
        raise ValueError(f"min_images must be a non-negative integer, got {min_images!r}")
    if min_images > max_images:
        raise ValueError(f"min_images ({min_images}) must not exceed max_images ({max_images})")
    unknown = [n for n in node_images.index if n not in taxonomy]
    if unknown:
        raise ValueError(f"node(s) not in the taxonomy: {', '.join(map(str, unknown[:10]))}")
    n = len(taxonomy)
    own = np.zeros(n, dtype=np.int64)
    for node, count in node_images.items():
        if count < 0:
            raise ValueError(f"negative image count for {node!r}")
        own[taxonomy.position(node)] += int(count)
    cs = np.r_[0, np.cumsum(own)]
    rolled = cs[taxonomy.subtree_end] - cs[:-1]

    classes: dict[str, TrainingClass] = {}
    stack = [taxonomy.root]
    while stack:
        node = stack.pop()
        i = taxonomy.position(node)
        if rolled[i] <= max_images or taxonomy.is_leaf(node):
            classes[node] = TrainingClass(node, node, "subtree", taxonomy.descendants(node), int(rolled[i]))
            continue
        rest = [node]
        for child in taxonomy.children(node):
            if rolled[taxonomy.position(child)] == 0:
                rest.extend(taxonomy.descendants(child))
            else:
                stack.append(child)
        if own[i] > 0 or len(rest) > 1:
            name = node + REMAINDER_SUFFIX
            classes[name] = TrainingClass(name, node, "remainder", rest, int(own[i]))

    reported: list[str] = []
    if min_images > 0:
        done: set[str] = set()
        while True:
            small = [c for c in classes.values()
                     if 0 < c.images < min_images and c.name not in done]
            if not small:
                break
            c = max(small, key=lambda c: (taxonomy.depth(c.node) + (c.kind == "subtree"),
                                          taxonomy.position(c.node)))
            done.add(c.name)
            parent = taxonomy.parent(c.node)
            if parent is None:
                reported.append(c.name)
                continue
            target_name = parent + REMAINDER_SUFFIX
            target = classes.get(target_name)
            if target is None:
                target = TrainingClass(target_name, parent, "remainder", [parent], 0)
            if target.images + c.images > max_images:
                reported.append(c.name)
                continue
            target.members = sorted(set(target.members) | set(c.members), key=taxonomy.position)
            target.images += c.images
            classes[target_name] = target
            del classes[c.name]
            done.discard(target_name)
        # a remainder that took in every child of its node is the node's whole subtree
        for name, c in list(classes.items()):
            if c.kind == "remainder" and len(c.members) == len(taxonomy.descendants(c.node)):
                del classes[name]
                classes[c.node] = TrainingClass(c.node, c.node, "subtree", c.members, c.images)
                if name in reported:
                    reported[reported.index(name)] = c.node

    ordered = sorted(
        classes.values(), key=lambda c: (taxonomy.position(c.node), c.kind == "remainder")
    )
    return ClassProposal(ordered, max_images=int(max_images), min_images=int(min_images),
                         reported=[r for r in reported if r in classes])
