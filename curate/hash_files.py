"""Hash image files: one reduced decode per file, in parallel, cached in a workspace.

Each file is read once: its bytes give the SHA-256 (the cache key) and are
decoded with Pillow. JPEGs are decoded at reduced size with ``Image.draft``
(libjpeg's DCT scaling, 1/2 to 1/8), so a 4000 x 3000 photograph is never
decoded at full size. The EXIF orientation is applied, the image is converted
to RGB and shrunk by a whole box factor (:func:`curate.hashing.shrink_for_hashing`),
and :func:`hashes_of_pictures` computes every hash from that one image, with the dark
surround of a dermoscope's round field of view filled (:mod:`curate.field_of_view`).

Work runs over local processes (``concurrent.futures``) by default, or on a
Dask cluster when a ``dask.distributed.Client`` (or a scheduler address) is
given; workers read files by path and send back plain tuples. One bad file
never stops a run: it becomes a finding (and, for a workspace, a row of the
``problems`` table with step ``"hash"``).
"""

from __future__ import annotations

import hashlib
import io
import os
import warnings
from dataclasses import dataclass, field
from typing import Iterable, Sequence

import numpy as np
import pandas as pd
from PIL import Image, UnidentifiedImageError

from curate.chunked_work import resolve_workers, run_chunks
from curate.errors import CurateError
from curate.field_of_view import fill_surround
from curate.hashing import DIHEDRAL_TRANSFORMS, THUMBNAIL_MIN_SIDE, hash_thumbnails, shrink_for_hashing
from curate.report import Finding, IngestIssue, Reason, Report

#: Bump when any hash changes for the same file; cached rows of other versions are recomputed.
HASH_VERSION = 4  # 2: the field-of-view surround filled before hashing; 3: its threshold from a sample;
#                  4: fine crop windows (69 windows, was 35)
#: Size asked of ``Image.draft``: the decode keeps both sides at least this long.
DRAFT_SIZE = THUMBNAIL_MIN_SIDE
#: Most files per task sent to a worker (fewer when there are few files per worker).
CHUNK_SIZE = 16

#: Columns of the hash frame, after ``sha256`` (and ``path`` for :func:`hash_files`).
CODE_COLUMNS = ["ahash", "dhash", "phash", "whash", "colorhash"] + [f"phash_t{k}" for k in range(8)]
HASH_FRAME_COLUMNS = ["sha256"] + CODE_COLUMNS + ["crop_hashes"]

#: Exif tag 0x0112 Orientation value -> Pillow transpose that shows the image upright
#: (Exif 2.32, CIPA DC-008, tag 274; the same table as ``PIL.ImageOps.exif_transpose``).
EXIF_ORIENTATION = {
    2: Image.Transpose.FLIP_LEFT_RIGHT,
    3: Image.Transpose.ROTATE_180,
    4: Image.Transpose.FLIP_TOP_BOTTOM,
    5: Image.Transpose.TRANSPOSE,
    6: Image.Transpose.ROTATE_270,
    7: Image.Transpose.TRANSVERSE,
    8: Image.Transpose.ROTATE_90,
}


class HashIssue(Reason):
    """Why a file could not be hashed, beyond the ingest reasons it shares."""

    CHANGED_SINCE_SCAN = "changed_since_scan"
    DECODE_FAILED = "decode_failed"


class HashError(CurateError):
    """One file could not be hashed. Small and picklable: a path, a reason code, a message."""

    def __init__(self, path: str, reason: str, detail: str = ""):
        super().__init__(f"{path}: {reason}: {detail}" if detail else f"{path}: {reason}")
        self.path, self.reason, self.detail = str(path), str(reason), str(detail)

    def __reduce__(self):
        return (type(self), (self.path, self.reason, self.detail))


# --- one file -------------------------------------------------------------------------


def _to_rgb(img: Image.Image) -> Image.Image:
    if img.mode == "RGB":
        return img
    if img.mode in ("I;16", "I;16B", "I;16L", "I", "F"):
        a = np.asarray(img, dtype=np.float64)
        top = a.max() if a.size and a.max() > 255 else 255.0
        return Image.fromarray(np.clip(a * (255.0 / top), 0, 255).astype(np.uint8)).convert("RGB")
    if img.mode == "P" and "transparency" in img.info:
        img = img.convert("RGBA")
    if img.mode in ("RGBA", "LA", "PA"):
        # composite over white so transparent pixels do not all read as black
        rgba = img.convert("RGBA")
        white = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
        return Image.alpha_composite(white, rgba).convert("RGB")
    return img.convert("RGB")


