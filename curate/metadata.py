"""Metadata tables: decode a CSV's bytes, map its columns onto catalog fields, check its rows.

A source describes its images in a CSV whose column names are its own. A
*column mapping* says which CSV column holds each of our fields::

    path, patient, lesion, label, modality, body_site, capture_date

Only ``path`` is required; paths are absolute or relative to the scanned
folder, with ``/`` between folder names. A field left out of the mapping is taken from a
column of the same name (or of its catalog name, e.g. ``patient_id``) when the
CSV has one.

Everything here is pure: functions take bytes and strings and return values
plus :class:`~curate.report.Finding` rows; they never open files or print.

Text encoding: UTF-8 (with or without a byte-order mark) and UTF-16 with a
byte-order mark are read as they are. Any other bytes are a ``bad_encoding``
finding for each line that holds them, giving the line and byte offset; the
text is then read as Windows-1252, or as Latin-1 where Windows-1252 leaves a
byte undefined, so no row is lost. Check those rows: the fallback may show
wrong accented letters.
"""

from __future__ import annotations

import codecs
import csv
import functools
import io
import os
import re
from dataclasses import dataclass, field
from datetime import datetime

from curate.errors import CatalogError
from curate.report import FINDING_COLUMNS, Finding, IngestIssue

#: our metadata fields -> the catalog column each one fills
FIELD_COLUMNS: dict[str, str] = {
    "path": "path",
    "patient": "patient_id",
    "lesion": "lesion_id",
    "label": "label",
    "modality": "modality",
    "body_site": "body_site",
    "capture_date": "capture_date",
}
FIELDS = tuple(FIELD_COLUMNS)
REQUIRED_FIELDS = ("path",)
CHECK = "scan"


@dataclass(frozen=True)
class MetadataRow:
    """One usable CSV row: its 1-based line, the path as written, and catalog values."""

    row: int
    path: str
    values: dict


@dataclass
class MetadataTable:
    """The usable rows of a metadata file, the column mapping used, and what was wrong."""

    file: str
    columns: dict[str, str]
    encoding: str
    rows: list[MetadataRow] = field(default_factory=list)
    findings: list[Finding] = field(default_factory=list)


def parse_columns(text: str | None) -> dict[str, str]:
    """Parse a column mapping written as ``field=column,field=column``.

    Parameters
    ----------
    text : str or None
        For example ``"path=file,patient=pid"``. Empty or None gives ``{}``.

    Returns
    -------
    dict
        Our field -> the CSV's column name.

    Raises
    ------
    ValueError
        On an unknown field, a part without ``=``, an empty name or a field given twice.

    Examples
    --------
    >>> parse_columns("path=file, patient=pid")
    {'path': 'file', 'patient': 'pid'}
    >>> parse_columns("colour=x")
    Traceback (most recent call last):
    ...
    ValueError: columns: unknown field 'colour'; fields are path, patient, lesion, label, modality, body_site, capture_date
    """
    mapping: dict[str, str] = {}
    for part in (text or "").split(","):
        if not part.strip():
            continue
        name, sep, column = part.partition("=")
        name, column = name.strip(), column.strip()
        if not sep or not name or not column:
            raise ValueError(f"columns: expected field=column, got {part.strip()!r}")
        if name in mapping:
            raise ValueError(f"columns: field {name!r} given twice")
        mapping[name] = column
    check_columns(mapping)
    return mapping


def check_columns(columns: dict | None) -> dict[str, str]:
    """Check that a column mapping names only known fields; return it as a plain dict."""
    columns = dict(columns or {})
    for name, column in columns.items():
        if name not in FIELD_COLUMNS:
            raise ValueError(
                f"columns: unknown field {name!r}; fields are {', '.join(FIELDS)}"
            )
        if not isinstance(column, str) or not column:
            raise TypeError(f"columns: the column for {name!r} must be a non-empty str")
    return columns


def decode_text(data: bytes, *, file: str = "") -> tuple[str, str, list[Finding]]:
    """Decode a text file's bytes; report every line holding bytes that are not UTF-8.

    Returns
    -------
    text : str
    encoding : str
        ``utf-8``, ``utf-16``, or the fallback used (``cp1252``, ``latin-1``).
    findings : list of Finding
        One ``bad_encoding`` finding per line with undecodable bytes.

    Examples
    --------
    >>> decode_text(b"path\\nna\\xefve.jpg\\n")[1:]  # doctest: +ELLIPSIS
    ('cp1252', [Finding(check='scan', reason=<IngestIssue.BAD_ENCODING: 'bad_encoding'>, ...row=2...)])
    >>> decode_text("path\\nnaïve.jpg\\n".encode())[:2]
    ('path\\nnaïve.jpg\\n', 'utf-8')
    """
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        try:
            return data.decode("utf-16"), "utf-16", []
        except UnicodeDecodeError:
            pass  # fall through: reported line by line below
    try:
        return data.decode("utf-8-sig"), "utf-8", []
    except UnicodeDecodeError:
        pass
    findings = []
    offset = 0
    for number, line in enumerate(data.split(b"\n"), start=1):
        try:
            line.decode("utf-8")
        except UnicodeDecodeError as exc:
            findings.append(
                Finding(
                    CHECK,
                    IngestIssue.BAD_ENCODING,
                    f"byte 0x{line[exc.start]:02x} at byte offset {offset + exc.start} is not "
                    "UTF-8; the file was read as Windows-1252/Latin-1 instead, check this row",
                    file=file,
                    row=number,
                )
            )
        offset += len(line) + 1
    try:
        return data.decode("cp1252"), "cp1252", findings
    except UnicodeDecodeError:
        return data.decode("latin-1"), "latin-1", findings


