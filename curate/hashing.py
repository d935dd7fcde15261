"""Perceptual hashes of in-memory images: one value type, one function per algorithm.

Every function here takes a Pillow image that is already decoded and returns
a :class:`PerceptualHash` (or, for the orientation and crop sets, an array of
``uint64`` codes). Nothing here opens files; :mod:`curate.hash_files` decodes
files once and calls :func:`hash_thumbnail`.

The five single-hash functions reproduce imagehash 4.3 (Johannes Buchner,
BSD-2-Clause) bit for bit when given the same image: the same conversion to
``L``, the same Pillow LANCZOS resize, the same transforms and thresholds.
``tests/test_hashing.py`` checks this against the installed imagehash.

Bit order follows imagehash: the hash's bit array is read row by row and the
first bit is the most significant, so ``str(h)`` ends in the same hex string
imagehash prints.
"""

from __future__ import annotations

import functools
import re
from dataclasses import dataclass

import numpy as np
from PIL import Image

LANCZOS = Image.Resampling.LANCZOS

#: Bits per side of the square hashes (64-bit codes).
HASH_SIZE = 8
#: The DCT hash works on a ``HASH_SIZE * PHASH_HIGHFREQ_FACTOR`` square thumbnail (32 x 32).
PHASH_HIGHFREQ_FACTOR = 4
#: The wavelet hash's working square; fixed so that copies at any resolution agree.
WHASH_IMAGE_SCALE = 64
#: Bits per colour bin: 14 bins x 4 bits = a 56-bit colour code, kept in a uint64.
COLORHASH_BINBITS = 4
#: :func:`shrink_for_hashing` keeps the shorter side at least this long (pixels).
THUMBNAIL_MIN_SIDE = 96

#: Names of the 8 rotations/flips (the dihedral group), in the order of ``phash_t0..phash_t7``.
#: Rotations are counter-clockwise, like ``PIL.Image.Transpose.ROTATE_90`` and ``numpy.rot90``.
DIHEDRAL_TRANSFORMS = (
    "identity",
    "rot90",
    "rot180",
    "rot270",
    "flip_h",
    "flip_v",
    "transpose",
    "transverse",
)

#: The same transforms as Pillow operations (``None`` is the identity).
PIL_TRANSPOSE = (
    None,
    Image.Transpose.ROTATE_90,
    Image.Transpose.ROTATE_180,
    Image.Transpose.ROTATE_270,
    Image.Transpose.FLIP_LEFT_RIGHT,
    Image.Transpose.FLIP_TOP_BOTTOM,
    Image.Transpose.TRANSPOSE,
    Image.Transpose.TRANSVERSE,
)

#: ``INVERSE_ORIENTATION[k]`` undoes transform ``k``: quarter turns swap, the rest undo themselves.
INVERSE_ORIENTATION = (0, 3, 2, 1, 4, 5, 6, 7)

#: Spans kept along each axis by the coarse crop windows, as fractions (start, end) of the side.
CROP_SPANS = ((0.0, 1.0), (0.0, 0.9), (0.1, 1.0), (0.0, 0.8), (0.1, 0.9), (0.2, 1.0))

#: Side lengths of the fine crop windows, as fractions of the side, and the step of their
#: offsets. A fine window keeps the same share of both sides, as a crop that keeps the
#: picture's shape does; its offsets step by :data:`FINE_CROP_STEP` from 0 to 1 - length.
FINE_CROP_LENGTHS = (0.875, 0.775)
FINE_CROP_STEP = 0.05


def _fine_spans(length: float) -> list[tuple[float, float]]:
    starts = np.arange(0.0, 1.0 - length + 1e-9, FINE_CROP_STEP)
    return [(round(float(a), 4), round(float(a) + length, 4)) for a in starts]