def decode_for_hashing(
    data: bytes | io.BufferedIOBase, *, path: str = "<bytes>", draft: bool = True
) -> Image.Image:
    """Decode an image file's bytes once, reduced, upright and in RGB, ready to hash.

    ``draft=False`` decodes JPEGs at full size first (only for measuring what
    the reduced decode changes; see benchmarks/bench_hash_quality.py).

    Raises
    ------
    HashError
        With an :class:`~curate.report.IngestIssue` code when the bytes are
        empty, not an image, truncated, or a decompression bomb.
    """
    if isinstance(data, (bytes, bytearray, memoryview)):
        if len(data) == 0:
            raise HashError(path, IngestIssue.ZERO_BYTE.value, "empty file")
        data = io.BytesIO(data)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            with Image.open(data) as img:
                # JPEG (and MPO): libjpeg DCT scaling; a no-op for other formats
                if draft:
                    img.draft("RGB", (DRAFT_SIZE, DRAFT_SIZE))
                orientation = img.getexif().get(0x0112, 1)
                img.load()
                out = shrink_for_hashing(_to_rgb(img))
    except (Image.DecompressionBombError, Image.DecompressionBombWarning) as exc:
        raise HashError(path, IngestIssue.DECOMPRESSION_BOMB.value, str(exc)[:200]) from None
    except UnidentifiedImageError:
        raise HashError(path, IngestIssue.NOT_AN_IMAGE.value, "Pillow cannot identify this file") from None
    except (OSError, SyntaxError, ValueError) as exc:
        text = str(exc)
        reason = IngestIssue.TRUNCATED if "truncat" in text.lower() else HashIssue.DECODE_FAILED
        raise HashError(path, reason.value, text[:200]) from None
    method = EXIF_ORIENTATION.get(orientation)
    return out.transpose(method) if method is not None else out


def hashes_of_pictures(pictures) -> list[dict]:
    """Every stored hash of decoded pictures, computed on the pictures with the dark surround
    of a dermoscope's field of view filled (:func:`curate.field_of_view.fill_surround`), so
    different lesions seen through a dermoscope do not hash alike. Pictures without a
    surround are hashed as they are."""
    return hash_thumbnails([fill_surround(p) for p in pictures])


def _read_and_decode(path: str, expected_sha256: str | None):
    """Read one file, check its digest, decode it reduced: ``(digest, thumbnail)``."""
    try:
        with open(path, "rb") as f:
            data = f.read()
    except FileNotFoundError:
        raise HashError(path, IngestIssue.PATH_NOT_FOUND.value, "file not found") from None
    except PermissionError:
        raise HashError(path, IngestIssue.PERMISSION_DENIED.value, "permission denied") from None
    except OSError as exc:
        raise HashError(path, HashIssue.DECODE_FAILED.value, str(exc)[:200]) from None
    digest = hashlib.sha256(data).hexdigest()
    if expected_sha256 is not None and digest != expected_sha256:
        raise HashError(
            path, HashIssue.CHANGED_SINCE_SCAN.value,
            f"content digest {digest[:12]}... differs from the catalog's {expected_sha256[:12]}...; re-scan",
        )
    return digest, decode_for_hashing(data, path=path)


def _ok_tuple(path: str, digest: str, thumb: Image.Image, h: dict) -> tuple:
    codes = tuple(int(h[c]) for c in CODE_COLUMNS)
    return ("ok", path, digest, codes, h["crop_hashes"].astype("<u8").tobytes(), thumb.size)


def _error_tuple(path: str, exc: Exception) -> tuple:
    if isinstance(exc, HashError):
        return ("error", exc.path, exc.reason, exc.detail)
    return ("error", path, HashIssue.DECODE_FAILED.value, f"{type(exc).__name__}: {exc}"[:200])


_CONTROLLER = None


def _one_blas_thread():
    """A context holding BLAS to one thread (the library scan is done once per process)."""
    global _CONTROLLER
    if _CONTROLLER is None:
        from threadpoolctl import ThreadpoolController

        _CONTROLLER = ThreadpoolController()
    return _CONTROLLER.limit(limits=1)


