"""Freeze a workspace's split as a manifest a training team can verify.

:func:`freeze_split` takes the workspace's catalog and its ``splits``,
``groups``, ``image_nodes`` and ``skin_tone`` tables, re-digests every image,
refuses a split that leaks (per :func:`curate.leakage.find_leaks` on the
workspace's own data), leaves out files that do not decode as images (listed
as excluded in the sidecar), and writes ``WS/manifests/NAME.csv``, ``NAME.parquet``
and the sidecar ``NAME.manifest.json`` atomically, recording the manifest in
the ``manifests`` table. Rows are sorted by path, relative to a declared root.

Only catalog columns go into a manifest: no EXIF or other file metadata is
ever read or copied, and with ``pseudonymise=True`` patient, lesion and group
ids are replaced by salted pseudonyms (:mod:`curate.pseudonyms`). File names
are kept as they are; rename files whose names carry personal data before
freezing.
"""

from __future__ import annotations

import json
import os
import sys
from dataclasses import dataclass
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

import pandas as pd

from curate.errors import LeakageError, ManifestError
from curate.file_probe import IMAGE_EXTENSIONS
from curate.folder_walk import FileEntry, walk_images
from curate.leakage import LeakageReport, find_leaks
from curate.manifest import MANIFEST_COLUMNS, Manifest
from curate.manifest_io import digest_files, manifest_files, write_manifest
from curate.pseudonyms import pseudonymise as pseudonymise_ids
from curate.store import Workspace, utc_now

MANIFEST_FOLDER = "manifests"
#: packages whose versions a manifest records
RECORDED_PACKAGES = ("curate", "numpy", "pandas", "pillow", "imagehash", "scipy", "scikit-learn", "pyarrow")
#: pair verdicts of the near-duplicate engine that count as the same image for leakage
LEAK_VERDICTS = ("exact", "near")


@dataclass
class FrozenManifest:
    """What :func:`freeze_split` made: the manifest, its files and the leakage check."""

    manifest: Manifest
    files: dict
    leakage: LeakageReport

    def summary(self) -> str:
        m = self.manifest
        splits = ", ".join(f"{k} {v}" for k, v in m.split_counts.items())
        lines = [
            f"manifest {m.name!r}: {len(m.table)} images ({splits}); fingerprint {m.fingerprint[:16]}",
            f"written: {', '.join(str(p) for p in self.files.values())}",
        ]
        if m.excluded:
            reasons = pd.Series([e["reason"] for e in m.excluded]).value_counts()
            lines.append("left out, listed as excluded in the sidecar: "
                         + ", ".join(f"{n} {reason}" for reason, n in reasons.items()))
        if not self.leakage.ok:
            lines.append("WARNING: frozen despite leakage (--allow-leaks):\n" + self.leakage.summary())
        return "\n".join(lines)


def package_versions() -> dict[str, str]:
    """Installed versions of :data:`RECORDED_PACKAGES` and of Python."""
    out = {"python": sys.version.split()[0]}
    for name in RECORDED_PACKAGES:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = "not installed"
    return out


def manifest_name_taken(ws: Workspace, name: str) -> bool:
    """True when a manifest of that name was frozen in the workspace (recorded in table
    ``manifests``) or any of its files exists; such a name is never written again."""
    folder = ws.path / MANIFEST_FOLDER
    if any(p.exists() for p in manifest_files(folder, name).values()):
        return True
    return len(ws.read_sql("SELECT name FROM manifests WHERE name = ?", (name,))) > 0


