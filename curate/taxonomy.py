"""Disease trees: the :class:`Taxonomy` value type, parsing from YAML or CSV, validation.

A taxonomy is a rooted tree of nodes. Each node has an ``id`` (unique), a
``parent`` (empty for the one root), a display ``name``, an optional WHO ICD-10
code and an optional ``malignancy`` (``benign`` / ``malignant`` /
``indeterminate``). Raw diagnosis labels are mapped onto nodes
(:mod:`curate.label_mapping`); counts roll up the tree (:mod:`curate.balance`).

Validation collects every problem at once, each with the line it sits on, and
raises one :class:`~curate.errors.TaxonomyError` whose ``problems`` are
:class:`~curate.report.Finding` rows with :class:`TaxonomyIssue` reason codes.

Parsing works on text (:func:`parse_taxonomy`); :func:`read_taxonomy` only
reads the file and hands its text over.
"""

from __future__ import annotations

import csv
import io
import os
import re
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Iterable, Mapping

import numpy as np

from curate.errors import TaxonomyError
from curate.report import Finding, Reason, Report

__all__ = [
    "MALIGNANCY_VALUES",
    "Taxonomy",
    "TaxonomyIssue",
    "TaxonomyNode",
    "check_taxonomy",
    "parse_taxonomy",
    "read_taxonomy",
    "example_taxonomy",
    "EXAMPLE_TAXONOMY_PATH",
]

MALIGNANCY_VALUES = ("benign", "malignant", "indeterminate")

#: WHO ICD-10 code shape: a letter, two digits, then optionally a dot and more digits.
ICD10_PATTERN = re.compile(r"^[A-Z][0-9]{2}(\.[0-9]+)?$")

EXAMPLE_TAXONOMY_PATH = Path(__file__).parent / "data" / "example_taxonomy.yaml"

TAXONOMY_COLUMNS = ("id", "parent", "name", "icd10", "malignancy")


class TaxonomyIssue(Reason):
    """Why a taxonomy file (or a label-mapping file) cannot be used as it is."""

    UNREADABLE = "unreadable"  # not parseable YAML/CSV, or the wrong overall shape
    MISSING_COLUMNS = "missing_columns"
    MISSING_ID = "missing_id"
    DUPLICATE_ID = "duplicate_id"
    UNKNOWN_PARENT = "unknown_parent"
    CYCLE = "cycle"
    NO_ROOT = "no_root"
    MULTIPLE_ROOTS = "multiple_roots"
    BAD_ICD10 = "bad_icd10"
    BAD_MALIGNANCY = "bad_malignancy"
    MALIGNANT_UNDER_BENIGN = "malignant_under_benign"
    EMPTY = "empty"
    # label-mapping files
    UNKNOWN_NODE = "unknown_node"
    CONFLICTING_MAPPING = "conflicting_mapping"
    BAD_STATUS = "bad_status"


@dataclass(frozen=True)
class TaxonomyNode:
    """One node of a disease tree.

    ``line`` is the 1-based line of the file the node was read from (0 when
    built in memory).
    """

    id: str
    parent: str | None
    name: str
    icd10: str | None = None
    malignancy: str | None = None
    line: int = 0


def _clean(value) -> str | None:
    if value is None:
        return None
    if isinstance(value, float) and np.isnan(value):
        return None
    text = str(value).strip()
    return text or None


def _finding(reason, message, *, file, row, value=None) -> Finding:
    return Finding("taxonomy", reason.value, message, file=file, row=row, value=value)


def check_taxonomy(records: Iterable[Mapping], *, file: str | None = None) -> Report:
    """Every problem of a list of node records, each with its line number.

    Parameters
    ----------
    records : iterable of mappings
        Keys ``id``, ``parent``, ``name``, optional ``icd10``, ``malignancy`` and
        ``line`` (1-based line in ``file``).
    file : str, optional
        Named in each finding.

    Returns
    -------
    Report
        One finding per problem; reasons are :class:`TaxonomyIssue` values.

    Examples
    --------
    >>> rows = [{"id": "a", "parent": None, "name": "A", "line": 1},
    ...         {"id": "b", "parent": "zz", "name": "B", "line": 2}]
    >>> [(f.reason, f.row) for f in check_taxonomy(rows)]
    [('unknown_parent', 2)]
    """
    nodes, report = _nodes_and_problems(records, file=file)
    return report


