"""Find identifying embedded metadata in image files, and write copies without it.

:func:`read_identifying_fields` lists the fields :mod:`curate.exif_fields`
considers identifying. :func:`write_clean_copy` writes a copy of a file with
its embedded metadata removed **without re-encoding the pixels**:

- JPEG: the file is copied segment by segment, leaving out APP1 (Exif and
  XMP), APP13 (IPTC/Photoshop) and COM segments (JPEG, ITU-T T.81 marker
  layout; Exif's APP1 signature ``Exif\\0\\0`` from Exif 2.3). The ICC colour
  profile (APP2) and JFIF/Adobe segments stay. When the original's Orientation
  tag is not 1, a minimal Exif segment holding only Orientation is written so
  the copy still displays upright.
- PNG: ancillary chunks ``eXIf``, ``tEXt``, ``zTXt``, ``iTXt`` and ``tIME`` are
  left out (PNG specification, ISO/IEC 15948); every other chunk is copied byte
  for byte.
- Other formats (TIFF, WebP, BMP) are reported as not cleaned: TIFF keeps its
  tags in the same structure as the pixels, and a lossless rewrite is not
  attempted here.

The user's files are never modified: copies go to a separate folder and an
existing file there is never overwritten.
"""

from __future__ import annotations

import os
import struct
import zlib
from pathlib import Path

import pandas as pd
from PIL import Image

from curate.exif_fields import (
    EXIF_IFD_POINTER,
    GPS_IFD_POINTER,
    ORIENTATION_TAG,
    identifying_fields,
)

_JPEG_DROP_APP1_PREFIXES = (b"Exif\x00\x00", b"http://ns.adobe.com/xap/1.0/\x00")
_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
_PNG_DROP = {b"eXIf", b"tEXt", b"zTXt", b"iTXt", b"tIME"}

FIELD_COLUMNS = ["path", "tag", "name", "finding", "value"]


def read_identifying_fields(path) -> list:
    """Identifying fields in one file's Exif metadata (empty for a file without any).

    Raises ``OSError`` (or Pillow's ``UnidentifiedImageError``) for a file Pillow cannot open.
    """
    with Image.open(path) as img:
        exif = img.getexif()
        return identifying_fields(
            dict(exif), dict(exif.get_ifd(EXIF_IFD_POINTER)), dict(exif.get_ifd(GPS_IFD_POINTER))
        )


def identifying_metadata(paths, *, progress: bool = False) -> pd.DataFrame:
    """One row per identifying field found in the given files.

    Files that cannot be opened are skipped here (a scan reports them); the
    columns are ``path, tag, name, finding, value``.
    """
    from tqdm.auto import tqdm

    rows = []
    for path in tqdm(list(paths), desc="embedded metadata", unit="file", disable=not progress):
        try:
            fields = read_identifying_fields(path)
        except (OSError, SyntaxError, ValueError):
            continue
        rows.extend((str(path), f.tag, f.name, f.finding.value, f.value) for f in fields)
    return pd.DataFrame(rows, columns=FIELD_COLUMNS)


def _orientation_segment(orientation: int) -> bytes:
    exif = Image.Exif()
    exif[ORIENTATION_TAG] = orientation
    payload = b"Exif\x00\x00" + exif.tobytes()
    return b"\xff\xe1" + struct.pack(">H", len(payload) + 2) + payload


