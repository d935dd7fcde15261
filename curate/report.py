"""Findings and reports: one row per thing worth a person's attention.

A :class:`Report` gathers every finding of a check (it does not stop at the
first) and renders it as a table or a short text summary. Reason codes are
enum members whose lower-case string values appear in JSON output and in the
workspace, so they are public API and never change once released.

This module never prints and never writes files.
"""

from __future__ import annotations

import enum
from collections import Counter
from dataclasses import asdict, dataclass, field
from typing import Iterable

import pandas as pd


class Reason(str, enum.Enum):
    """Base of every reason-code enum: members compare equal to their string value."""

    def __str__(self) -> str:  # pragma: no cover - trivial
        return self.value


class IngestIssue(Reason):
    """Why a file or a metadata row could not be taken into the catalog as it is."""

    ZERO_BYTE = "zero_byte"
    TRUNCATED = "truncated"
    NOT_AN_IMAGE = "not_an_image"
    DECOMPRESSION_BOMB = "decompression_bomb"
    PERMISSION_DENIED = "permission_denied"
    SYMLINK_LOOP = "symlink_loop"
    MISSING_COLUMNS = "missing_columns"
    DUPLICATE_PATH = "duplicate_path"
    PATH_NOT_FOUND = "path_not_found"
    OUTSIDE_ROOT = "outside_root"
    BAD_ENCODING = "bad_encoding"
    UNREADABLE_METADATA = "unreadable_metadata"
    METADATA_WITHOUT_FILE = "metadata_without_file"
    CONFLICTING_METADATA = "conflicting_metadata"
    MALFORMED_ROW = "malformed_row"
    BAD_DATE = "bad_date"
    READ_ERROR = "read_error"


class LeakReason(Reason):
    """Why two images in different splits leak information between them."""

    EXACT_DUPLICATE = "exact_duplicate"
    NEAR_DUPLICATE = "near_duplicate"
    SAME_PATIENT = "same_patient"
    SAME_LESION = "same_lesion"
    MISSING_FILE = "missing_file"
    UNREADABLE_FILE = "unreadable_file"


@dataclass(frozen=True)
class Finding:
    """One thing a check found.

    Parameters
    ----------
    check : str
        The check that produced it (``"scan"``, ``"leakage"``, ``"balance"`` ...).
    reason : str
        A reason code (an enum member's value).
    message : str
        A readable sentence for people; tests never assert on it.
    file : str, optional
        The file concerned (image or metadata file).
    row : int, optional
        1-based line number in ``file`` where that is a table (header is line 1).
    image_id, related_image_id : optional
        Catalog ids, where the finding is about catalog images.
    value : str, optional
        The offending value (a label, a patient id, a digest ...).
    split : str, optional
        The split concerned, for split checks.
    """

    check: str
    reason: str
    message: str = ""
    file: str | None = None
    row: int | None = None
    image_id: int | None = None
    related_image_id: int | None = None
    value: str | None = None
    split: str | None = None

    def as_dict(self) -> dict:
        d = asdict(self)
        d["reason"] = str(getattr(self.reason, "value", self.reason))
        return d


FINDING_COLUMNS = [
    "check",
    "reason",
    "message",
    "file",
    "row",
    "image_id",
    "related_image_id",
    "value",
    "split",
]


@dataclass
class Report:
    """Every finding of one check, in the order found.

    Examples
    --------
    >>> r = Report([Finding("scan", IngestIssue.ZERO_BYTE, "empty file", file="a.jpg")])
    >>> r.ok
    False
    >>> r.counts()
    {'zero_byte': 1}
    >>> Report([]).ok
    True
    """

    findings: list[Finding] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.findings

    def __len__(self) -> int:
        return len(self.findings)

    def __iter__(self):
        return iter(self.findings)

    def extend(self, findings: Iterable[Finding]) -> None:
        self.findings.extend(findings)

    def counts(self) -> dict[str, int]:
        """Number of findings per reason code, most common first."""
        c = Counter(f.as_dict()["reason"] for f in self.findings)
        return dict(sorted(c.items(), key=lambda kv: (-kv[1], kv[0])))

    def to_frame(self) -> pd.DataFrame:
        return pd.DataFrame([f.as_dict() for f in self.findings], columns=FINDING_COLUMNS)

    def summary(self, max_rows: int = 20) -> str:
        """A few lines of text: the counts, then the first ``max_rows`` findings."""
        if self.ok:
            return "no findings"
        lines = [", ".join(f"{n} {reason}" for reason, n in self.counts().items())]
        for f in self.findings[:max_rows]:
            where = f.file or (f"image {f.image_id}" if f.image_id is not None else "")
            if f.row is not None:
                where += f" row {f.row}"
            lines.append(f"  {f.as_dict()['reason']}: {where}: {f.message}".rstrip())
        if len(self.findings) > max_rows:
            lines.append(f"  ... and {len(self.findings) - max_rows} more")
        return "\n".join(lines)