def _nodes_and_problems(records, *, file):
    problems: list[Finding] = []
    nodes: dict[str, TaxonomyNode] = {}
    for rec in records:
        line = int(rec.get("line") or 0)
        node_id = _clean(rec.get("id"))
        if node_id is None:
            problems.append(_finding(TaxonomyIssue.MISSING_ID, "node without an id", file=file, row=line))
            continue
        icd10 = _clean(rec.get("icd10"))
        if icd10 is not None and not ICD10_PATTERN.match(icd10):
            problems.append(
                _finding(
                    TaxonomyIssue.BAD_ICD10,
                    f"node {node_id!r}: ICD-10 code {icd10!r} is not a letter, two digits and "
                    "optionally a dot and further digits (e.g. C43.9)",
                    file=file, row=line, value=icd10,
                )
            )
        malignancy = _clean(rec.get("malignancy"))
        if malignancy is not None:
            malignancy = malignancy.lower()
            if malignancy not in MALIGNANCY_VALUES:
                problems.append(
                    _finding(
                        TaxonomyIssue.BAD_MALIGNANCY,
                        f"node {node_id!r}: malignancy {malignancy!r} is not one of "
                        f"{', '.join(MALIGNANCY_VALUES)}",
                        file=file, row=line, value=malignancy,
                    )
                )
                malignancy = None
        if node_id in nodes:
            problems.append(
                _finding(
                    TaxonomyIssue.DUPLICATE_ID,
                    f"node id {node_id!r} already defined on line {nodes[node_id].line}",
                    file=file, row=line, value=node_id,
                )
            )
            continue
        nodes[node_id] = TaxonomyNode(
            id=node_id,
            parent=_clean(rec.get("parent")),
            name=_clean(rec.get("name")) or node_id,
            icd10=icd10,
            malignancy=malignancy,
            line=line,
        )
    if not nodes:
        if not problems:
            problems.append(_finding(TaxonomyIssue.EMPTY, "the taxonomy has no nodes", file=file, row=None))
        return nodes, Report(problems)

    for node in nodes.values():
        if node.parent is not None and node.parent not in nodes:
            problems.append(
                _finding(
                    TaxonomyIssue.UNKNOWN_PARENT,
                    f"node {node.id!r} names parent {node.parent!r}, which is not a node",
                    file=file, row=node.line, value=node.parent,
                )
            )
    roots = [n for n in nodes.values() if n.parent is None]
    if len(roots) > 1:
        names = ", ".join(f"{n.id!r} (line {n.line})" for n in roots)
        for n in roots[1:]:
            problems.append(
                _finding(
                    TaxonomyIssue.MULTIPLE_ROOTS,
                    f"more than one root (node without parent): {names}",
                    file=file, row=n.line, value=n.id,
                )
            )
    problems.extend(_cycles(nodes, file=file))
    if not roots:
        problems.append(
            _finding(TaxonomyIssue.NO_ROOT, "no root: every node names a parent", file=file, row=None)
        )
    problems.extend(_malignant_under_benign(nodes, file=file))
    problems.sort(key=lambda f: (f.row is None, f.row or 0))
    return nodes, Report(problems)


def _cycles(nodes: dict[str, TaxonomyNode], *, file) -> list[Finding]:
    """One finding per cycle of parent links, on the line of its first-defined member."""
    state: dict[str, int] = {}  # 1 = on the current walk, 2 = done
    found = []
    for start in nodes:
        walk = []
        cur = start
        while cur is not None and cur in nodes and state.get(cur) is None:
            state[cur] = 1
            walk.append(cur)
            cur = nodes[cur].parent
        if cur is not None and state.get(cur) == 1:
            cycle = walk[walk.index(cur):]
            first = min(cycle, key=lambda n: nodes[n].line)
            k = cycle.index(first)
            ordered = cycle[k:] + cycle[:k]
            found.append(
                _finding(
                    TaxonomyIssue.CYCLE,
                    "parent links form a cycle: " + " -> ".join(ordered + [first]),
                    file=file, row=nodes[first].line, value=first,
                )
            )
        for n in walk:
            state[n] = 2
    return found