def read_metadata(data: bytes, *, file: str = "", columns: dict | None = None) -> MetadataTable:
    """Read a metadata CSV's bytes into usable rows and findings.

    Parameters
    ----------
    data : bytes
        The file's content. The delimiter (comma, semicolon or tab) is taken
        from the header line.
    file : str
        The file's name, for findings.
    columns : dict, optional
        Our field -> CSV column (see :func:`parse_columns`).

    Returns
    -------
    MetadataTable
        ``rows`` holds one :class:`MetadataRow` per usable line, in file order
        (duplicates included: :func:`join_paths` sorts them out).

    Raises
    ------
    CatalogError
        The table cannot be used at all: no header, or a required or mapped
        column is missing. ``findings`` carries the rows explaining why.

    Examples
    --------
    >>> t = read_metadata(b"file,pid,dx\\na.jpg,P1,nevus\\n,P2,x\\n",
    ...                   columns={"path": "file", "patient": "pid", "label": "dx"})
    >>> [(r.row, r.path, r.values["patient_id"], r.values["label"]) for r in t.rows]
    [(2, 'a.jpg', 'P1', 'nevus')]
    >>> [(f.reason.value, f.row) for f in t.findings]
    [('malformed_row', 3)]
    """
    columns = check_columns(columns)
    text, encoding, findings = decode_text(data, file=file)
    lines = io.StringIO(text, newline="")
    header_line = text.split("\n", 1)[0]
    delimiter = max([",", ";", "\t"], key=header_line.count)
    reader = csv.reader(lines, delimiter=delimiter)
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        _refuse(file, IngestIssue.UNREADABLE_METADATA, "the file is empty (no header line)", 1)
    except csv.Error as exc:
        _refuse(file, IngestIssue.UNREADABLE_METADATA, f"cannot read the header: {exc}", 1)
    mapping = _map_columns(header, columns, file)
    table = MetadataTable(file=file, columns=mapping, encoding=encoding, findings=findings)
    index = [(FIELD_COLUMNS[name], header.index(column)) for name, column in mapping.items()]
    unmapped = [name for name in list(FIELD_COLUMNS.values())[1:] if name not in {k for k, _ in index}]
    line = reader.line_num + 1
    while True:
        try:
            record = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            table.findings.append(_finding(IngestIssue.MALFORMED_ROW, f"cannot parse: {exc}", file, line))
            line = reader.line_num + 1
            continue
        row, line = line, reader.line_num + 1
        if not "".join(record).strip():
            continue  # blank line
        if len(record) != len(header):
            table.findings.append(
                _finding(
                    IngestIssue.MALFORMED_ROW,
                    f"{len(record)} fields where the header has {len(header)}; row skipped "
                    "(an unquoted delimiter inside a value?)",
                    file,
                    row,
                )
            )
            continue
        values = {key: (record[i].strip() or None) for key, i in index}
        path = values.pop("path")
        if path is None:
            table.findings.append(
                _finding(IngestIssue.MALFORMED_ROW, f"empty {mapping['path']!r} value; row skipped", file, row)
            )
            continue
        if values.get("capture_date") is not None:
            raw = values["capture_date"]
            values["capture_date"] = parse_date(raw)
            if values["capture_date"] is None:
                table.findings.append(
                    _finding(
                        IngestIssue.BAD_DATE,
                        f"capture date {raw!r} is not a year-first date (YYYY-MM-DD); left empty",
                        file,
                        row,
                    )
                )
        for name in unmapped:
            values[name] = None
        table.rows.append(MetadataRow(row=row, path=path, values=values))
    return table