def hash_chunk(items: Sequence[tuple[str, str | None]]) -> list[tuple]:
    """Hash ``(path, expected_sha256 or None)`` items; what a worker runs.

    Returns one plain tuple per item and never raises for a bad file:
    ``("ok", path, sha256, codes, crop_bytes, (width, height))`` or
    ``("error", path, reason, detail)``. The decoded thumbnails are hashed
    together (:func:`curate.hashing.hash_thumbnails`). BLAS is held to one
    thread: the matrices are tiny and processes already use every core.
    """
    out: list = [None] * len(items)
    decoded = []
    for k, (path, expected) in enumerate(items):
        try:
            digest, thumb = _read_and_decode(path, expected)
            decoded.append((k, path, digest, thumb))
        except Exception as exc:  # noqa: BLE001 - any failure is this file's problem
            out[k] = _error_tuple(path, exc)
    with _one_blas_thread():
        try:
            hashes = hashes_of_pictures([d[3] for d in decoded])
        except Exception:  # noqa: BLE001 - hash one by one to find the file that breaks the batch
            hashes = None
        for j, (k, path, digest, thumb) in enumerate(decoded):
            try:
                h = hashes[j] if hashes is not None else hashes_of_pictures([thumb])[0]
                out[k] = _ok_tuple(path, digest, thumb, h)
            except Exception as exc:  # noqa: BLE001
                out[k] = _error_tuple(path, exc)
    return out


# --- running many files -----------------------------------------------------------------


def _open_client(client, scheduler: str | None):
    if client is not None and scheduler is not None:
        raise ValueError("pass either client or scheduler, not both")
    if scheduler is None:
        return client, False
    try:
        from dask.distributed import Client
    except ImportError as exc:  # pragma: no cover - depends on the environment
        from curate.errors import OptionalDependencyError

        raise OptionalDependencyError(
            "running on a Dask cluster needs dask.distributed: pip install 'curate[dask]'"
        ) from exc
    return Client(scheduler), True


def _finding(path: str, reason: str, detail: str) -> Finding:
    return Finding("hash", reason, detail, file=path)


def _ok_rows_to_frame(rows: list[tuple], *, with_path: bool) -> pd.DataFrame:
    """``("ok", path, sha256, codes, crop_bytes, size)`` tuples -> hash frame."""
    cols = (["path"] if with_path else []) + HASH_FRAME_COLUMNS
    if not rows:
        frame = pd.DataFrame({c: pd.Series(dtype=np.uint64) for c in cols})
        frame["sha256"] = frame["sha256"].astype(object)
        if with_path:
            frame["path"] = frame["path"].astype(object)
        frame["crop_hashes"] = frame["crop_hashes"].astype(object)
        return frame[cols]
    codes = np.array([r[3] for r in rows], dtype=np.uint64)
    data = {}
    if with_path:
        data["path"] = [r[1] for r in rows]
    data["sha256"] = [r[2] for r in rows]
    for k, c in enumerate(CODE_COLUMNS):
        data[c] = codes[:, k]
    data["crop_hashes"] = [np.frombuffer(r[4], dtype="<u8").astype(np.uint64) for r in rows]
    return pd.DataFrame(data, columns=cols)