def _malignant_under_benign(nodes: dict[str, TaxonomyNode], *, file) -> list[Finding]:
    parents = {n.parent for n in nodes.values()}
    found = []
    for node in nodes.values():
        if node.id in parents or node.malignancy != "malignant":
            continue
        seen = {node.id}
        cur = node.parent
        while cur is not None and cur in nodes and cur not in seen:
            seen.add(cur)
            if nodes[cur].malignancy == "benign":
                found.append(
                    _finding(
                        TaxonomyIssue.MALIGNANT_UNDER_BENIGN,
                        f"malignant leaf {node.id!r} sits under {cur!r}, declared benign "
                        f"(line {nodes[cur].line})",
                        file=file, row=node.line, value=node.id,
                    )
                )
                break
            cur = nodes[cur].parent
    return found


class Taxonomy:
    """A validated disease tree.

    Nodes are held in pre-order (each node before its descendants, children in
    file order), so every subtree is one contiguous range of positions
    ``[position(n), subtree_end(n))``; counts roll up with one cumulative sum.

    Build one with :meth:`from_records`, :func:`parse_taxonomy` or
    :func:`read_taxonomy`; invalid input raises
    :class:`~curate.errors.TaxonomyError` listing every problem.

    Examples
    --------
    >>> t = Taxonomy.from_records([
    ...     {"id": "skin", "parent": None, "name": "Skin"},
    ...     {"id": "mel", "parent": "skin", "name": "Melanoma", "icd10": "C43.9",
    ...      "malignancy": "malignant"},
    ...     {"id": "nev", "parent": "skin", "name": "Naevus", "malignancy": "benign"}])
    >>> t.root, t.leaves, t.depth("mel")
    ('skin', ['mel', 'nev'], 1)
    >>> t.ancestors("nev")
    ['nev', 'skin']
    """

    def __init__(self, nodes: Iterable[TaxonomyNode], *, source: str | None = None):
        nodes = list(nodes)
        by_id = {n.id: n for n in nodes}
        children: dict[str | None, list[str]] = {}
        for n in nodes:
            children.setdefault(n.parent, []).append(n.id)
        roots = children.get(None, [])
        if len(roots) != 1 or len(by_id) != len(nodes):
            raise ValueError("Taxonomy needs checked nodes; use Taxonomy.from_records")
        order: list[str] = []
        depth: dict[str, int] = {}
        stack = [(roots[0], 0)]
        while stack:
            node_id, d = stack.pop()
            order.append(node_id)
            depth[node_id] = d
            for child in reversed(children.get(node_id, [])):
                stack.append((child, d + 1))
        if len(order) != len(nodes):
            raise ValueError("Taxonomy needs checked nodes (unreachable nodes); use from_records")
        self.source = source
        self._nodes = by_id
        self._children = {k: tuple(v) for k, v in children.items() if k is not None}
        self.order: list[str] = order
        self.root: str = roots[0]
        self._depth = depth
        self._position = {node_id: i for i, node_id in enumerate(order)}

    # --- construction ----------------------------------------------------------------

    @classmethod
    def from_records(cls, records: Iterable[Mapping], *, file: str | None = None) -> "Taxonomy":
        """Validate node records and build the tree, or raise TaxonomyError with every problem."""
        records = list(records)
        nodes, report = _nodes_and_problems(records, file=file)
        if not report.ok:
            raise TaxonomyError(
                f"{file or 'taxonomy'}: {len(report)} problem(s)\n{report.summary(max_rows=50)}",
                tuple(report.findings),
            )
        return cls(nodes.values(), source=file)

    def to_records(self) -> list[dict]:
        """The nodes as plain dicts, in pre-order (without line numbers)."""
        return [
            {"id": n.id, "parent": n.parent, "name": n.name, "icd10": n.icd10, "malignancy": n.malignancy}
            for n in (self._nodes[i] for i in self.order)
        ]

    # --- queries ---------------------------------------------------------------------

    def __len__(self) -> int:
        return len(self.order)

    def __contains__(self, node_id) -> bool:
        return node_id in self._nodes

    def __iter__(self):
        return iter(self.order)

    def __repr__(self) -> str:
        return f"Taxonomy(root={self.root!r}, nodes={len(self)}, leaves={len(self.leaves)})"

    def node(self, node_id: str) -> TaxonomyNode:
        return self._nodes[node_id]

    def parent(self, node_id: str) -> str | None:
        return self._nodes[node_id].parent

    def children(self, node_id: str) -> tuple[str, ...]:
        return self._children.get(node_id, ())

    def is_leaf(self, node_id: str) -> bool:
        return node_id not in self._children

    @cached_property
    def leaves(self) -> list[str]:
        """Leaf ids in pre-order."""
        return [n for n in self.order if n not in self._children]

    def depth(self, node_id: str) -> int:
        """0 for the root."""
        return self._depth[node_id]

    @property
    def max_depth(self) -> int:
        return max(self._depth.values())

    def position(self, node_id: str) -> int:
        """Index of the node in pre-order."""
        return self._position[node_id]

    def ancestors(self, node_id: str) -> list[str]:
        """The node itself, then its parent, ... up to the root."""
        out = []
        cur: str | None = node_id
        while cur is not None:
            out.append(cur)
            cur = self._nodes[cur].parent
        return out

    def descendants(self, node_id: str) -> list[str]:
        """The node itself and every node beneath it, in pre-order."""
        i = self._position[node_id]
        return self.order[i : self.subtree_end[i]]

    def ancestor_at_depth(self, node_id: str, depth: int) -> str:
        """The ancestor at ``depth``, or the node itself when it is shallower."""
        chain = self.ancestors(node_id)
        return chain[max(0, len(chain) - 1 - depth)]

    def name(self, node_id: str) -> str:
        return self._nodes[node_id].name

    def effective_malignancy(self, node_id: str) -> str | None:
        """The node's own malignancy, else the nearest ancestor's, else None."""
        for n in self.ancestors(node_id):
            if self._nodes[n].malignancy:
                return self._nodes[n].malignancy
        return None

    # --- arrays for vectorised roll-ups -------------------------------------------------

    @cached_property
    def parent_index(self) -> np.ndarray:
        """Pre-order position of each node's parent (-1 for the root)."""
        return np.array(
            [-1 if self._nodes[n].parent is None else self._position[self._nodes[n].parent] for n in self.order],
            dtype=np.int64,
        )

    @cached_property
    def depths(self) -> np.ndarray:
        return np.array([self._depth[n] for n in self.order], dtype=np.int64)

    @cached_property
    def subtree_end(self) -> np.ndarray:
        """Exclusive end of each node's pre-order range: the subtree of i is [i, end[i])."""
        end = np.arange(1, len(self.order) + 1, dtype=np.int64)
        parent = self.parent_index
        for i in range(len(self.order) - 1, 0, -1):  # children come after parents
            p = parent[i]
            if end[i] > end[p]:
                end[p] = end[i]
        return end

    @cached_property
    def ancestor_matrix(self) -> np.ndarray:
        """``A[k, i]`` = position of the ancestor of node i at depth k, or -1 if i is shallower."""
        n = len(self.order)
        out = np.full((self.max_depth + 1, n), -1, dtype=np.int64)
        depths = self.depths
        out[depths, np.arange(n)] = np.arange(n)
        parent = self.parent_index
        for i in range(n):  # pre-order: the parent's column is filled first
            p = parent[i]
            if p >= 0:
                d = depths[i]
                out[:d, i] = out[:d, p]
        return out