def workspace_split_table(ws: Workspace, *, everything: bool = False) -> pd.DataFrame:
    """The images a manifest of the workspace lists, with split, group, node and skin-tone bin.

    Those are the catalog images that have a split and decode as images (a
    file Pillow cannot decode is no training data; it is listed as excluded
    instead). With ``everything=True`` every present catalog image comes back,
    ``split`` missing where there is none.

    Raises :class:`~curate.errors.ManifestError` when the workspace has no
    split, or when split images are no longer in the catalog.
    """
    splits = ws.read_sql("SELECT image_id, split FROM splits")
    if splits.empty:
        raise ManifestError(f"{ws.path}: no split to freeze; run `curate split` first")
    catalog = ws.catalog()
    gone = sorted(set(splits["image_id"]) - set(catalog["image_id"]))
    if gone:
        raise ManifestError(
            f"{ws.path}: {len(gone)} split image(s) are no longer in the catalog (image_id "
            f"{', '.join(map(str, gone[:10]))}); re-run `curate groups` and `curate split`"
        )
    table = catalog.merge(splits, on="image_id", how="left")
    table = table.merge(ws.read_sql("SELECT image_id, group_id FROM groups"), on="image_id", how="left")
    nodes = ws.read_sql("SELECT image_id, node, training_class FROM image_nodes")
    table = table.merge(nodes, on="image_id", how="left")
    tone = ws.read_sql("SELECT sha256, ita_bin AS skin_tone_bin FROM skin_tone")
    table = table.merge(tone, on="sha256", how="left")
    if everything:
        return table
    keep = table["split"].notna() & (table["decodable"] == 1)
    return table[keep].reset_index(drop=True)


def workspace_pairs(ws: Workspace, table: pd.DataFrame) -> pd.DataFrame:
    """Near-duplicate pairs of the workspace as paths, minus pairs a reviewer kept apart."""
    verdicts = ",".join("?" * len(LEAK_VERDICTS))
    pairs = ws.read_sql(
        f"SELECT image_a, image_b, d_phash AS distance, orientation, crop, score, verdict "
        f"FROM pairs WHERE verdict IN ({verdicts})",
        LEAK_VERDICTS,
    )
    decisions = ws.read_sql(
        "SELECT image_a, image_b, decision FROM decisions WHERE undone = 0 "
        "ORDER BY decided_at, decision_id"
    )
    latest = decisions.drop_duplicates(["image_a", "image_b"], keep="last")
    apart = latest[latest["decision"] == "different_lesions"]
    if len(apart):
        key = set(zip(apart["image_a"], apart["image_b"]))
        pairs = pairs[[k not in key for k in zip(pairs["image_a"], pairs["image_b"])]]
    path = table.set_index("image_id")["path"]
    return pairs.assign(path_a=pairs["image_a"].map(path), path_b=pairs["image_b"].map(path)).dropna(
        subset=["path_a", "path_b"]
    )


