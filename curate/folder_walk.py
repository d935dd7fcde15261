"""Walk a folder tree for image files, reading directory entries only.

:func:`walk_images` follows symlinks to folders but never loops: it keeps the
``(st_dev, st_ino)`` of every folder on the current path, and a link back to
one of them is a ``symlink_loop`` finding. A folder reached a second time
through another link is skipped quietly (its files are listed once, under the
first path found). A symlink that points at itself, or into a cycle of links,
is a ``symlink_loop`` finding as well. A link whose target is missing is a
``path_not_found`` finding when its name looks like an image.

Per file it costs one ``stat`` (through :func:`os.scandir`); it never opens a file.
Entries come in sorted order, so two walks of one tree agree.
"""

from __future__ import annotations

import errno
import os
import stat
from dataclasses import dataclass
from typing import Iterator

from curate.file_probe import IMAGE_EXTENSIONS
from curate.report import Finding, IngestIssue

CHECK = "scan"


@dataclass(frozen=True)
class FileEntry:
    """An image file found by a walk: absolute path (symlinks kept), bytes, modification time."""

    path: str
    size: int
    mtime_ns: int


def walk_images(root, *, extensions=IMAGE_EXTENSIONS) -> Iterator[FileEntry | Finding]:
    """Yield a :class:`FileEntry` per image file under ``root`` and a Finding per problem met.

    Parameters
    ----------
    root : str or path
        The folder to walk. A missing root raises ``FileNotFoundError``, a
        file raises ``NotADirectoryError``.
    extensions : set of str
        Lower-case name endings to take, compared case-insensitively.

    Examples
    --------
    >>> import tempfile, os
    >>> d = tempfile.mkdtemp()
    >>> for name in ("b.JPG", "a.png", "notes.txt"):
    ...     open(os.path.join(d, name), "wb").close()
    >>> os.symlink(d, os.path.join(d, "again"))
    >>> [(type(x).__name__, os.path.basename(x.path if hasattr(x, "path") else x.file))
    ...  for x in walk_images(d)]
    [('FileEntry', 'a.png'), ('Finding', 'again'), ('FileEntry', 'b.JPG')]
    """
    root = os.path.abspath(os.fspath(root))
    top = os.stat(root)
    if not stat.S_ISDIR(top.st_mode):
        raise NotADirectoryError(f"{root} is not a folder")
    visited = {(top.st_dev, top.st_ino)}
    stack: list[tuple[str, frozenset]] = [(root, frozenset(visited))]
    while stack:
        folder, ancestors = stack.pop()
        try:
            with os.scandir(folder) as it:
                entries = sorted(it, key=lambda e: e.name)
        except OSError as exc:
            yield _os_finding(folder, exc, "cannot list the folder")
            continue
        subfolders = []
        for entry in entries:
            try:
                is_dir = entry.is_dir()  # follows symlinks; False for a link to nothing
            except OSError as exc:  # a link to itself or into a cycle of links (ELOOP)
                yield _os_finding(entry.path, exc, "cannot stat")
                continue
            if is_dir:
                try:
                    st = entry.stat()
                except OSError as exc:
                    yield _os_finding(entry.path, exc, "cannot stat the folder")
                    continue
                key = (st.st_dev, st.st_ino)
                if key in ancestors:
                    yield Finding(
                        CHECK,
                        IngestIssue.SYMLINK_LOOP,
                        f"links back to {os.path.realpath(entry.path)}, a folder above it; not followed",
                        file=entry.path,
                    )
                elif key not in visited:
                    visited.add(key)
                    subfolders.append((entry.path, ancestors | {key}))
                continue
            name = entry.name
            dot = name.rfind(".")
            wanted = dot > 0 and name[dot:].lower() in extensions
            if not wanted and not entry.is_symlink():
                continue
            try:
                st = entry.stat()
            except OSError as exc:
                if wanted or exc.errno == errno.ELOOP:
                    yield _os_finding(entry.path, exc, "cannot stat the file")
                continue
            if not wanted:
                continue
            if not stat.S_ISREG(st.st_mode):
                yield Finding(CHECK, IngestIssue.NOT_AN_IMAGE, "not a regular file", file=entry.path)
                continue
            yield FileEntry(entry.path, st.st_size, st.st_mtime_ns)
        stack.extend(reversed(subfolders))


def stat_entry(path: str) -> FileEntry | Finding:
    """A :class:`FileEntry` for one listed path, or the Finding saying why there is none."""
    try:
        st = os.stat(path)
    except OSError as exc:
        return _os_finding(path, exc, "cannot stat the file")
    if not stat.S_ISREG(st.st_mode):
        return Finding(CHECK, IngestIssue.NOT_AN_IMAGE, "not a regular file", file=path)
    return FileEntry(path, st.st_size, st.st_mtime_ns)


def _os_finding(path: str, exc: OSError, what: str) -> Finding:
    """Map an OS error to an ingest reason code."""
    if exc.errno == errno.ELOOP:
        reason, message = IngestIssue.SYMLINK_LOOP, "symlink points at itself or into a cycle of links"
    elif exc.errno == errno.ENOENT:
        reason, message = IngestIssue.PATH_NOT_FOUND, "does not exist (or is a link to nothing)"
    elif exc.errno in (errno.EACCES, errno.EPERM):
        reason, message = IngestIssue.PERMISSION_DENIED, f"{what}: permission denied"
    else:
        reason, message = IngestIssue.READ_ERROR, f"{what}: {exc.strerror or exc}"
    return Finding(CHECK, reason, message, file=path)
