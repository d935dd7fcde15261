"""Facts about one image file: its SHA-256 digest and what Pillow says about its pixels.

:func:`probe_file` never raises for a bad file: a zero-byte, truncated, corrupt,
unreadable or oversized file comes back as facts with ``issue`` set to an
:class:`~curate.report.IngestIssue` code and a message, so a scan goes on.

How much is decoded (the least that still finds a broken file):

- JPEG is decoded at reduced size (Pillow's ``draft``, DCT scaling down to
  about 1/8), which still reads every entropy-coded byte and so finds a
  truncated file, at a fraction of a full decode's cost.
- PNG is checked with ``verify`` (every chunk read and its CRC checked)
  without inflating the pixels.
- TIFF, BMP and WebP are decoded fully (Pillow's ``verify`` checks nothing for them).
- An image above Pillow's decompression-bomb limit (``PIL.Image.MAX_IMAGE_PIXELS``)
  is not decoded at all: both Pillow's warning (above the limit) and its error
  (above twice the limit) become a ``decompression_bomb`` issue, with width
  and height kept when the header gave them.

Width and height are the stored pixel size; an EXIF orientation tag is not applied.
"""

from __future__ import annotations

import contextlib
import hashlib
import warnings
from dataclasses import dataclass

from PIL import Image, UnidentifiedImageError

from curate.report import IngestIssue

CHUNK_SIZE = 1 << 20

#: SHA-256 of zero bytes (FIPS 180-4): every empty file has it, so it never marks a copy.
EMPTY_SHA256 = hashlib.sha256(b"").hexdigest()


def copy_digests(digests):
    """Digests that can join copies, as a pandas Series like ``digests``: missing, blank and
    the empty file's digest become missing (empty files are not copies of one another).

    >>> import pandas as pd
    >>> copy_digests(pd.Series(["ab", "", None, EMPTY_SHA256])).tolist()
    ['ab', nan, nan, nan]
    """
    text = digests.astype("string")
    return digests.where((text.str.len() > 0).fillna(False) & (text != EMPTY_SHA256).fillna(False))

#: file name endings (lower case) taken as images when walking a folder
IMAGE_EXTENSIONS = frozenset(
    {".jpg", ".jpeg", ".jpe", ".jfif", ".png", ".tif", ".tiff", ".bmp", ".dib", ".webp"}
)


@dataclass(frozen=True)
class FileFacts:
    """What a scan records about one file's content (size and times come from the walk)."""

    sha256: str | None = None
    width: int | None = None
    height: int | None = None
    mode: str | None = None
    format: str | None = None
    decodable: bool = False
    issue: IngestIssue | None = None
    message: str = ""


def file_sha256(path, *, chunk_size: int = CHUNK_SIZE) -> str:
    """Hex SHA-256 digest of a file's bytes, read in chunks (memory stays flat for any size).

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.NamedTemporaryFile(delete=False) as f:
    ...     _ = f.write(b"abc")
    >>> file_sha256(f.name)[:16]
    'ba7816bf8f01cfea'
    >>> os.remove(f.name)
    """
    if chunk_size < 1:
        raise ValueError(f"chunk_size must be a positive number of bytes, got {chunk_size!r}")
    digest = hashlib.sha256()
    with open(path, "rb", buffering=0) as f:
        buffer = bytearray(chunk_size)
        view = memoryview(buffer)
        while n := f.readinto(buffer):
            digest.update(view[:n])
    return digest.hexdigest()


def image_facts(path) -> FileFacts:
    """Pillow's reading of an image file: size, mode, format, and whether it decodes.

    Examples
    --------
    >>> import tempfile, os
    >>> from PIL import Image
    >>> p = os.path.join(tempfile.mkdtemp(), "a.png")
    >>> Image.new("RGB", (7, 5)).save(p)
    >>> f = image_facts(p)
    >>> (f.width, f.height, f.mode, f.format, f.decodable, f.issue)
    (7, 5, 'RGB', 'PNG', True, None)
    """
    try:
        img = Image.open(path)
    except Image.DecompressionBombError as exc:
        return _bomb(str(exc))
    except UnidentifiedImageError:
        return FileFacts(issue=IngestIssue.NOT_AN_IMAGE, message="Pillow does not recognise it as an image")
    except PermissionError as exc:
        return FileFacts(issue=IngestIssue.PERMISSION_DENIED, message=str(exc))
    except (OSError, SyntaxError, ValueError) as exc:
        return FileFacts(issue=IngestIssue.TRUNCATED, message=f"corrupt image header: {exc}")
    limit = Image.MAX_IMAGE_PIXELS
    if limit is not None and img.width * img.height > limit:
        # the same test as Pillow's DecompressionBombWarning, made here so it does not
        # depend on the process-wide warning filters (not thread-safe)
        with img:
            return _bomb(
                f"{img.width} x {img.height} = {img.width * img.height} pixels",
                width=img.width, height=img.height, mode=img.mode, format=img.format,
            )
    with img:
        facts = dict(width=img.width, height=img.height, mode=img.mode, format=img.format)
        try:
            _check_pixels(img)
        except PermissionError as exc:
            return FileFacts(**facts, issue=IngestIssue.PERMISSION_DENIED, message=str(exc))
        except (OSError, SyntaxError, ValueError, EOFError) as exc:
            return FileFacts(
                **facts, issue=IngestIssue.TRUNCATED, message=f"truncated or corrupt {img.format}: {exc}"
            )
        except Image.DecompressionBombError as exc:  # a frame larger than the header said
            return FileFacts(**facts, issue=IngestIssue.DECOMPRESSION_BOMB, message=str(exc))
    return FileFacts(**facts, decodable=True)


def probe_file(path, size: int) -> FileFacts:
    """Digest plus image facts of one file; a bad file gives facts with ``issue`` set.

    ``size`` is the byte count from the folder walk: zero is reported at once
    (``zero_byte``) without opening the file.
    """
    if size == 0:
        return FileFacts(
            sha256=hashlib.sha256(b"").hexdigest(), issue=IngestIssue.ZERO_BYTE, message="empty file (0 bytes)"
        )
    try:
        sha = file_sha256(path)
    except PermissionError as exc:
        return FileFacts(issue=IngestIssue.PERMISSION_DENIED, message=f"cannot read: {exc.strerror}")
    except OSError as exc:
        return FileFacts(issue=IngestIssue.READ_ERROR, message=f"cannot read: {exc}")
    facts = image_facts(path)
    return FileFacts(**{**facts.__dict__, "sha256": sha})


@contextlib.contextmanager
def bomb_warnings_silenced():
    """Silence Pillow's DecompressionBombWarning (probe_file reports those images itself).

    Changes the process-wide warning filters: enter it once, in the main
    thread, around a whole batch of probes.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)
        yield


def _check_pixels(img: Image.Image) -> None:
    if img.format == "JPEG":
        img.draft(img.mode, (max(1, img.width // 8), max(1, img.height // 8)))
        img.load()
    elif img.format == "PNG":
        img.verify()
    else:
        img.load()


def _bomb(message: str, **header) -> FileFacts:
    """Facts for an image over the pixel limit, keeping the header's size when known."""
    return FileFacts(
        **header,
        issue=IngestIssue.DECOMPRESSION_BOMB,
        message=f"over Pillow's decompression-bomb limit of {Image.MAX_IMAGE_PIXELS} pixels; "
        f"not decoded ({message})",
    )