def freeze_split(
    ws: Workspace,
    name: str,
    *,
    root: str | os.PathLike | None = None,
    pseudonymise: bool = False,
    salt: str | bytes | None = None,
    allow_leaks: bool = False,
    command: str | None = None,
    progress: bool = True,
) -> FrozenManifest:
    """Freeze the workspace's split as manifest ``name``.

    Parameters
    ----------
    ws : Workspace
    name : str
        File stem of the manifest (``manifests/NAME.csv`` ...); never reused.
    root : str or path, optional
        Declared root: manifest paths are relative to it (``/``-separated).
        Default: the deepest folder holding every split image.
    pseudonymise : bool
        Replace patient, lesion and group ids by HMAC-SHA256 pseudonyms under ``salt``.
    salt : str or bytes, optional
        The secret the pseudonyms are keyed with (at least 16 bytes); the user
        keeps it, it is never written anywhere.
    allow_leaks : bool
        Freeze even when the split leaks (the sidecar then records the leaks);
        by default a leaking split raises :class:`~curate.errors.LeakageError`.
    command : str, optional
        The command line recorded in the sidecar (secrets already removed).
    progress : bool
        Show a progress bar while re-digesting.

    Returns
    -------
    FrozenManifest

    Raises
    ------
    ManifestError
        No split, a name already used, a file changed since the scan, a path
        outside ``root``, or ``pseudonymise`` without a salt.
    LeakageError
        The split leaks and ``allow_leaks`` is False.

    Notes
    -----
    Patient and lesion ids are compared within each source (the grouping's
    default), placeholder ids link nothing, and near-duplicate pairs with an
    ``exact`` or ``near`` verdict count unless a reviewer decided the two
    images show different lesions. The sidecar records these choices, and
    ``curate check`` on the manifest reads them from there.
    """
    if pseudonymise and salt is None:
        raise ManifestError("pseudonymise needs a salt (a secret of at least 16 bytes you keep)")
    if not pseudonymise and salt is not None:
        raise ValueError("a salt was given without pseudonymise=True; it would do nothing")
    folder = ws.path / MANIFEST_FOLDER
    Manifest(pd.DataFrame(columns=["path", "sha256", "split"]), name=name)  # checks the name
    if manifest_name_taken(ws, name):
        raise ManifestError(f"manifest {name!r} already exists in {folder}; choose another name")

    everything = workspace_split_table(ws, everything=True)
    table = workspace_split_table(ws)
    _check_digests(table, progress=progress)
    base = Path(root).absolute() if root is not None else _common_folder(table["path"])
    rel = _relative_paths(table["path"], base)

    scopes = {"patient_scope": "source", "lesion_scope": "source"}
    leakage = find_leaks(table, pairs=workspace_pairs(ws, table), source=str(ws.path), **scopes)
    if not leakage.ok and not allow_leaks:
        raise LeakageError(
            "refusing to freeze a split that leaks (pass allow_leaks / --allow-leaks to freeze "
            "it anyway):\n" + leakage.summary()
        )

    out = table.assign(path=rel)
    if pseudonymise:
        for column in ("patient_id", "lesion_id", "group_id"):
            out[column] = pseudonymise_ids(out[column], salt)
    out = out[[c for c in MANIFEST_COLUMNS if c in out.columns]]
    parameters = json.loads(ws.get_meta("split_parameters", "{}") or "{}")
    manifest = Manifest(
        out,
        name=name,
        root=str(base),
        parameters=parameters,
        versions=package_versions(),
        created_at=utc_now(),
        command=command or f"curate.freeze_split(Workspace({str(ws.path)!r}), {name!r})",
        pseudonymised=pseudonymise,
        excluded=_excluded(everything, base, set(rel)),
        leak_check=dict(scopes, known_leaks=leakage.counts()),
    )
    files = write_manifest(manifest, folder)
    try:
        with ws.transaction() as con:
            con.execute(
                "INSERT INTO manifests(name, path, fingerprint, created_at, parameters) VALUES (?, ?, ?, ?, ?)",
                (name, str(files["sidecar"]), manifest.fingerprint, manifest.created_at,
                 json.dumps(parameters, sort_keys=True)),
            )
    except BaseException:
        for p in files.values():
            p.unlink(missing_ok=True)
        raise
    return FrozenManifest(manifest=manifest, files=files, leakage=leakage)


def _check_digests(table: pd.DataFrame, *, progress: bool) -> None:
    """Refuse when a file is gone or its bytes changed since the scan."""
    now = digest_files(table["path"], progress=progress)
    bad = now["sha256"].to_numpy() != table["sha256"].to_numpy()
    if bad.any():
        first = table.loc[bad, "path"].head(5).tolist()
        raise ManifestError(
            f"{int(bad.sum())} split image(s) are missing or changed since the scan "
            f"({', '.join(first)}{' ...' if bad.sum() > 5 else ''}); re-run `curate scan`, "
            "`curate groups` and `curate split` before freezing"
        )


def _common_folder(paths: pd.Series) -> Path:
    return Path(os.path.commonpath([os.path.dirname(p) for p in paths]))


def _relative_paths(paths: pd.Series, base: Path) -> list[str]:
    rel = []
    for p in paths:
        r = os.path.relpath(p, base)
        if r.startswith(".."):
            raise ManifestError(f"{p} is outside the declared root {base}")
        rel.append(Path(r).as_posix())
    return rel


def _excluded(everything: pd.DataFrame, base: Path, listed: set[str]) -> list[dict]:
    """Image files under ``base`` left out of the manifest, with the reason."""
    known = {}
    for row in everything.itertuples(index=False):
        r = os.path.relpath(row.path, base)
        if not r.startswith(".."):
            reason = "not decodable as an image" if not row.decodable else "no split"
            known[Path(r).as_posix()] = reason
    out = []
    for entry in walk_images(base, extensions=IMAGE_EXTENSIONS):
        if not isinstance(entry, FileEntry):
            continue
        r = Path(os.path.relpath(entry.path, base)).as_posix()
        if r not in listed:
            out.append({"path": r, "reason": known.get(r, "not in the catalog")})
    return out
