"""Review thumbnails: made once per file content and size, then read from a cache.

A thumbnail is the image turned upright by its EXIF Orientation tag (as
hashing does) and shrunk to fit a ``size`` x ``size`` box (aspect kept),
in RGB, saved as JPEG under ``WORKSPACE/thumbnails/<aa>/<sha256>_<size>.jpg``
(``aa`` = the first two hex digits). The key is the file's SHA-256, so a file
that is copied, renamed or found in two sources is shrunk once, and a changed
file gets a new thumbnail. Files are written to a temporary name and renamed
into place, so a crash never leaves half a thumbnail behind.

The pure helpers here (:func:`orient`, :func:`fit_square`,
:func:`difference_image`, :func:`overlay_image`) work on in-memory images and
build what the review view shows: both images of a pair at the same display
size, the second one turned by the pair's best ``orientation`` (one of the 8
rotations/flips, numbered as :data:`curate.hashing.DIHEDRAL_TRANSFORMS`), and an
optional difference or overlay of the two.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import os
import tempfile
from collections import OrderedDict
from pathlib import Path
from typing import Iterable

import numpy as np
from PIL import Image, ImageDraw, ImageOps

from curate.hashing import INVERSE_ORIENTATION, PIL_TRANSPOSE

THUMBNAIL_DIR = "thumbnails"

#: Background of the padding around a thumbnail that is not square (dark grey).
PAD_COLOUR = (40, 40, 40)

#: What :func:`pair_pictures` can add beside the two images.
VIEW_MODES = ("side_by_side", "difference", "overlay")

#: How a picture of image b is described once turned by the pair's ``orientation`` code.
ORIENTATION_NAMES = (
    "as is",
    "turned 90° anticlockwise",
    "turned 180°",
    "turned 270° anticlockwise",
    "mirrored left-right",
    "mirrored top-bottom",
    "transposed",
    "transversed",
)


def best_orientation(a: Image.Image, b: Image.Image, orientation: int | None) -> int:
    """The code that turns ``b`` onto ``a``: ``orientation``, or its inverse if that fits better.

    The pairs table gives the transform that lines the two images up; for a
    quarter turn (codes 1 and 3) the direction matters, so both directions are
    tried on small greyscale copies and the one closer to ``a`` is returned.
    Every other code is its own inverse and is returned as it is.

    Examples
    --------
    >>> from PIL import Image, ImageDraw
    >>> a = Image.new("L", (40, 40)); ImageDraw.Draw(a).rectangle((0, 0, 10, 20), fill=255)
    >>> b = a.transpose(Image.Transpose.ROTATE_90)
    >>> best_orientation(a, b, 1), best_orientation(a, b, 3), best_orientation(a, b, 4)
    (3, 3, 4)
    """
    k = 0 if orientation is None else int(orientation)
    first = orient(b, k)
    inverse = INVERSE_ORIENTATION[k]
    if inverse == k:
        return k
    return k if _mismatch(a, first) <= _mismatch(a, orient(b, inverse)) else inverse


def align_to(a: Image.Image, b: Image.Image, orientation: int | None) -> Image.Image:
    """``b`` turned onto ``a`` by :func:`best_orientation`.

    Examples
    --------
    >>> from PIL import Image, ImageDraw
    >>> a = Image.new("L", (40, 40)); ImageDraw.Draw(a).rectangle((0, 0, 10, 20), fill=255)
    >>> b = a.transpose(Image.Transpose.ROTATE_90)
    >>> align_to(a, b, 1).tobytes() == a.tobytes() == align_to(a, b, 3).tobytes()
    True
    """
    return orient(b, best_orientation(a, b, orientation))


def _mismatch(a: Image.Image, b: Image.Image) -> float:
    size = (32, 32)
    x = np.asarray(a.convert("L").resize(size, Image.Resampling.BILINEAR), dtype=np.float32)
    y = np.asarray(b.convert("L").resize(size, Image.Resampling.BILINEAR), dtype=np.float32)
    return float(np.abs(x - y).mean())


def orient(image: Image.Image, orientation: int | None) -> Image.Image:
    """Apply the dihedral transform numbered ``orientation`` (0..7; None means 0).

    The numbering is :data:`curate.hashing.DIHEDRAL_TRANSFORMS` (the order of
    ``phash_t0..phash_t7``), so a pair's ``orientation`` turns image b onto image a.

    Examples
    --------
    >>> from PIL import Image
    >>> im = Image.new("L", (3, 2))
    >>> orient(im, 1).size, orient(im, 2).size
    ((2, 3), (3, 2))
    """
    k = 0 if orientation is None else int(orientation)
    if not 0 <= k < len(PIL_TRANSPOSE):
        raise ValueError(f"orientation must be an integer 0..7, got {orientation!r}")
    method = PIL_TRANSPOSE[k]
    return image if method is None else image.transpose(method)


def shrink(image: Image.Image, size: int) -> Image.Image:
    """The image in RGB, shrunk (never enlarged) to fit a ``size`` x ``size`` box.

    Examples
    --------
    >>> from PIL import Image
    >>> shrink(Image.new("L", (400, 200)), 100).size
    (100, 50)
    """
    _check_size(size)
    if image.mode != "RGB":
        image = image.convert("RGB")
    image = image.copy()
    image.thumbnail((size, size), Image.Resampling.LANCZOS)
    return image


def fit_square(image: Image.Image, size: int, *, background=PAD_COLOUR) -> Image.Image:
    """Scale the image to fit ``size`` x ``size`` and pad it, centred, to exactly that square.

    Both images of a pair pass through this so they show at the same display size.

    Examples
    --------
    >>> from PIL import Image
    >>> fit_square(Image.new("RGB", (60, 30)), 120).size
    (120, 120)
    """
    _check_size(size)
    if image.mode != "RGB":
        image = image.convert("RGB")
    scaled = ImageOps.contain(image, (size, size), Image.Resampling.BILINEAR)
    canvas = Image.new("RGB", (size, size), background)
    canvas.paste(scaled, ((size - scaled.width) // 2, (size - scaled.height) // 2))
    return canvas


def difference_image(a: Image.Image, b: Image.Image, *, gain: float = 3.0) -> Image.Image:
    """Absolute per-pixel difference of two same-size images, brightened by ``gain``.

    Black where the two agree; bright where they differ.

    Examples
    --------
    >>> from PIL import Image
    >>> a = Image.new("RGB", (4, 4), (10, 20, 30))
    >>> difference_image(a, a).getextrema()
    ((0, 0), (0, 0), (0, 0))
    >>> difference_image(a, Image.new("RGB", (4, 4), (20, 20, 30)), gain=2).getpixel((0, 0))
    (20, 0, 0)
    """
    if a.size != b.size:
        raise ValueError(f"images must have the same size, got {a.size} and {b.size}")
    if gain <= 0:
        raise ValueError(f"gain must be positive, got {gain!r}")
    x = np.asarray(a.convert("RGB"), dtype=np.int16)
    y = np.asarray(b.convert("RGB"), dtype=np.int16)
    d = np.abs(x - y).astype(np.float32) * gain
    return Image.fromarray(np.clip(d, 0, 255).astype(np.uint8), "RGB")


def overlay_image(a: Image.Image, b: Image.Image, *, alpha: float = 0.5) -> Image.Image:
    """Blend two same-size images: ``(1 - alpha) * a + alpha * b``.

    Examples
    --------
    >>> from PIL import Image
    >>> a, b = Image.new("RGB", (2, 2), (0, 0, 0)), Image.new("RGB", (2, 2), (200, 100, 0))
    >>> overlay_image(a, b).getpixel((0, 0))
    (100, 50, 0)
    """
    if a.size != b.size:
        raise ValueError(f"images must have the same size, got {a.size} and {b.size}")
    if not 0.0 <= alpha <= 1.0:
        raise ValueError(f"alpha must be between 0 and 1, got {alpha!r}")
    return Image.blend(a.convert("RGB"), b.convert("RGB"), alpha)


def placeholder(size: int, text: str) -> Image.Image:
    """A grey square saying why there is no picture (file missing or unreadable)."""
    _check_size(size)
    im = Image.new("RGB", (size, size), (90, 90, 90))
    ImageDraw.Draw(im).text((8, size // 2 - 6), text, fill=(255, 255, 255))
    return im


def to_jpeg(image: Image.Image, *, quality: int = 85) -> bytes:
    """JPEG bytes of an image (what an ``ipywidgets.Image`` shows)."""
    buf = io.BytesIO()
    image.convert("RGB").save(buf, format="JPEG", quality=quality)
    return buf.getvalue()


def pair_pictures(
    a: Image.Image,
    b: Image.Image,
    *,
    orientation: int | None = 0,
    size: int = 256,
    mode: str = "side_by_side",
) -> list[Image.Image]:
    """What the review shows for a pair: ``a``, ``b`` turned onto it (:func:`align_to`), both squared.

    ``mode`` adds a third picture: ``"difference"`` (:func:`difference_image`)
    or ``"overlay"`` (:func:`overlay_image`); ``"side_by_side"`` adds none.
    All pictures are ``size`` x ``size``.

    Examples
    --------
    >>> from PIL import Image
    >>> a = Image.new("RGB", (40, 20), (200, 0, 0))
    >>> b = a.transpose(Image.Transpose.ROTATE_90)      # b is a turned a quarter
    >>> pics = pair_pictures(a, b, orientation=3, size=32, mode="difference")
    >>> [p.size for p in pics]
    [(32, 32), (32, 32), (32, 32)]
    >>> pics[2].getextrema()[0][1] < 40          # once turned back, b matches a
    True
    """
    if mode not in VIEW_MODES:
        raise ValueError(f"mode must be one of {', '.join(VIEW_MODES)}; got {mode!r}")
    left = fit_square(a, size)
    right = fit_square(align_to(a, b, orientation), size)
    if mode == "difference":
        return [left, right, difference_image(left, right)]
    if mode == "overlay":
        return [left, right, overlay_image(left, right)]
    return [left, right]


class ThumbnailCache:
    """Thumbnails on disk, keyed by file SHA-256 and box size; made on first request.

    Parameters
    ----------
    folder : path
        Where the thumbnails live (created when first needed).
    size : int, default 256
        The box, in pixels, each thumbnail fits into.
    quality : int, default 85
        JPEG quality of the cached files.
    memory_items : int, default 64
        How many decoded thumbnails to also keep in memory (the review's
        prefetch of the next pair lands here).

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> from PIL import Image
    >>> tmp = Path(tempfile.mkdtemp())
    >>> Image.new("RGB", (500, 250), (200, 150, 120)).save(tmp / "a.png")
    >>> cache = ThumbnailCache(tmp / "thumbs", size=64)
    >>> cache.get(tmp / "a.png", "ab" * 32).size
    (64, 32)
    >>> cache.path_for("ab" * 32).is_file(), cache.made
    (True, 1)
    >>> _ = cache.get(tmp / "a.png", "ab" * 32); cache.made
    1
    """

    def __init__(self, folder: str | os.PathLike, *, size: int = 256, quality: int = 85,
                 memory_items: int = 64):
        _check_size(size)
        self.folder = Path(folder)
        self.size = int(size)
        self.quality = int(quality)
        self.made = 0  # thumbnails generated by this object (the rest came from the cache)
        self.memory_items = max(0, int(memory_items))
        self._recent: OrderedDict[str, Image.Image] = OrderedDict()

    def __repr__(self) -> str:
        return f"ThumbnailCache({str(self.folder)!r}, size={self.size})"

    @classmethod
    def for_workspace(cls, workspace, *, size: int = 256, quality: int = 85) -> "ThumbnailCache":
        """The cache inside a workspace folder (``WORKSPACE/thumbnails``)."""
        return cls(Path(workspace.path) / THUMBNAIL_DIR, size=size, quality=quality)

    def path_for(self, sha256: str) -> Path:
        """Where the thumbnail of the file with this SHA-256 is (or will be) kept."""
        if not sha256 or any(c not in "0123456789abcdef" for c in sha256.lower()):
            raise ValueError(f"sha256 must be a hex digest, got {sha256!r}")
        key = sha256.lower()
        return self.folder / key[:2] / f"{key}_{self.size}.jpg"

    def get(self, path: str | os.PathLike, sha256: str | None = None) -> Image.Image:
        """The thumbnail of the image file at ``path``, from the cache or made now.

        ``sha256`` is the file's digest as the catalog holds it; without it the
        cache key is a digest of the path (the file is then shrunk again if it
        changes under the same name only when the cache folder is cleared).
        A missing or unreadable file gives a :func:`placeholder` that is not cached.
        """
        key = sha256 or hashlib.sha256(os.fsencode(os.fspath(path))).hexdigest()
        if key in self._recent:
            self._recent.move_to_end(key)
            return self._recent[key]
        target = self.path_for(key)
        try:
            with Image.open(target) as cached:
                cached.load()
                return self._remember(key, cached.convert("RGB"))
        except (FileNotFoundError, OSError):
            pass
        try:
            thumb = _read_shrunk(Path(path), self.size)
        except FileNotFoundError:
            return placeholder(self.size, "file not found")
        except (OSError, ValueError, Image.DecompressionBombError):
            return placeholder(self.size, "cannot read image")
        _write_atomic(target, to_jpeg(thumb, quality=self.quality))
        self.made += 1
        return self._remember(key, thumb)

    def _remember(self, key: str, image: Image.Image) -> Image.Image:
        if self.memory_items:
            self._recent[key] = image
            while len(self._recent) > self.memory_items:
                self._recent.popitem(last=False)
        return image

    def ensure(self, items: Iterable[tuple[str, str | None]], *, progress: bool = True) -> int:
        """Make every missing thumbnail of ``(path, sha256)`` items; return how many were made."""
        items = list(items)
        before = self.made
        iterator = items
        if progress:
            from tqdm.auto import tqdm

            iterator = tqdm(items, desc="thumbnails", unit="image")
        for path, sha in iterator:
            if sha and self.path_for(sha).is_file():
                continue
            self.get(path, sha)
        return self.made - before


def _read_shrunk(path: Path, size: int) -> Image.Image:
    with Image.open(path) as im:
        # JPEG files can be decoded at 1/2, 1/4 or 1/8 scale directly: much faster for big photos
        im.draft("RGB", (size, size))
        im.load()
        # upright as the EXIF Orientation tag says, as hashing sees it (curate.hash_files),
        # so a pair's orientation code applies to what is shown
        return shrink(ImageOps.exif_transpose(im), size)


def _write_atomic(target: Path, data: bytes) -> None:
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=target.parent, prefix=".tmp-", suffix=".jpg")
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _check_size(size) -> None:
    if isinstance(size, bool) or not isinstance(size, (int, np.integer)) or size < 8:
        raise ValueError(f"size must be an integer of at least 8 pixels, got {size!r}")