# --- parsing -----------------------------------------------------------------------


def parse_taxonomy(text: str, *, format: str, file: str | None = None) -> Taxonomy:
    """Build a :class:`Taxonomy` from the text of a YAML or CSV file.

    Parameters
    ----------
    text : str
        File contents.
    format : {"yaml", "csv"}
        YAML: a mapping with a ``nodes`` list (or a bare list) of mappings with
        keys ``id``, ``parent``, ``name``, ``icd10``, ``malignancy``. CSV: a
        header with those columns (``icd10`` and ``malignancy`` optional).
    file : str, optional
        Named in error findings.

    Raises
    ------
    TaxonomyError
        Listing every problem with its 1-based line number.

    Examples
    --------
    >>> text = "id,parent,name,icd10\\nskin,,Skin,\\nbcc,skin,Basal cell carcinoma,C44.9\\n"
    >>> parse_taxonomy(text, format="csv").leaves
    ['bcc']
    """
    if format == "yaml":
        records = _yaml_records(text, file=file)
    elif format == "csv":
        records = _csv_records(text, file=file)
    else:
        raise ValueError(f"format must be 'yaml' or 'csv', got {format!r}")
    return Taxonomy.from_records(records, file=file)


def _fail(reason, message, *, file, row=None):
    finding = _finding(reason, message, file=file, row=row)
    raise TaxonomyError(f"{file or 'taxonomy'}: {message}", (finding,))


