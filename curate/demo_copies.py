"""Copy operations for the demo scenario: how an archive re-exports a clinic's image.

Pure functions on in-memory Pillow images and bytes: no file I/O. A copy is a
list of operations applied in order to the decoded original, then encoded.

Operations (name, parameters):

- ``("crop", (x0, y0, x1, y1))`` keep a box (pixels, right/bottom exclusive)
- ``("rotate90" | "rotate180" | "rotate270", None)`` counter-clockwise, as
  Pillow's ``Image.Transpose.ROTATE_90`` and ``numpy.rot90(a, k)``
- ``("flip_h" | "flip_v", None)`` mirror left-right / top-bottom
- ``("resize", (width, height))`` Lanczos resampling
- ``("colour_shift", (brightness, (gain_r, gain_g, gain_b), hue_degrees))``
"""

from __future__ import annotations

import io

import numpy as np
from PIL import Image

_TRANSPOSE = {
    "rotate90": Image.Transpose.ROTATE_90,
    "rotate180": Image.Transpose.ROTATE_180,
    "rotate270": Image.Transpose.ROTATE_270,
    "flip_h": Image.Transpose.FLIP_LEFT_RIGHT,
    "flip_v": Image.Transpose.FLIP_TOP_BOTTOM,
}

GEOMETRIC_OPS = tuple(_TRANSPOSE)


def apply_ops(img: Image.Image, ops) -> Image.Image:
    """Apply copy operations in order.

    Parameters
    ----------
    img : PIL.Image.Image
        The decoded original (RGB).
    ops : sequence of (name, params)
        See the module docstring.

    Returns
    -------
    PIL.Image.Image

    Examples
    --------
    >>> a = np.arange(24, dtype=np.uint8).reshape(2, 4, 3)
    >>> out = apply_ops(Image.fromarray(a), [("flip_h", None)])
    >>> bool((np.asarray(out) == np.fliplr(a)).all())
    True
    >>> apply_ops(Image.fromarray(a), [("crop", (1, 0, 3, 2))]).size
    (2, 2)
    """
    for name, params in ops:
        if name in _TRANSPOSE:
            img = img.transpose(_TRANSPOSE[name])
        elif name == "crop":
            img = img.crop(tuple(int(v) for v in params))
        elif name == "resize":
            img = img.resize(tuple(int(v) for v in params), Image.Resampling.LANCZOS)
        elif name == "colour_shift":
            img = colour_shift(img, *params)
        else:
            raise ValueError(f"unknown copy operation {name!r}")
    return img


def colour_shift(img: Image.Image, brightness: float, gains, hue_degrees: float) -> Image.Image:
    """Change brightness, white balance (per-channel gains) and hue.

    Examples
    --------
    >>> im = Image.new("RGB", (2, 2), (100, 100, 100))
    >>> colour_shift(im, 1.1, (1.0, 1.0, 0.9), 0.0).getpixel((0, 0))
    (110, 110, 99)
    """
    ramp = np.arange(256, dtype=float)
    lut = np.concatenate([np.clip(ramp * brightness * g + 0.5, 0, 255) for g in gains])
    img = img.convert("RGB").point(lut.astype(int).tolist())
    if hue_degrees:
        hsv = img.convert("HSV")
        h, s, v = hsv.split()
        shift = int(round(hue_degrees / 360.0 * 256)) % 256
        h = h.point([(i + shift) % 256 for i in range(256)])
        img = Image.merge("HSV", (h, s, v)).convert("RGB")
    return img


def encode(img: Image.Image, fmt: str, *, quality: int = 90, exif: Image.Exif | None = None) -> bytes:
    """Encode an image as JPEG or PNG bytes (deterministic for the same input).

    Examples
    --------
    >>> data = encode(Image.new("RGB", (8, 8)), "PNG")
    >>> data[:8] == b"\\x89PNG\\r\\n\\x1a\\n"
    True
    """
    buf = io.BytesIO()
    if fmt == "JPEG":
        kwargs = {"quality": int(quality)}
        if exif is not None:
            kwargs["exif"] = exif
        img.convert("RGB").save(buf, "JPEG", **kwargs)
    elif fmt == "PNG":
        img.save(buf, "PNG", compress_level=1)
    else:
        raise ValueError(f"fmt must be 'JPEG' or 'PNG', got {fmt!r}")
    return buf.getvalue()


def decode(data: bytes) -> Image.Image:
    """Decode image bytes to an RGB Pillow image.

    Examples
    --------
    >>> decode(encode(Image.new("RGB", (3, 2)), "PNG")).size
    (3, 2)
    """
    with Image.open(io.BytesIO(data)) as im:
        return im.convert("RGB")


def patient_exif(description: str, taken: str, gps: tuple[float, float], model: str) -> Image.Exif:
    """EXIF fields that look like patient data, for planting in demo JPEGs.

    Tag numbers per the Exif 2.3 standard (CIPA DC-008): 0x010E ImageDescription
    and 0x0110 Model in IFD0, 0x9003 DateTimeOriginal in the Exif IFD (0x8769),
    GPS latitude/longitude (tags 1-4) in the GPS IFD (0x8825).

    Parameters
    ----------
    description : str
        Free text, e.g. an invented name.
    taken : str
        ``"YYYY:MM:DD HH:MM:SS"`` as Exif writes dates.
    gps : (latitude, longitude)
        Decimal degrees; negative is south / west.
    model : str
        Camera model text.

    Examples
    --------
    >>> ex = patient_exif("J. Example", "2021:03:04 10:00:00", (51.5, -0.25), "cam")
    >>> ex.get_ifd(0x8825)[3]
    'W'
    """
    exif = Image.Exif()
    exif[0x010E] = description
    exif[0x0110] = model
    exif.get_ifd(0x8769)[0x9003] = taken
    lat, lon = gps
    gps_ifd = exif.get_ifd(0x8825)
    gps_ifd[0] = b"\x02\x03\x00\x00"  # GPSVersionID 2.3.0.0
    gps_ifd[1] = "N" if lat >= 0 else "S"
    gps_ifd[2] = _dms(abs(lat))
    gps_ifd[3] = "E" if lon >= 0 else "W"
    gps_ifd[4] = _dms(abs(lon))
    return exif


def _dms(degrees: float) -> tuple[float, float, float]:
    d = int(degrees)
    m = int((degrees - d) * 60)
    s = round((degrees - d - m / 60) * 3600, 2)
    return (float(d), float(m), float(s))
