"""Crop check results cached in a workspace (table ``crop_checks``), keyed by the two files' SHA-256.

The crop check (:mod:`curate.crop_check`) looks at pixels only, so its answer for two
files depends on their contents alone. The pairs step, the leakage check and a
training script's repeated checks of the same manifest ask about many of the same
pairs; each pair is checked once per :data:`curate.crop_files.CHECK_VERSION` and
read back after that.

A row holds the pair in digest order (``sha_a < sha_b``); the orientation stored is
the code turning the picture of ``sha_b`` onto the one of ``sha_a``. Asked the other
way round, the inverse code is returned.
"""

from __future__ import annotations

from typing import Iterable

from curate.hashing import INVERSE_ORIENTATION

__all__ = ["cached_checks", "store_checks"]

_COLUMNS = ("confirmed", "ncc", "scale", "orientation", "agreeing")


def _other_way_round(evidence: tuple) -> tuple:
    """The evidence of pair (a, b) as seen from (b, a): the inverse turn."""
    confirmed, ncc, scale, orientation, agreeing = evidence
    return confirmed, ncc, scale, INVERSE_ORIENTATION[int(orientation)], agreeing


def cached_checks(ws, keys: Iterable[tuple[str, str]], version: int) -> dict:
    """``(sha_a, sha_b) -> evidence`` for the asked pairs checked before at ``version``.

    Evidence is ``(confirmed, ncc, scale, orientation, agreeing)`` as
    :func:`curate.crop_files.check_chunk` returns it, oriented as asked (the code
    turning the picture of ``sha_b`` onto the one of ``sha_a``).
    """
    keys = list(dict.fromkeys(keys))
    if not keys:
        return {}
    con = ws.connect()
    try:
        con.execute("CREATE TEMP TABLE asked_checks(sha_a TEXT, sha_b TEXT)")
        con.executemany("INSERT INTO asked_checks VALUES (?, ?)", ((min(a, b), max(a, b)) for a, b in keys))
        rows = con.execute(
            f"SELECT c.sha_a, c.sha_b, {', '.join('c.' + c for c in _COLUMNS)} FROM crop_checks c "
            "JOIN asked_checks q ON c.sha_a = q.sha_a AND c.sha_b = q.sha_b WHERE c.check_version = ?",
            (int(version),),
        ).fetchall()
    finally:
        con.close()  # the temporary table goes with the connection
    found = {(a, b): (bool(conf), ncc, scale, int(orientation), agreeing)
             for a, b, conf, ncc, scale, orientation, agreeing in rows}
    out = {}
    for a, b in keys:
        if a <= b and (a, b) in found:
            out[a, b] = found[a, b]
        elif a > b and (b, a) in found:
            out[a, b] = _other_way_round(found[b, a])
    return out


def store_checks(ws, results: Iterable[tuple[str, str, tuple]], version: int) -> None:
    """Keep ``(sha_a, sha_b, evidence)`` results of the crop check at ``version`` (one transaction)."""
    rows = []
    for sha_a, sha_b, evidence in results:
        if sha_a > sha_b:
            sha_a, sha_b, evidence = sha_b, sha_a, _other_way_round(evidence)
        confirmed, ncc, scale, orientation, agreeing = evidence
        rows.append((sha_a, sha_b, int(version), int(bool(confirmed)), float(ncc), float(scale), int(orientation),
                     int(agreeing)))
    if not rows:
        return
    with ws.transaction() as con:
        con.executemany(
            f"INSERT OR REPLACE INTO crop_checks(sha_a, sha_b, check_version, {', '.join(_COLUMNS)}) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            rows,
        )