def hash_files(
    paths: Iterable[str | os.PathLike],
    *,
    workspace=None,
    workers: int | None = None,
    client=None,
    scheduler: str | None = None,
    progress: bool = True,
) -> pd.DataFrame:
    """Hash image files without a catalog; one row per file that could be hashed.

    Parameters
    ----------
    paths : iterable of path-like
        Image files. Duplicates are hashed once.
    workspace : Workspace, optional
        Used as a cache: files whose SHA-256 already has hashes there are not
        decoded, and new hashes are stored in it.
    workers : int, optional
        Local processes; default ``os.cpu_count()``. 1 runs in this process.
    client : dask.distributed.Client, optional
        Run on this Dask cluster instead (workers read the files by path).
    scheduler : str, optional
        A Dask scheduler address to connect to (instead of ``client``).
    progress : bool
        Show a progress bar.

    Returns
    -------
    DataFrame
        Columns ``path``, ``sha256``, the uint64 codes ``ahash dhash phash
        whash colorhash phash_t0 .. phash_t7``, and ``crop_hashes`` (object:
        uint64 arrays), in the order of ``paths``. Files that failed are left
        out and listed in ``frame.attrs["report"]`` (a :class:`~curate.report.Report`).

    Examples
    --------
    >>> import tempfile, os
    >>> from PIL import Image
    >>> d = tempfile.mkdtemp()
    >>> Image.radial_gradient("L").save(os.path.join(d, "a.png"))
    >>> open(os.path.join(d, "b.png"), "w").close()
    >>> df = hash_files([os.path.join(d, n) for n in ("a.png", "b.png")], workers=1, progress=False)
    >>> len(df), df.attrs["report"].counts()
    (1, {'zero_byte': 1})
    """
    unique = list(dict.fromkeys(os.path.abspath(os.fspath(p)) for p in paths))
    workers = resolve_workers(workers)
    report = Report([])
    rows: list[tuple] = []
    cached_rows: list[tuple] = []
    todo = [(p, None) for p in unique]
    if workspace is not None:
        # digest first (cheap next to decoding) so cached files are not decoded
        todo, cached_rows = [], []
        known = _cached_digests(workspace)
        for p in unique:
            try:
                with open(p, "rb") as f:
                    digest = hashlib.file_digest(f, "sha256").hexdigest()
            except OSError:
                todo.append((p, None))  # the worker reports it
                continue
            if digest in known:
                cached_rows.append((p, digest))
            else:
                todo.append((p, digest))
    client, owned = _open_client(client, scheduler)
    try:
        for result in run_chunks(hash_chunk, todo, workers=workers, client=client, progress=progress,
                                 desc="hashing", chunk_size=CHUNK_SIZE):
            ok = [r for r in result if r[0] == "ok"]
            report.extend(_finding(*r[1:]) for r in result if r[0] == "error")
            if workspace is not None and ok:
                _store(workspace, ok)
            rows.extend(ok)
    finally:
        if owned:
            client.close()
    frame = _ok_rows_to_frame(rows, with_path=True)
    if cached_rows:
        cached = load_hashes(workspace, sha256=[d for _, d in cached_rows])
        paths_of = pd.DataFrame(cached_rows, columns=["path", "sha256"])
        frame = pd.concat([frame, paths_of.merge(cached, on="sha256")], ignore_index=True)
    order = {p: i for i, p in enumerate(unique)}
    frame = frame.sort_values("path", key=lambda s: s.map(order), kind="stable").reset_index(drop=True)
    frame.attrs["report"] = report
    return frame


# --- workspace cache --------------------------------------------------------------------


def _signed(codes) -> list[int]:
    return [int(v) for v in np.asarray(codes, dtype=np.uint64).view(np.int64)]


def _store(ws, ok_rows: list[tuple]) -> None:
    """Insert or replace hashes of ``("ok", path, sha256, codes, crop_bytes, size)`` rows."""
    from curate.store import utc_now

    now = utc_now()
    records = []
    for _, _, digest, codes, crop_bytes, (w, h) in ok_rows:
        signed = _signed(codes)
        dihedral = np.asarray(codes[5:13], dtype="<u8").tobytes()
        records.append((digest, *signed[:5], dihedral, crop_bytes, w, h, HASH_VERSION, now))
    with ws.transaction() as con:
        con.executemany(
            "INSERT OR REPLACE INTO hashes(sha256, ahash, dhash, phash, whash, colorhash, "
            "phash_dihedral, crop_hashes, thumb_width, thumb_height, hash_version, hashed_at) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            records,
        )


def _cached_digests(ws) -> set[str]:
    con = ws.connect()
    try:
        rows = con.execute("SELECT sha256 FROM hashes WHERE hash_version = ?", (HASH_VERSION,))
        return {r[0] for r in rows}
    finally:
        con.close()