def _yaml_records(text: str, *, file) -> list[dict]:
    import yaml

    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        _fail(TaxonomyIssue.UNREADABLE, f"not valid YAML: {exc}", file=file,
              row=None if mark is None else mark.line + 1)
    seq = root
    if isinstance(root, yaml.MappingNode):
        seq = next((v for k, v in root.value if getattr(k, "value", None) == "nodes"), None)
    if not isinstance(seq, yaml.SequenceNode):
        _fail(TaxonomyIssue.UNREADABLE, "expected a list of nodes (or a mapping with a 'nodes' list)",
              file=file, row=None if root is None else root.start_mark.line + 1)
    constructor = yaml.SafeLoader("")
    records = []
    for item in seq.value:
        line = item.start_mark.line + 1  # yaml marks are 0-based
        if not isinstance(item, yaml.MappingNode):
            records.append({"id": None, "line": line})
            continue
        data = constructor.construct_mapping(item, deep=True)
        records.append({**{k: data.get(k) for k in TAXONOMY_COLUMNS}, "line": line})
    return records


def _csv_records(text: str, *, file) -> list[dict]:
    reader = csv.DictReader(io.StringIO(text))
    header = [h.strip() for h in (reader.fieldnames or [])]
    missing = [c for c in ("id", "parent", "name") if c not in header]
    if missing:
        _fail(TaxonomyIssue.MISSING_COLUMNS, f"missing column(s) {', '.join(missing)}", file=file, row=1)
    reader.fieldnames = header
    records = []
    for row in reader:
        records.append({**{k: row.get(k) for k in TAXONOMY_COLUMNS}, "line": reader.line_num})
    return records


def read_taxonomy(path: str | os.PathLike) -> Taxonomy:
    """Read a taxonomy file (``.yaml``/``.yml`` or ``.csv``); see :func:`parse_taxonomy`."""
    path = Path(path)
    suffix = path.suffix.lower()
    fmt = {".yaml": "yaml", ".yml": "yaml", ".csv": "csv"}.get(suffix)
    if fmt is None:
        raise ValueError(f"{path}: a taxonomy file must end in .yaml, .yml or .csv")
    text = path.read_text(encoding="utf-8-sig")
    return parse_taxonomy(text, format=fmt, file=str(path))


def example_taxonomy() -> Taxonomy:
    """The example skin-condition tree shipped with curate (used by the demo).

    Examples
    --------
    >>> t = example_taxonomy()
    >>> "basal_cell_carcinoma" in t.leaves
    True
    """
    return read_taxonomy(EXAMPLE_TAXONOMY_PATH)
