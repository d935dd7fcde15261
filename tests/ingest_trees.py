"""Small image trees for the ingest tests, drawn with Pillow at test time (no real patients)."""

from __future__ import annotations

import io
import os
from pathlib import Path

from PIL import Image, ImageDraw


def drawn_image(size=(48, 32), colour=(200, 150, 120), mode="RGB") -> Image.Image:
    """A skin-toned field with a dark blob, so every image differs by colour."""
    img = Image.new("RGB", size, colour)
    draw = ImageDraw.Draw(img)
    w, h = size
    draw.ellipse((w // 4, h // 4, 3 * w // 4, 3 * h // 4), fill=(90, 50, 40))
    return img.convert(mode)


def save(path: Path, img: Image.Image, fmt: str | None = None, **kwargs) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    img.save(path, fmt, **kwargs)
    return path


def jpeg_bytes(size=(64, 64), colour=(210, 160, 130)) -> bytes:
    b = io.BytesIO()
    drawn_image(size, colour).save(b, "JPEG", quality=90)
    return b.getvalue()


#: file (relative to the tree) -> (width, height, Pillow mode, Pillow format)
GOOD_FILES = {
    "clinic/a.jpg": (48, 32, "RGB", "JPEG"),
    "clinic/B.JPEG": (40, 30, "L", "JPEG"),
    "clinic/sub/c.png": (33, 21, "RGBA", "PNG"),
    "clinic/sub/d.tif": (20, 24, "RGB", "TIFF"),
    "clinic/e.bmp": (16, 12, "RGB", "BMP"),
    "clinic/f.webp": (30, 20, "RGB", "WEBP"),
    "clinic/sub/deeper/a_copy.jpg": (48, 32, "RGB", "JPEG"),  # byte copy of a.jpg
}


def make_good_tree(root: Path) -> Path:
    """A folder of good images in every supported format, one of them a byte copy."""
    for i, (rel, (w, h, mode, fmt)) in enumerate(GOOD_FILES.items()):
        if rel.endswith("a_copy.jpg"):
            continue
        save(root / rel, drawn_image((w, h), (200 - 10 * i, 150, 120), mode), fmt)
    (root / "clinic/sub/deeper").mkdir(parents=True, exist_ok=True)
    (root / "clinic/sub/deeper/a_copy.jpg").write_bytes((root / "clinic/a.jpg").read_bytes())
    (root / "clinic/notes.txt").write_text("not scanned: not an image name")
    return root / "clinic"


def make_bad_files(folder: Path) -> dict[str, str]:
    """One file per bad kind; returns file name -> expected IngestIssue value."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "empty.jpg").write_bytes(b"")
    data = jpeg_bytes()
    (folder / "cut.jpg").write_bytes(data[: len(data) // 2])
    png = io.BytesIO()
    drawn_image((40, 40)).save(png, "PNG")
    (folder / "cut.png").write_bytes(png.getvalue()[:-30])
    (folder / "letter.png").write_text("Dear colleague, this is not a picture.\n")
    os.symlink("self.jpg", folder / "self.jpg")  # a link pointing at itself
    os.symlink("nowhere.jpg", folder / "dangling.jpg")
    os.mkdir(folder / "loop")
    os.symlink("..", folder / "loop" / "up")  # folder link back to an ancestor
    return {
        "empty.jpg": "zero_byte",
        "cut.jpg": "truncated",
        "cut.png": "truncated",
        "letter.png": "not_an_image",
        "self.jpg": "symlink_loop",
        "dangling.jpg": "path_not_found",
        "up": "symlink_loop",
    }