def join_paths(table: MetadataTable, root: str) -> tuple[dict[str, MetadataRow], list[Finding]]:
    """Resolve each row's path against ``root``; drop and report duplicates and outsiders.

    Relative paths are taken relative to ``root``; paths are normalised
    (``a/./b`` is ``a/b``) but symlinks are not resolved. A path that leaves
    ``root`` is an ``outside_root`` finding. A path listed again is a
    ``duplicate_path`` finding when its values repeat the first row, or a
    ``conflicting_metadata`` finding when they differ; the first row counts.

    Returns
    -------
    rows : dict
        Absolute normalised path -> :class:`MetadataRow`.
    findings : list of Finding

    Examples
    --------
    >>> t = read_metadata(b"path,label\\na.jpg,x\\n./a.jpg,x\\nsub/../a.jpg,y\\n../b.jpg,z\\n")
    >>> rows, found = join_paths(t, "/data/clinic")
    >>> list(rows), [(f.reason.value, f.row) for f in found]
    (['/data/clinic/a.jpg'], [('duplicate_path', 3), ('conflicting_metadata', 4), ('outside_root', 5)])
    """
    root = os.path.normpath(os.path.abspath(root))
    rows: dict[str, MetadataRow] = {}
    findings: list[Finding] = []
    prefix = root.rstrip(os.sep) + os.sep
    for r in table.rows:
        if _plain_relative(r.path):  # normpath(join(root, p)) would give the same
            path = prefix + r.path
        else:
            path = os.path.normpath(os.path.join(root, os.path.expanduser(r.path)))
        if not is_inside(path, root):
            findings.append(
                _finding(IngestIssue.OUTSIDE_ROOT, f"{r.path!r} is outside {root}; row skipped", table.file, r.row)
            )
            continue
        first = rows.get(path)
        if first is None:
            rows[path] = r
            continue
        differ = {k: (first.values[k], v) for k, v in r.values.items() if first.values[k] != v}
        if differ:
            what = "; ".join(f"{k} {a!r} vs {b!r}" for k, (a, b) in differ.items())
            findings.append(
                _finding(
                    IngestIssue.CONFLICTING_METADATA,
                    f"{r.path!r} already listed on row {first.row} with other values ({what}); "
                    f"row {first.row} kept",
                    table.file,
                    r.row,
                )
            )
        else:
            findings.append(
                _finding(
                    IngestIssue.DUPLICATE_PATH,
                    f"{r.path!r} already listed on row {first.row}; repeat ignored",
                    table.file,
                    r.row,
                )
            )
    return rows, findings


def _plain_relative(path: str) -> bool:
    """True for a relative path that normalising leaves as it is: no leading ``/`` or ``~``,
    no empty, ``.`` or ``..`` part (``"/."`` catches both), no trailing separator.

    >>> [_plain_relative(p) for p in ("a/b.jpg", "./a.jpg", "a/../b.jpg", "a//b.jpg", "/a.jpg", "~/a.jpg", "a/")]
    [True, False, False, False, False, False, False]
    """
    return (os.sep == "/" and not path.startswith(("/", "~")) and "/." not in "/" + path
            and "//" not in path and not path.endswith("/"))


def is_inside(path: str, root: str) -> bool:
    """True when normalised absolute ``path`` is ``root`` or lies below it (no symlink resolution).

    >>> is_inside("/a/b/c.jpg", "/a/b"), is_inside("/a/bc.jpg", "/a/b")
    (True, False)
    """
    return path == root or path.startswith(root.rstrip(os.sep) + os.sep)


_DATE_FORMATS = ("%Y-%m-%d", "%Y/%m/%d", "%Y.%m.%d", "%Y%m%d")
_DATE_PREFIX = re.compile(r"^(\d{4}[-/.]\d{1,2}[-/.]\d{1,2}|\d{8})(?:[T ]\d{1,2}:\d{2}(?::\d{2}(?:\.\d+)?)?)?$")


@functools.lru_cache(maxsize=1 << 16)  # capture dates repeat: one parse per distinct text
def parse_date(text: str) -> str | None:
    """An ISO date (``YYYY-MM-DD``) from a year-first date or date-time; None if not one.

    Day-first and month-first dates (``03/04/2021``) are ambiguous and are not guessed.

    >>> parse_date("2021/3/4"), parse_date("2021-03-04T10:22:01"), parse_date("03/04/2021")
    ('2021-03-04', '2021-03-04', None)
    """
    m = _DATE_PREFIX.match(text.strip())
    if not m:
        return None
    day = m.group(1)
    for fmt in _DATE_FORMATS:
        try:
            return datetime.strptime(day, fmt).date().isoformat()
        except ValueError:
            continue
    return None


def _map_columns(header: list[str], columns: dict[str, str], file: str) -> dict[str, str]:
    """Our field -> CSV column: the mapping given, plus same-name columns; refuse missing ones."""
    missing = [f"{name}={column}" for name, column in columns.items() if column not in header]
    if "path" not in columns and not {"path", FIELD_COLUMNS["path"]} & set(header):
        missing.append("path")
    if missing:
        _refuse(
            file,
            IngestIssue.MISSING_COLUMNS,
            f"missing column(s) {', '.join(missing)}; the header has {', '.join(map(repr, header))}",
            1,
        )
    mapping = dict(columns)
    for name, column in FIELD_COLUMNS.items():
        if name not in mapping:
            for candidate in (column, name):
                if candidate in header:
                    mapping[name] = candidate
                    break
    return mapping


def _finding(reason: IngestIssue, message: str, file: str, row: int | None) -> Finding:
    return Finding(CHECK, reason, message, file=file, row=row)


def _refuse(file: str, reason: IngestIssue, message: str, row: int | None):
    f = _finding(reason, message, file, row)
    raise CatalogError(f"{file}: {message}", findings=(tuple(f.as_dict()[c] for c in FINDING_COLUMNS),))

