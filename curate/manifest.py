"""The frozen manifest as a value: its table, how it was made, its fingerprint, and checks.

A manifest is a table with one row per image (see :data:`MANIFEST_COLUMNS`),
sorted by ``path`` (relative to a declared root, ``/``-separated), plus a
record of how it was made. :meth:`Manifest.to_dict` and
:meth:`Manifest.from_dict` turn the record into a plain mapping (the sidecar
``NAME.manifest.json``) and back; the mapping carries ``format_version`` and
readers refuse versions they do not know.

The fingerprint is the SHA-256 of the text made of one line
``<sha256>\\t<split>\\n`` per image, the lines sorted. It changes when a file's
content or any image's split changes, and not when rows are reordered or
other columns are edited. :func:`compare_manifest` is the pure half of
``curate verify``: it compares the table with digests freshly read from disk.

Pure: no file I/O (see :mod:`curate.manifest_io`).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from typing import Iterable, Mapping

import pandas as pd

from curate.errors import ManifestError
from curate.report import Finding, Reason, Report

FORMAT_VERSION = 1
KNOWN_FORMAT_VERSIONS = (1,)

#: columns of a frozen manifest, in file order (optional ones may be empty)
MANIFEST_COLUMNS = [
    "path",
    "sha256",
    "split",
    "group_id",
    "patient_id",
    "lesion_id",
    "source",
    "node",
    "training_class",
    "skin_tone_bin",
]
REQUIRED_COLUMNS = ("path", "sha256", "split")


class ManifestIssue(Reason):
    """What ``curate verify`` can find wrong with a manifest and the files it lists."""

    MISSING_FILE = "missing_file"
    CHANGED_FILE = "changed_file"
    UNREADABLE_FILE = "unreadable_file"
    UNEXPECTED_FILE = "unexpected_file"
    FINGERPRINT_MISMATCH = "fingerprint_mismatch"
    TABLE_CHANGED = "table_changed"


def fingerprint(table: pd.DataFrame) -> str:
    """SHA-256 over the sorted ``<sha256>\\t<split>`` lines of a manifest table.

    Examples
    --------
    >>> t = pd.DataFrame({"sha256": ["bb", "aa"], "split": ["test", "train"]})
    >>> fingerprint(t) == fingerprint(t.iloc[::-1])
    True
    >>> fingerprint(t) == fingerprint(t.assign(split=["train", "test"]))
    False
    >>> fingerprint(t) == hashlib.sha256(b"aa\\ttrain\\nbb\\ttest\\n").hexdigest()
    True
    """
    missing = {"sha256", "split"} - set(table.columns)
    if missing:
        raise ValueError(f"fingerprint needs columns sha256 and split; missing {sorted(missing)}")
    if table["sha256"].isna().any() or table["split"].isna().any():
        raise ValueError("fingerprint: every row needs a sha256 and a split")
    lines = sorted(f"{d}\t{s}\n" for d, s in zip(table["sha256"], table["split"]))
    h = hashlib.sha256()
    for line in lines:
        h.update(line.encode("utf-8"))
    return h.hexdigest()


@dataclass(frozen=True)
class Manifest:
    """A frozen split: the table and the record of how it was made.

    Parameters
    ----------
    table : DataFrame
        One row per image with at least ``path``, ``sha256`` and ``split``;
        stored sorted by ``path``.
    name : str
        The manifest's name (file stem).
    root : str, optional
        The declared root the paths are relative to, as it was on the machine
        that froze the manifest (another machine passes its own ``--root``).
    parameters : dict
        The split parameters used (including the seed under ``random_state``).
    versions : dict
        Package versions at freezing time.
    created_at, command : str
        UTC creation time (ISO 8601) and the command that made it.
    pseudonymised : bool
        Whether patient, lesion and group ids are salted pseudonyms.
    excluded : list of dict
        Files under the root deliberately left out (``path``, ``reason``), so
        verify does not call them unexpected.
    table_digests : dict
        SHA-256 of each written table file by format (``csv``, ``parquet``).
    leak_check : dict
        How the split was checked for leakage at freezing time: the id scopes
        (``patient_scope``, ``lesion_scope``) that ``curate check`` reuses, and
        the leaks found (``known_leaks``, empty unless frozen despite leaks).
    recorded_fingerprint : str, optional
        The fingerprint read from a sidecar; None for a new manifest.

    Examples
    --------
    >>> t = pd.DataFrame({"path": ["b.png", "a.png"], "sha256": ["bb", "aa"],
    ...                   "split": ["test", "train"]})
    >>> m = Manifest(t, name="demo", parameters={"random_state": 0})
    >>> list(m.table["path"])
    ['a.png', 'b.png']
    >>> again = Manifest.from_dict(m.to_dict(), m.table)
    >>> again.recorded_fingerprint == m.fingerprint
    True
    """

    table: pd.DataFrame
    name: str
    root: str | None = None
    parameters: dict = field(default_factory=dict)
    versions: dict = field(default_factory=dict)
    created_at: str | None = None
    command: str | None = None
    pseudonymised: bool = False
    excluded: tuple = ()
    table_digests: dict = field(default_factory=dict)
    leak_check: dict = field(default_factory=dict)
    recorded_fingerprint: str | None = None
    format_version: int = FORMAT_VERSION

    def __post_init__(self):
        if not isinstance(self.table, pd.DataFrame):
            raise TypeError(f"table must be a DataFrame, got {type(self.table).__name__}")
        missing = [c for c in REQUIRED_COLUMNS if c not in self.table.columns]
        if missing:
            raise ManifestError(f"manifest {self.name!r}: table lacks column(s) {missing}")
        if not self.name or any(ch in self.name for ch in "/\\") or self.name.startswith("."):
            raise ValueError(f"name must be a plain file stem, got {self.name!r}")
        cols = [c for c in MANIFEST_COLUMNS if c in self.table.columns]
        cols += [c for c in self.table.columns if c not in cols]
        ordered = self.table[cols].sort_values("path", kind="stable").reset_index(drop=True)
        object.__setattr__(self, "table", ordered)
        object.__setattr__(self, "excluded", tuple(dict(e) for e in self.excluded))

    @property
    def fingerprint(self) -> str:
        """:func:`fingerprint` of the table as it is now."""
        return fingerprint(self.table)

    @property
    def split_counts(self) -> dict[str, int]:
        counts = self.table["split"].value_counts()
        return {str(k): int(v) for k, v in sorted(counts.items())}

    def to_dict(self) -> dict:
        """The sidecar mapping (everything but the table rows)."""
        return {
            "format_version": self.format_version,
            "name": self.name,
            "fingerprint": self.fingerprint,
            "fingerprint_method": "sha256 over sorted lines '<sha256>\\t<split>\\n'",
            "n_images": int(len(self.table)),
            "split_counts": self.split_counts,
            "columns": list(self.table.columns),
            "row_order": "path",
            "root": self.root,
            "pseudonymised": bool(self.pseudonymised),
            "parameters": dict(self.parameters),
            "random_state": self.parameters.get("random_state", self.parameters.get("seed")),
            "versions": dict(self.versions),
            "created_at": self.created_at,
            "command": self.command,
            "excluded": [dict(e) for e in self.excluded],
            "table_digests": dict(self.table_digests),
            "leak_check": dict(self.leak_check),
        }

    @classmethod
    def from_dict(cls, record: Mapping, table: pd.DataFrame) -> "Manifest":
        """Rebuild a manifest from a sidecar mapping and its table.

        Raises :class:`~curate.errors.ManifestError` for anything but a mapping
        of a known ``format_version``.
        """
        if not isinstance(record, Mapping):
            raise ManifestError(f"a manifest record must be a mapping, got {type(record).__name__}")
        version = record.get("format_version")
        if version not in KNOWN_FORMAT_VERSIONS:
            raise ManifestError(
                f"unknown manifest format_version {version!r}; this curate reads "
                f"{list(KNOWN_FORMAT_VERSIONS)} (a newer curate may read it)"
            )
        if "name" not in record:
            raise ManifestError("manifest record has no name")
        return cls(
            table=table,
            name=record["name"],
            root=record.get("root"),
            parameters=dict(record.get("parameters") or {}),
            versions=dict(record.get("versions") or {}),
            created_at=record.get("created_at"),
            command=record.get("command"),
            pseudonymised=bool(record.get("pseudonymised", False)),
            excluded=tuple(record.get("excluded") or ()),
            table_digests=dict(record.get("table_digests") or {}),
            leak_check=dict(record.get("leak_check") or {}),
            recorded_fingerprint=record.get("fingerprint"),
            format_version=version,
        )


@dataclass
class ManifestCheck:
    """What ``curate verify`` found: a report of issues and the two fingerprints."""

    report: Report
    n_images: int
    recorded_fingerprint: str | None
    table_fingerprint: str

    @property
    def ok(self) -> bool:
        return self.report.ok

    def counts(self) -> dict[str, int]:
        return self.report.counts()

    def to_dict(self) -> dict:
        """A plain mapping, ready for ``json.dumps`` (the ``--json`` output of verify)."""
        frame = self.report.to_frame()
        return {
            "ok": self.ok,
            "n_images": int(self.n_images),
            "recorded_fingerprint": self.recorded_fingerprint,
            "table_fingerprint": self.table_fingerprint,
            "counts": self.counts(),
            "findings": frame.astype(object).where(frame.notna(), None).to_dict("records"),
        }

    def summary(self, max_rows: int = 20) -> str:
        if self.ok:
            return f"manifest verified: {self.n_images} files, fingerprint {self.table_fingerprint[:16]}"
        return self.report.summary(max_rows=max_rows)


def compare_manifest(
    manifest: Manifest,
    observed: pd.DataFrame,
    *,
    present: Iterable[str] | None = None,
    table_digest: tuple[str, str] | None = None,
) -> ManifestCheck:
    """Compare a manifest with what is on disk now.

    Parameters
    ----------
    manifest : Manifest
    observed : DataFrame
        One row per manifest path: ``path``, ``sha256`` (the digest read now,
        missing when it could not be read) and ``problem`` (None,
        ``missing_file`` or ``unreadable_file``).
    present : iterable of str, optional
        Every image path found under the root now (relative, ``/``-separated);
        those neither listed nor recorded as excluded are unexpected. None
        skips that check.
    table_digest : (format, sha256), optional
        Digest of the table file as read, compared with the one the sidecar
        recorded for that format.

    Returns
    -------
    ManifestCheck

    Examples
    --------
    >>> t = pd.DataFrame({"path": ["a.png", "b.png"], "sha256": ["aa", "bb"],
    ...                   "split": ["train", "test"]})
    >>> m = Manifest.from_dict(Manifest(t, name="x").to_dict(), t)
    >>> now = pd.DataFrame({"path": ["a.png", "b.png"], "sha256": ["aa", "cc"],
    ...                     "problem": [None, None]})
    >>> compare_manifest(m, now, present=["a.png", "b.png", "new.png"]).counts()
    {'changed_file': 1, 'unexpected_file': 1}
    """
    table = manifest.table
    findings: list[Finding] = []
    if manifest.recorded_fingerprint is not None and manifest.recorded_fingerprint != manifest.fingerprint:
        findings.append(
            Finding(
                "verify",
                ManifestIssue.FINGERPRINT_MISMATCH,
                "the (digest, split) pairs in the table do not match the recorded fingerprint: "
                "the table was edited after freezing",
                value=f"recorded {manifest.recorded_fingerprint}, table {manifest.fingerprint}",
            )
        )
    if table_digest is not None:
        fmt, digest = table_digest
        recorded = manifest.table_digests.get(fmt)
        if recorded is not None and recorded != digest:
            findings.append(
                Finding(
                    "verify",
                    ManifestIssue.TABLE_CHANGED,
                    f"the {fmt} table file differs from the one written at freezing time",
                    value=f"recorded {recorded}, now {digest}",
                )
            )
    obs = observed.drop_duplicates("path").set_index("path")
    for i, row in enumerate(table.itertuples(index=False), start=2):
        path, expected, split = row.path, row.sha256, row.split
        if path not in obs.index:
            raise ValueError(f"observed has no row for manifest path {path!r}")
        now = obs.loc[path]
        problem = now.get("problem")
        if isinstance(problem, str) and problem:
            findings.append(
                Finding("verify", ManifestIssue(problem), f"{problem.replace('_', ' ')}",
                        file=path, row=i, value=expected, split=split)
            )
        elif now["sha256"] != expected:
            findings.append(
                Finding("verify", ManifestIssue.CHANGED_FILE, "content differs from the manifest",
                        file=path, row=i, value=f"expected {expected}, found {now['sha256']}",
                        split=split)
            )
    if present is not None:
        known = set(table["path"]) | {e.get("path") for e in manifest.excluded}
        for path in sorted(set(present) - known):
            findings.append(
                Finding("verify", ManifestIssue.UNEXPECTED_FILE, "not listed in the manifest",
                        file=path)
            )
    return ManifestCheck(
        report=Report(findings),
        n_images=len(table),
        recorded_fingerprint=manifest.recorded_fingerprint,
        table_fingerprint=manifest.fingerprint,
    )