#: Crop windows as (left, top, right, bottom) fractions. First the coarse windows: every
#: (x span, y span) pair of :data:`CROP_SPANS`, y span in the outer loop, x span inner,
#: leaving out the whole image (whose DCT hash is ``phash``): 35 windows. Then the fine
#: windows, for each of :data:`FINE_CROP_LENGTHS` every (x span, y span) pair of that
#: length: 9 + 25 = 34 windows. 69 in all; ``crop_hashes[k]`` belongs to ``CROP_WINDOWS[k]``.
#: The coarse windows alone sit up to 0.05 of a side from a crop keeping 75-95% of each
#: side, and the DCT hash of such a crop was then 10-18 bits from its best window for about
#: one crop in five of two 2,000-image demos; with the fine windows 81 of 82 crops were within
#: 8 bits (tried in development on demo seeds 0 and 1), while unrelated pictures within 8
#: bits of a window rose from 0.4% to 0.5% of pairs.
CROP_WINDOWS = tuple(
    (x0, y0, x1, y1)
    for (y0, y1) in CROP_SPANS
    for (x0, x1) in CROP_SPANS
    if (x0, x1, y0, y1) != (0.0, 1.0, 0.0, 1.0)
) + tuple(
    (x0, y0, x1, y1)
    for length in FINE_CROP_LENGTHS
    for (y0, y1) in _fine_spans(length)
    for (x0, x1) in _fine_spans(length)
)

_FORM = re.compile(r"^([a-z][a-z0-9_]*):([0-9]+):([0-9a-f]+)$")


@dataclass(frozen=True)
class PerceptualHash:
    """An immutable perceptual hash: the algorithm's name, the bit count and the bits.

    ``a - b`` is the Hamming distance (number of differing bits). Hashes of
    different algorithms or lengths cannot be compared (``TypeError``). The
    string form ``"<algorithm>:<bits>:<hex>"`` round-trips through
    :meth:`from_string`; the hex part is what imagehash prints for the same bits.

    Parameters
    ----------
    algorithm : str
        Lower-case name, e.g. ``"dhash"``.
    bits : int
        Number of bits (``hash_size ** 2`` for the square hashes).
    value : int
        The bits as an unsigned integer, first bit most significant.

    Examples
    --------
    >>> a = PerceptualHash("dhash", 64, 0x0F)
    >>> b = PerceptualHash.from_string("dhash:64:00000000000000ff")
    >>> a - b
    4
    >>> str(a)
    'dhash:64:000000000000000f'
    >>> PerceptualHash.from_string(str(a)) == a
    True
    >>> a == 15
    False
    """

    algorithm: str
    bits: int
    value: int

    def __post_init__(self):
        if not isinstance(self.algorithm, str) or not _FORM.match(f"{self.algorithm}:1:0"):
            raise ValueError(f"algorithm must be a lower-case name, got {self.algorithm!r}")
        if isinstance(self.bits, bool) or not isinstance(self.bits, (int, np.integer)) or self.bits < 1:
            raise ValueError(f"bits must be a positive integer, got {self.bits!r}")
        if isinstance(self.value, bool) or not isinstance(self.value, (int, np.integer)):
            raise TypeError(f"value must be an integer, got {type(self.value).__name__}")
        value = int(self.value)
        if not 0 <= value < (1 << int(self.bits)):
            raise ValueError(f"value {value:#x} does not fit in {self.bits} unsigned bits")
        object.__setattr__(self, "bits", int(self.bits))
        object.__setattr__(self, "value", value)

    @classmethod
    def from_string(cls, text: str) -> "PerceptualHash":
        """Parse ``"<algorithm>:<bits>:<hex>"`` as written by ``str()``."""
        m = _FORM.match(text.strip().lower()) if isinstance(text, str) else None
        if m is None:
            raise ValueError(f"not a perceptual hash string of the form 'dhash:64:<hex>': {text!r}")
        return cls(m.group(1), int(m.group(2)), int(m.group(3), 16))

    @property
    def hex(self) -> str:
        """The bits as zero-padded hex, as imagehash's ``str()`` writes them."""
        return f"{self.value:0{(self.bits + 3) // 4}x}"

    def __str__(self) -> str:
        return f"{self.algorithm}:{self.bits}:{self.hex}"

    def __len__(self) -> int:
        return self.bits

    def __hash__(self) -> int:
        return hash((self.algorithm, self.bits, self.value))

    def __sub__(self, other):
        if not isinstance(other, PerceptualHash):
            return NotImplemented
        if (self.algorithm, self.bits) != (other.algorithm, other.bits):
            raise TypeError(
                f"cannot compare a {self.algorithm}/{self.bits}-bit hash "
                f"with a {other.algorithm}/{other.bits}-bit hash"
            )
        return (self.value ^ other.value).bit_count()

    def to_bits(self) -> np.ndarray:
        """The bits as a boolean array, first bit first."""
        return np.array([(self.value >> (self.bits - 1 - i)) & 1 for i in range(self.bits)], bool)