def load_hashes(ws, *, sha256: Sequence[str] | None = None) -> pd.DataFrame:
    """The workspace's cached hashes as a hash frame, one row per SHA-256, sorted by it.

    Parameters
    ----------
    ws : Workspace
    sha256 : sequence of str, optional
        Only these digests.

    Returns
    -------
    DataFrame
        ``sha256``; uint64 ``ahash dhash phash whash colorhash phash_t0 ..
        phash_t7`` (``phash_t0 == phash``; transforms in
        :data:`curate.hashing.DIHEDRAL_TRANSFORMS` order); ``crop_hashes``
        (object column of uint64 arrays in :data:`curate.hashing.CROP_WINDOWS`
        order). Rows from another :data:`HASH_VERSION` are left out.

    Examples
    --------
    >>> import tempfile
    >>> from curate.store import Workspace
    >>> list(load_hashes(Workspace.create(tempfile.mkdtemp())).columns)[:3]
    ['sha256', 'ahash', 'dhash']
    """
    sql = (
        "SELECT sha256, ahash, dhash, phash, whash, colorhash, phash_dihedral, crop_hashes "
        "FROM hashes WHERE hash_version = ?"
    )
    params: list = [HASH_VERSION]
    con = ws.connect()
    try:
        if sha256 is None:
            raw = con.execute(sql + " ORDER BY sha256", params).fetchall()
        else:
            con.execute("CREATE TEMP TABLE wanted(sha256 TEXT PRIMARY KEY)")
            con.executemany("INSERT OR IGNORE INTO temp.wanted VALUES (?)", [(d,) for d in sha256])
            raw = con.execute(
                sql + " AND sha256 IN (SELECT sha256 FROM temp.wanted) ORDER BY sha256", params
            ).fetchall()
    finally:
        con.close()
    rows = []
    for digest, a, d, p, w, c, dihedral, crops in raw:
        t = np.frombuffer(dihedral, dtype="<u8")
        if len(t) != len(DIHEDRAL_TRANSFORMS):
            raise CurateError(f"hashes table row {digest}: phash_dihedral holds {len(t)} codes, not 8")
        codes = np.concatenate([np.array([a, d, p, w, c], dtype=np.int64).view(np.uint64), t])
        rows.append(("ok", None, digest, tuple(int(v) for v in codes), crops or b"", None))
    return _ok_rows_to_frame(rows, with_path=False)


@dataclass
class HashRun:
    """What :func:`hash_workspace` did: counts and the findings of files that failed."""

    to_hash: int = 0
    hashed: int = 0
    cached: int = 0
    failed: int = 0
    report: Report = field(default_factory=lambda: Report([]))


def hash_workspace(
    ws, *, workers: int | None = None, client=None, scheduler: str | None = None, progress: bool = True
) -> HashRun:
    """Hash every decodable catalog image whose SHA-256 has no cached hashes yet.

    Each digest is hashed once (from one of its paths), the file's content is
    checked against the catalog's digest, results are stored as each chunk
    finishes, and failures become ``problems`` rows with step ``"hash"``
    (earlier ``"hash"`` problems are replaced). Parallelism as in
    :func:`hash_files`.

    Returns
    -------
    HashRun
        ``to_hash`` digests needing work, ``hashed``, ``cached`` (already
        there), ``failed``, and the ``report``.

    Examples
    --------
    >>> import tempfile
    >>> from curate.store import Workspace
    >>> hash_workspace(Workspace.create(tempfile.mkdtemp()), progress=False).to_hash
    0
    """
    from curate.store import record_problems

    workers = resolve_workers(workers)
    con = ws.connect()
    try:
        todo = con.execute(
            "SELECT sha256, MIN(path) FROM images WHERE decodable = 1 AND present = 1 "
            "AND sha256 IS NOT NULL AND sha256 NOT IN "
            "(SELECT sha256 FROM hashes WHERE hash_version = ?) GROUP BY sha256 ORDER BY MIN(path)",
            (HASH_VERSION,),
        ).fetchall()
        cached = con.execute(
            "SELECT COUNT(DISTINCT i.sha256) FROM images i JOIN hashes h ON h.sha256 = i.sha256 "
            "WHERE i.decodable = 1 AND i.present = 1 AND h.hash_version = ?",
            (HASH_VERSION,),
        ).fetchone()[0]
    finally:
        con.close()
    run = HashRun(to_hash=len(todo), cached=int(cached))
    with ws.transaction() as tx:
        tx.execute("DELETE FROM problems WHERE step = 'hash'")
    client, owned = _open_client(client, scheduler)
    try:
        items = [(path, digest) for digest, path in todo]
        for result in run_chunks(hash_chunk, items, workers=workers, client=client, progress=progress,
                                 desc="hashing", chunk_size=CHUNK_SIZE):
            ok = [r for r in result if r[0] == "ok"]
            bad = [_finding(*r[1:]) for r in result if r[0] == "error"]
            if ok:
                _store(ws, ok)
            if bad:
                with ws.transaction() as tx:
                    record_problems(tx, "hash", bad)
            run.hashed += len(ok)
            run.failed += len(bad)
            run.report.extend(bad)
    finally:
        if owned:
            client.close()
    return run