def strip_jpeg(data: bytes, *, orientation: int | None = None) -> bytes:
    """JPEG bytes without Exif/XMP/IPTC/comment segments; pixels untouched.

    Examples
    --------
    >>> import io
    >>> from PIL import Image
    >>> buf = io.BytesIO()
    >>> ex = Image.Exif(); ex[0x010E] = "Jo Bloggs"
    >>> Image.new("RGB", (8, 8), "tan").save(buf, "JPEG", exif=ex)
    >>> clean = strip_jpeg(buf.getvalue())
    >>> dict(Image.open(io.BytesIO(clean)).getexif())
    {}
    """
    if data[:2] != b"\xff\xd8":
        raise ValueError("not a JPEG file (no start-of-image marker)")
    out = bytearray(b"\xff\xd8")
    extra = _orientation_segment(orientation) if orientation not in (None, 0, 1) else b""
    pos = 2
    while pos < len(data):
        if data[pos] != 0xFF:
            raise ValueError(f"damaged JPEG: expected a marker at byte {pos}")
        marker = data[pos + 1]
        if marker == 0xFF:  # fill byte
            pos += 1
            continue
        if marker == 0xD9 or 0xD0 <= marker <= 0xD7 or marker == 0x01:
            out += data[pos : pos + 2]
            pos += 2
            continue
        (length,) = struct.unpack(">H", data[pos + 2 : pos + 4])
        segment = data[pos : pos + 2 + length]
        body = segment[4:]
        drop = (
            (marker == 0xE1 and body.startswith(_JPEG_DROP_APP1_PREFIXES))
            or marker == 0xED
            or marker == 0xFE
        )
        if marker == 0xDA:  # start of scan: the rest is entropy-coded data and trailing markers
            out += extra
            extra = b""
            out += data[pos:]
            break
        if not drop:
            if extra and not (0xE0 <= marker <= 0xEF):  # after the APPn block, before tables
                out += extra
                extra = b""
            out += segment
        pos += 2 + length
    return bytes(out)


def strip_png(data: bytes, *, orientation: int | None = None) -> bytes:
    """PNG bytes without eXIf and text/time chunks; image data untouched."""
    if not data.startswith(_PNG_SIGNATURE):
        raise ValueError("not a PNG file (bad signature)")
    out = bytearray(_PNG_SIGNATURE)
    pos = len(_PNG_SIGNATURE)
    while pos + 8 <= len(data):
        (length,) = struct.unpack(">I", data[pos : pos + 4])
        kind = data[pos + 4 : pos + 8]
        chunk = data[pos : pos + 12 + length]
        if kind == b"IDAT" and orientation not in (None, 0, 1):
            exif = Image.Exif()
            exif[ORIENTATION_TAG] = orientation
            payload = exif.tobytes()
            out += struct.pack(">I", len(payload)) + b"eXIf" + payload
            out += struct.pack(">I", zlib.crc32(b"eXIf" + payload) & 0xFFFFFFFF)
            orientation = None
        if kind not in _PNG_DROP:
            out += chunk
        pos += 12 + length
    return bytes(out)


def write_clean_copy(source, target) -> str:
    """Write ``target`` as ``source`` without identifying embedded metadata.

    Returns ``"cleaned"``, or ``"unsupported"`` (nothing written) for formats
    other than JPEG and PNG. Raises ``FileExistsError`` rather than overwrite.
    """
    source, target = Path(source), Path(target)
    with Image.open(source) as img:
        fmt = img.format
        orientation = img.getexif().get(ORIENTATION_TAG)
    if fmt not in ("JPEG", "PNG"):
        return "unsupported"
    data = source.read_bytes()
    clean = strip_jpeg(data, orientation=orientation) if fmt == "JPEG" else strip_png(data, orientation=orientation)
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.part")
    tmp.write_bytes(clean)
    try:
        os.link(tmp, target)  # fails if target exists: never overwrite
    finally:
        tmp.unlink()
    return "cleaned"


def write_clean_copies(catalog: pd.DataFrame, out_dir, *, progress: bool = False) -> pd.DataFrame:
    """Write metadata-free copies of catalog images under ``out_dir/<source>/<path below root>``.

    ``catalog`` needs ``path``, ``root`` and ``source`` columns (as
    :meth:`curate.store.Workspace.catalog` returns). Returns one row per image:
    ``path, copy, status`` with status ``cleaned``, ``unsupported``, ``exists``
    (a copy is already there; not overwritten) or ``unreadable``.
    """
    from tqdm.auto import tqdm

    out_dir = Path(out_dir)
    rows = []
    records = catalog[["path", "root", "source"]].itertuples(index=False)
    for path, root, source in tqdm(list(records), desc="clean copies", unit="file", disable=not progress):
        try:
            relative = Path(path).relative_to(root)
        except ValueError:
            relative = Path(Path(path).name)
        target = out_dir / str(source) / relative
        try:
            status = write_clean_copy(path, target)
        except FileExistsError:
            status = "exists"
        except (OSError, SyntaxError, ValueError):
            status = "unreadable"
        rows.append((path, str(target) if status in ("cleaned", "exists") else None, status))
    return pd.DataFrame(rows, columns=["path", "copy", "status"])