# --- bit packing -----------------------------------------------------------------


def _bits_to_int(bits: np.ndarray) -> int:
    """Row-major bits, first most significant, as a Python int (any length)."""
    flat = np.asarray(bits, bool).ravel()
    return int("".join("1" if b else "0" for b in flat), 2) if flat.size else 0


def pack_codes(bits: np.ndarray) -> np.ndarray:
    """Pack an ``(n, ...)`` boolean array of 64 bits per row into ``n`` uint64 codes.

    Examples
    --------
    >>> b = np.zeros((1, 8, 8), bool); b[0, 7, 7] = True
    >>> pack_codes(b)
    array([1], dtype=uint64)
    """
    flat = np.asarray(bits, bool).reshape(len(bits), -1)
    if flat.shape[1] != 64:
        raise ValueError(f"pack_codes needs 64 bits per row, got {flat.shape[1]}")
    return np.packbits(flat, axis=1).view(">u8").ravel().astype(np.uint64)


def _median_rows(values: np.ndarray) -> np.ndarray:
    """``numpy.median(values, axis=-1)`` for finite values, without its NaN checks.

    Same arithmetic as numpy: the middle value, or the mean ``(a + b) / 2`` of
    the two middle values, so thresholds match imagehash bit for bit.
    """
    n = values.shape[-1]
    part = np.partition(values, [(n - 1) // 2, n // 2], axis=-1)
    if n % 2:
        return part[..., n // 2]
    return (part[..., n // 2 - 1] + part[..., n // 2]) / 2


def _check_hash_size(hash_size: int) -> None:
    if isinstance(hash_size, bool) or not isinstance(hash_size, (int, np.integer)) or hash_size < 2:
        raise ValueError(f"hash_size must be an integer >= 2, got {hash_size!r}")


def _grey(image: Image.Image) -> Image.Image:
    if not isinstance(image, Image.Image):
        raise TypeError(f"expected a PIL.Image.Image, got {type(image).__name__}")
    return image.convert("L")


# --- one function per algorithm ------------------------------------------------------


def average_hash(image: Image.Image, hash_size: int = HASH_SIZE) -> PerceptualHash:
    """Average hash: grey thumbnail pixels above their mean.

    Implements the "average hash" of N. Krawetz, "Looks Like It", The Hacker
    Factor Blog, 2011 (from memory), exactly as imagehash 4.3's
    ``average_hash`` (``hash_size`` x ``hash_size`` LANCZOS thumbnail, bit = pixel > mean).

    Examples
    --------
    >>> img = Image.linear_gradient("L").resize((64, 64))
    >>> str(average_hash(img))
    'ahash:64:00000000ffffffff'
    """
    _check_hash_size(hash_size)
    pixels = np.asarray(_grey(image).resize((hash_size, hash_size), LANCZOS))
    return PerceptualHash("ahash", hash_size * hash_size, _bits_to_int(pixels > np.mean(pixels)))


def difference_hash(image: Image.Image, hash_size: int = HASH_SIZE) -> PerceptualHash:
    """Difference hash: is each pixel brighter than its left neighbour?

    Implements the "difference hash" of N. Krawetz, "Kind of Like That", The
    Hacker Factor Blog, 2013 (from memory), exactly as imagehash 4.3's ``dhash``
    (a ``(hash_size + 1) x hash_size`` LANCZOS thumbnail, horizontal gradients).

    Examples
    --------
    >>> img = Image.linear_gradient("L").rotate(90).resize((64, 64))
    >>> difference_hash(img).value == 2 ** 64 - 1
    True
    """
    _check_hash_size(hash_size)
    pixels = np.asarray(_grey(image).resize((hash_size + 1, hash_size), LANCZOS))
    return PerceptualHash("dhash", hash_size * hash_size, _bits_to_int(pixels[:, 1:] > pixels[:, :-1]))


def _dct_bits(pixels: np.ndarray, hash_size: int) -> np.ndarray:
    """imagehash's phash threshold on a stack ``(n, s, s)`` of grey thumbnails."""
    import scipy.fftpack  # imagehash uses scipy.fftpack; scipy.fft may round differently

    pixels = np.asarray(pixels)
    dct = scipy.fftpack.dct(scipy.fftpack.dct(pixels, axis=-2), axis=-1)
    low = dct[..., :hash_size, :hash_size]
    med = _median_rows(low.reshape(low.shape[:-2] + (-1,)))
    return low > med[..., None, None]


def _dct_thumbnail(image: Image.Image, hash_size: int, highfreq_factor: int) -> np.ndarray:
    _check_hash_size(hash_size)
    if isinstance(highfreq_factor, bool) or not isinstance(highfreq_factor, int) or highfreq_factor < 1:
        raise ValueError(f"highfreq_factor must be a positive integer, got {highfreq_factor!r}")
    size = hash_size * highfreq_factor
    return np.asarray(_grey(image).resize((size, size), LANCZOS))


def dct_hash(
    image: Image.Image, hash_size: int = HASH_SIZE, highfreq_factor: int = PHASH_HIGHFREQ_FACTOR
) -> PerceptualHash:
    """DCT ("perceptual") hash: low-frequency DCT coefficients above their median.

    Implements the pHash-style DCT hash described in N. Krawetz, "Looks Like
    It", The Hacker Factor Blog, 2011 (from memory), exactly as imagehash 4.3's
    ``phash``: a 32 x 32 LANCZOS grey thumbnail, 2-D DCT-II (``scipy.fftpack``),
    the top-left ``hash_size`` square compared with its median.

    Examples
    --------
    >>> img = Image.linear_gradient("L").resize((64, 64))
    >>> h = dct_hash(img)
    >>> h.algorithm, len(h), h - h
    ('phash', 64, 0)
    """
    bits = _dct_bits(_dct_thumbnail(image, hash_size, highfreq_factor), hash_size)
    return PerceptualHash("phash", hash_size * hash_size, _bits_to_int(bits))


def wavelet_hash(
    image: Image.Image,
    hash_size: int = HASH_SIZE,
    image_scale: int | None = None,
    mode: str = "haar",
    remove_max_haar_ll: bool = True,
) -> PerceptualHash:
    """Wavelet hash: the low-low band of a 2-D wavelet transform above its median.

    Implements imagehash 4.3's ``whash`` (Haar or Daubechies-4 wavelets via
    PyWavelets; optionally the coarsest Haar approximation is zeroed first),
    with the same arguments. ``image_scale=None`` uses the largest power of two
    not above the image's shorter side, as imagehash does;
    :func:`hash_thumbnail` passes :data:`WHASH_IMAGE_SCALE`. Unlike imagehash,
    bad arguments raise ``ValueError`` rather than failing an ``assert``.

    Examples
    --------
    >>> img = Image.linear_gradient("L").resize((64, 64))
    >>> wavelet_hash(img, image_scale=64).algorithm
    'whash'
    >>> wavelet_hash(img, hash_size=6)
    Traceback (most recent call last):
    ...
    ValueError: hash_size must be a power of 2, got 6
    """
    try:
        import pywt  # noqa: F401 - fail early with an install hint
    except ImportError as exc:  # pragma: no cover - PyWavelets is a dependency
        from curate.errors import OptionalDependencyError

        raise OptionalDependencyError("wavelet_hash needs PyWavelets: pip install PyWavelets") from exc
    _check_hash_size(hash_size)
    if hash_size & (hash_size - 1):
        raise ValueError(f"hash_size must be a power of 2, got {hash_size}")
    if mode not in ("haar", "db4"):
        raise ValueError(f"mode must be 'haar' or 'db4', got {mode!r}")
    grey = _grey(image)
    if image_scale is None:
        image_scale = max(2 ** int(np.log2(min(grey.size))), hash_size)
    elif image_scale < hash_size or image_scale & (image_scale - 1):
        raise ValueError(f"image_scale must be a power of 2 >= hash_size, got {image_scale}")
    pixels = np.asarray(grey.resize((image_scale, image_scale), LANCZOS))
    low = _wavelet_low_band(pixels, hash_size, mode, remove_max_haar_ll)
    # with db4 the low band is wider than hash_size (boundary padding), as in imagehash
    return PerceptualHash("whash", int(low.size), _bits_to_int(low > _median_rows(low.ravel())))


def _wavelet_low_band(pixels: np.ndarray, hash_size: int, mode: str, remove_max_haar_ll: bool):
    """imagehash's whash steps after the resize, on a square uint8 array or a stack of them.

    A stack runs through PyWavelets along its last two axes in one call; each
    slice comes out bit-identical to the single-image call.
    """
    import pywt

    ll_max_level = int(np.log2(pixels.shape[-1]))
    dwt_level = ll_max_level - int(np.log2(hash_size))
    pixels = pixels / 255.0
    if remove_max_haar_ll:
        coeffs = list(pywt.wavedec2(pixels, "haar", level=ll_max_level, axes=(-2, -1)))
        coeffs[0] *= 0
        pixels = pywt.waverec2(coeffs, "haar", axes=(-2, -1))
    return pywt.wavedec2(pixels, mode, level=dwt_level, axes=(-2, -1))[0]


#: Hue bin of each 8-bit hue value: the bins of ``numpy.linspace(0, 255, 7)`` (last one closed).
_HUE_BIN = np.minimum(np.arange(256) * 2 // 85, 5)


def colour_hash(image: Image.Image, binbits: int = COLORHASH_BINBITS) -> PerceptualHash:
    """Colour hash: the share of the image in 14 brightness, saturation and hue bins.

    Implements imagehash 4.3's ``colorhash`` (black share, grey share, then six
    hue bins for faint and six for bright colours, each share coded in
    ``binbits`` bits with imagehash's own bit pattern), vectorised with
    numpy. With the default ``binbits=4`` the code has 56 bits; a grey copy of
    a coloured image lands far from it.

    Examples
    --------
    >>> red = Image.new("RGB", (16, 16), (200, 30, 30))
    >>> colour_hash(red) - colour_hash(red.convert("L").convert("RGB")) > 4
    True
    """
    if isinstance(binbits, bool) or not isinstance(binbits, (int, np.integer)) or binbits < 1:
        raise ValueError(f"binbits must be a positive integer, got {binbits!r}")
    return _colour_hash(np.asarray(_grey(image)), np.asarray(image.convert("HSV")), binbits)


def _colour_hash(grey: np.ndarray, hsv: np.ndarray, binbits: int) -> PerceptualHash:
    intensity = grey.ravel()
    h, s = hsv[..., 0].ravel(), hsv[..., 1].ravel()
    n = intensity.size
    black = intensity < 256 // 8
    grey = s < 256 // 3
    colours = ~black & ~grey
    faint = colours & (s < 256 * 2 // 3)
    bright = colours & (s > 256 * 2 // 3)
    c = max(1, int(colours.sum()))
    maxvalue = 2**binbits
    values = [
        min(maxvalue - 1, int(int(black.sum()) / n * maxvalue)),
        min(maxvalue - 1, int(int((~black & grey).sum()) / n * maxvalue)),
    ]
    for mask in (faint, bright):
        counts = np.bincount(_HUE_BIN[h[mask]], minlength=6)
        values.extend(min(maxvalue - 1, int(int(k) * maxvalue * 1.0 / c)) for k in counts)
    bits = [v // (2 ** (binbits - i - 1)) % 2 ** (binbits - i) > 0 for v in values for i in range(binbits)]
    return PerceptualHash("colorhash", 14 * binbits, _bits_to_int(np.array(bits)))


#: Algorithm name (the hash frame's column) -> function, for the CLI and for loops.
ALGORITHMS = {
    "ahash": average_hash,
    "dhash": difference_hash,
    "phash": dct_hash,
    "whash": wavelet_hash,
    "colorhash": colour_hash,
}


# --- orientation and crop sets ------------------------------------------------------


def dihedral_arrays(pixels: np.ndarray) -> np.ndarray:
    """The 8 rotations/flips of a square array, in :data:`DIHEDRAL_TRANSFORMS` order.

    ``dihedral_arrays(a)[k]`` equals ``numpy.asarray(Image.fromarray(a).transpose(PIL_TRANSPOSE[k]))``.

    Examples
    --------
    >>> a = np.arange(4).reshape(2, 2)
    >>> dihedral_arrays(a)[1].tolist()
    [[1, 3], [0, 2]]
    """
    a = np.asarray(pixels)
    return np.stack(
        [a, np.rot90(a, 1), np.rot90(a, 2), np.rot90(a, 3), a[:, ::-1], a[::-1, :], a.T, a[::-1, ::-1].T]
    )


def dihedral_dct_hashes(
    image: Image.Image, hash_size: int = HASH_SIZE, highfreq_factor: int = PHASH_HIGHFREQ_FACTOR
) -> np.ndarray:
    """DCT hashes of the 8 rotations/flips of the image's 32 x 32 DCT thumbnail, as uint64.

    Entry ``k`` is bit-identical to ``dct_hash`` of the thumbnail transformed by
    ``PIL_TRANSPOSE[k]``. When image B is transform ``k`` of image A, ``dct_hash(B)``
    equals (or is within a few bits of) entry ``k`` of A's set.

    Examples
    --------
    >>> img = Image.linear_gradient("L").resize((32, 32))
    >>> codes = dihedral_dct_hashes(img)
    >>> int(codes[0]) == dct_hash(img).value, codes.dtype
    (True, dtype('uint64'))
    """
    if hash_size != HASH_SIZE:
        raise ValueError("dihedral_dct_hashes packs 64-bit codes: hash_size must be 8")
    thumb = _dct_thumbnail(image, hash_size, highfreq_factor)
    return pack_codes(_dct_bits(dihedral_arrays(thumb), hash_size))


def _lanczos(x: np.ndarray) -> np.ndarray:
    x = np.abs(x)
    return np.where(x < 3.0, np.sinc(x) * np.sinc(x / 3.0), 0.0)


def _resample_matrix(in_size: int, start: float, end: float, out_size: int) -> np.ndarray:
    """Rows of LANCZOS-3 weights taking pixels ``[start, end)`` of a line to ``out_size`` samples.

    Follows the antialiasing filter Pillow's ``resize`` uses (support widened by
    the scale when shrinking, weights normalised per output sample); pixels
    outside the window get no weight, as if the window had been cropped first.
    """
    lo, hi = int(round(start)), int(round(end))
    scale = (hi - lo) / out_size
    support_scale = max(scale, 1.0)
    centres = lo + (np.arange(out_size) + 0.5) * scale
    x = np.arange(in_size) + 0.5
    w = _lanczos((x[None, :] - centres[:, None]) / support_scale)
    w[:, :lo] = 0.0
    w[:, hi:] = 0.0
    return w / w.sum(axis=1, keepdims=True)


def _dct_matrix(hash_size: int, size: int) -> np.ndarray:
    """The first ``hash_size`` rows of scipy.fftpack's unnormalised DCT-II of length ``size``."""
    k = np.arange(hash_size)[:, None]
    n = np.arange(size)[None, :]
    return 2.0 * np.cos(np.pi * k * (2 * n + 1) / (2 * size))


@functools.lru_cache(maxsize=64)
def _window_projections(n: int, spans: tuple, hash_size: int, size: int) -> np.ndarray:
    """Stacked (DCT rows x LANCZOS resampling) matrices, ``(len(spans) * hash_size, n)`` float32."""
    dct = _dct_matrix(hash_size, size)
    mats = []
    for a, b in spans:
        if round(b * n) - round(a * n) < 1:
            raise ValueError(f"a side of {n} pixels is too short for the window span {a}-{b}")
        mats.append(dct @ _resample_matrix(n, a * n, b * n, size))
    out = np.concatenate(mats).astype(np.float32)
    out.flags.writeable = False
    return out


def window_dct_hashes(
    image: Image.Image, windows=CROP_WINDOWS, hash_size: int = HASH_SIZE,
    highfreq_factor: int = PHASH_HIGHFREQ_FACTOR,
) -> np.ndarray:
    """DCT hashes of sub-windows of the image, as uint64, one per window.

    Each code approximates ``dct_hash(image.crop(window))``: the crop, the
    32 x 32 LANCZOS thumbnail and the low-frequency DCT are folded into two
    small matrix products per axis (no uint8 rounding of the thumbnail), so
    all windows cost about one resize. A crop of the image keeping 75% or
    more of each side has a ``dct_hash`` close to one of these codes (see
    docs/hashing.md for the measured recall).

    Parameters
    ----------
    windows : sequence of (left, top, right, bottom)
        Fractions of the width and height; default :data:`CROP_WINDOWS`.

    Examples
    --------
    >>> img = Image.linear_gradient("L").resize((128, 96))
    >>> codes = window_dct_hashes(img)
    >>> codes.shape, codes.dtype
    ((69,), dtype('uint64'))
    """
    if hash_size != HASH_SIZE:
        raise ValueError("window_dct_hashes packs 64-bit codes: hash_size must be 8")
    windows = [tuple(float(f) for f in w) for w in windows]
    for w in windows:
        if len(w) != 4 or not (0 <= w[0] < w[2] <= 1 and 0 <= w[1] < w[3] <= 1):
            raise ValueError(f"a window must be (left, top, right, bottom) fractions in [0, 1], got {w}")
    return _window_codes(np.asarray(_grey(image)), windows, hash_size, highfreq_factor)


def _window_codes(grey: np.ndarray, windows, hash_size: int, highfreq_factor: int) -> np.ndarray:
    grey = grey.astype(np.float32)
    height, width = grey.shape
    xs = tuple(sorted({(w[0], w[2]) for w in windows}))
    ys = tuple(sorted({(w[1], w[3]) for w in windows}))
    size = hash_size * highfreq_factor
    px = _window_projections(width, xs, hash_size, size)
    py = _window_projections(height, ys, hash_size, size)
    coeffs = py @ grey @ px.T  # block (i, j) = low DCT of y span i x x span j
    blocks = coeffs.reshape(len(ys), hash_size, len(xs), hash_size).transpose(0, 2, 1, 3)
    xi = {s: i for i, s in enumerate(xs)}
    yi = {s: i for i, s in enumerate(ys)}
    low = np.stack([blocks[yi[(w[1], w[3])], xi[(w[0], w[2])]] for w in windows])
    med = _median_rows(low.reshape(len(windows), -1))
    return pack_codes(low > med[:, None, None])


# --- everything from one image ------------------------------------------------------


def shrink_for_hashing(image: Image.Image, *, min_side: int = THUMBNAIL_MIN_SIDE) -> Image.Image:
    """Shrink by the largest whole box factor that keeps the shorter side >= ``min_side``.

    Box averaging (``Image.reduce``) is cheap and keeps far more detail than
    the 32 x 32 thumbnails need; images already small are returned unchanged.
    :mod:`curate.hash_files` calls this after the reduced JPEG decode, so every
    hash is computed on an image of 96 to 191 pixels on its shorter side.

    Examples
    --------
    >>> shrink_for_hashing(Image.new("RGB", (375, 250))).size
    (188, 125)
    >>> shrink_for_hashing(Image.new("RGB", (120, 90))).size
    (120, 90)
    """
    if isinstance(min_side, bool) or not isinstance(min_side, int) or min_side < 1:
        raise ValueError(f"min_side must be a positive integer, got {min_side!r}")
    factor = min(image.size) // min_side
    return image.reduce(factor) if factor >= 2 else image

#: Keys of :func:`hash_thumbnail`'s result, in column order of the hash frame.
HASH_COLUMNS = (
    ("ahash", "dhash", "phash", "whash", "colorhash")
    + tuple(f"phash_t{k}" for k in range(8))
    + ("crop_hashes",)
)


def hash_thumbnail(image: Image.Image) -> dict:
    """Every hash curate stores, from one decoded image.

    The grey conversion is done once. ``ahash``, ``dhash``, ``phash``,
    ``whash`` (with ``image_scale=64``) and ``colorhash`` (``binbits=4``, 56
    bits) equal imagehash 4.3's functions on the same image; ``phash_t0`` ..
    ``phash_t7`` are the DCT hashes of the 8 rotations/flips
    (:data:`DIHEDRAL_TRANSFORMS`, ``phash_t0 == phash``); ``crop_hashes`` is an
    array of 69 window codes (:data:`CROP_WINDOWS`).

    Returns
    -------
    dict
        Python ints (unsigned) for the single codes and a ``uint64`` array
        for ``crop_hashes``; keys :data:`HASH_COLUMNS`.

    Examples
    --------
    >>> img = Image.radial_gradient("L").convert("RGB")
    >>> h = hash_thumbnail(img)
    >>> h["phash"] == h["phash_t0"] == dct_hash(img).value
    True
    >>> len(h["crop_hashes"])
    69
    """
    return hash_thumbnails([image])[0]


def hash_thumbnails(images) -> list[dict]:
    """:func:`hash_thumbnail` of several images, sharing the per-call overhead.

    The DCT and wavelet steps run once over the stacked thumbnails of all
    images; results are bit-identical to hashing each image alone.

    Examples
    --------
    >>> imgs = [Image.radial_gradient("L"), Image.linear_gradient("L")]
    >>> [h["phash"] for h in hash_thumbnails(imgs)] == [dct_hash(i).value for i in imgs]
    True
    """
    n = HASH_SIZE
    rgbs, greys = [], []
    for image in images:
        if not isinstance(image, Image.Image):
            raise TypeError(f"expected a PIL.Image.Image, got {type(image).__name__}")
        rgb = image if image.mode == "RGB" else image.convert("RGB")
        rgbs.append(rgb)
        greys.append(rgb.convert("L"))
    if not greys:
        return []
    # each thumbnail exactly as imagehash makes it: LANCZOS resize of the "L" image
    a = np.stack([np.asarray(g.resize((n, n), LANCZOS)) for g in greys])
    d = np.stack([np.asarray(g.resize((n + 1, n), LANCZOS)) for g in greys])
    t = np.stack([np.asarray(g.resize((n * PHASH_HIGHFREQ_FACTOR,) * 2, LANCZOS)) for g in greys])
    w = _wavelet_low_band(
        np.stack([np.asarray(g.resize((WHASH_IMAGE_SCALE,) * 2, LANCZOS)) for g in greys]), n, "haar", True
    )
    m = len(greys)
    a_bits = np.stack([a[i] > np.mean(a[i]) for i in range(m)])  # numpy.mean per image, as imagehash
    d_bits = d[:, :, 1:] > d[:, :, :-1]
    w_bits = w > _median_rows(w.reshape(m, -1))[:, None, None]
    t_bits = _dct_bits(np.stack([dihedral_arrays(x) for x in t]), n)  # (m, 8, n, n)
    codes = pack_codes(np.concatenate([a_bits[:, None], d_bits[:, None], w_bits[:, None], t_bits], axis=1)
                       .reshape(m * 11, n, n)).reshape(m, 11)
    out = []
    for i in range(m):
        c = [int(v) for v in codes[i]]
        grey_pixels = np.asarray(greys[i])
        h = {
            "ahash": c[0],
            "dhash": c[1],
            "phash": c[3],
            "whash": c[2],
            "colorhash": _colour_hash(grey_pixels, np.asarray(rgbs[i].convert("HSV")), COLORHASH_BINBITS).value,
        }
        h.update({f"phash_t{k}": c[3 + k] for k in range(8)})
        h["crop_hashes"] = _window_codes(grey_pixels, CROP_WINDOWS, n, PHASH_HIGHFREQ_FACTOR)
        out.append(h)
    return out
