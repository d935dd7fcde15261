"""The columns of a split table, whoever made it: ours, a hand-made one, a published one.

A split table has one row per image file and at least a path column and a
split column; patient, lesion and SHA-256 columns are optional. Other tools
spell these columns differently, so :func:`standard_columns` renames the
common spellings (or an explicit mapping) to ours and rejects tables it cannot
use, naming every bad row. Pure: no file I/O.
"""

from __future__ import annotations

from typing import Mapping

import pandas as pd

from curate.errors import ManifestError

#: our column -> spellings accepted without a mapping (compared case-insensitively)
COLUMN_ALIASES: dict[str, tuple[str, ...]] = {
    "path": ("path", "file", "filename", "file_name", "image", "image_path", "filepath"),
    "split": ("split", "fold", "subset", "partition", "set"),
    "patient_id": ("patient_id", "patient", "subject_id", "subject"),
    "lesion_id": ("lesion_id", "lesion"),
    "sha256": ("sha256", "digest", "sha_256"),
}
REQUIRED = ("path", "split")
#: the short field names the scan's column mappings use
FIELD_SHORT_NAMES = {"patient": "patient_id", "lesion": "lesion_id"}

#: identifier values that mean "not recorded" and never link two images
MISSING_ID_VALUES = frozenset({"", "nan", "none", "null", "na", "n/a"})


def standard_columns(
    table: pd.DataFrame, *, columns: Mapping[str, str] | None = None, source: str = "manifest"
) -> pd.DataFrame:
    """Return a copy of ``table`` with our column names and text values.

    Parameters
    ----------
    table : DataFrame
        One row per image; needs a path column and a split column.
    columns : mapping, optional
        Our field (``path``, ``split``, ``patient_id`` or ``patient``,
        ``lesion_id`` or ``lesion``, ``sha256``) -> the table's column name. Fields not given are found by the usual
        spellings in :data:`COLUMN_ALIASES`.
    source : str
        Name used in error messages (the manifest file).

    Returns
    -------
    DataFrame
        Columns ``path`` and ``split`` (str), and ``patient_id``, ``lesion_id``,
        ``sha256`` where the table had them (str or missing), followed by the
        table's other columns unchanged. Identifier values that mean "not
        recorded" (empty, ``NA`` ...) become missing.

    Raises
    ------
    ManifestError
        A required column is absent, or some rows have no path or no split;
        the message lists the 1-based data rows (line ``row + 1`` of a CSV).

    Examples
    --------
    >>> t = pd.DataFrame({"File": ["a.jpg", "b.jpg"], "fold": ["train", "test"],
    ...                   "patient": ["P1", ""]})
    >>> out = standard_columns(t)
    >>> list(out.columns)
    ['path', 'split', 'patient_id']
    >>> out["patient_id"].isna().tolist()
    [False, True]
    """
    if not isinstance(table, pd.DataFrame):
        raise TypeError(f"table must be a pandas DataFrame, got {type(table).__name__}")
    mapping = {FIELD_SHORT_NAMES.get(k, k): v for k, v in dict(columns or {}).items()}
    unknown = set(mapping) - set(COLUMN_ALIASES)
    if unknown:
        raise ValueError(
            f"columns: unknown field(s) {sorted(unknown)}; known: {sorted(COLUMN_ALIASES)}"
        )
    lower = {str(c).lower(): c for c in table.columns}
    rename: dict = {}
    for field, spellings in COLUMN_ALIASES.items():
        if field in mapping:
            if mapping[field] not in table.columns:
                raise ManifestError(
                    f"{source}: column {mapping[field]!r} (given for {field}) is not in the "
                    f"table; columns are {list(table.columns)}"
                )
            rename[mapping[field]] = field
            continue
        for spelling in spellings:
            if spelling in lower and lower[spelling] not in rename:
                rename[lower[spelling]] = field
                break
    missing = [f for f in REQUIRED if f not in rename.values()]
    if missing:
        raise ManifestError(
            f"{source}: no {' or '.join(missing)} column; need a path column and a split "
            f"column (columns are {list(table.columns)})"
        )
    ours = [c for c in table.columns if c in rename]
    rest = [c for c in table.columns if c not in rename and c not in COLUMN_ALIASES]
    out = table[ours + rest].rename(columns=rename).reset_index(drop=True)
    out = out[[f for f in COLUMN_ALIASES if f in out.columns] + rest]
    for field in ("path", "split", "patient_id", "lesion_id", "sha256"):
        if field in out.columns:
            out[field] = _text(out[field])
    for field in REQUIRED:
        bad = out.index[out[field].isna()]
        if len(bad):
            rows = ", ".join(str(i + 1) for i in bad[:10])
            more = f" and {len(bad) - 10} more" if len(bad) > 10 else ""
            raise ManifestError(f"{source}: no {field} in data row(s) {rows}{more}")
    if "sha256" in out.columns:
        out["sha256"] = out["sha256"].str.lower()
    return out


def _text(values: pd.Series) -> pd.Series:
    """Values as stripped strings; "not recorded" spellings become missing (None)."""
    as_text = values.astype("string").str.strip()
    blank = as_text.isna() | as_text.str.lower().isin(MISSING_ID_VALUES)
    return as_text.astype(object).where(~blank.astype(bool), None)
