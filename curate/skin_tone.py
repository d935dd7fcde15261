"""Skin tone from pixels: sRGB -> CIE L*a*b* (D65), Individual Typology Angle, six bins.

The Individual Typology Angle (ITA) of skin is

    ITA = arctan((L* - 50) / b*) * 180 / pi      (degrees)

computed from CIE L*a*b* values of skin (Chardon et al. 1991, Int J Cosmet Sci
13(4):191-208; Del Bino et al. 2006, Pigment Cell Res 19(6):606-617). When
b* is 0 the angle is +90 or -90 degrees by the sign of L* - 50; the formula is
evaluated as ``arctan2((L* - 50) * sign(b*), |b*|)`` so it never divides by
zero and stays in [-90, 90].

Bins (degrees; the common six categories of the papers above, upper bound
inclusive): very_light > 55, light (41, 55], intermediate (28, 41],
tan (10, 28], brown (-30, 10], dark <= -30.

How an image's ITA is estimated (:func:`estimate_ita`)
------------------------------------------------------
Skin is sampled away from the lesion, which is usually centred: only pixels
in a band along the image border (``border_fraction`` of the shorter side)
are used, or, when the four corners are dark (a dermoscope's circular field
of view in a black surround), a ring between 0.6 and 0.85 of the inscribed
circle's radius. Pixels with L* below ``min_lightness`` (what is left of the
black surround, deep shadow) are dropped, and then the darkest
``dark_fraction`` of what remains (hair, lesion edge, ink marks). The ITA is
computed from the median L* and the median b* of the remaining pixels, a
robust estimate against stray pixels. This is a coarse coverage measure for
a dataset, not a measurement of one person's skin; lighting, white balance
and camera differ between sources.

The colour conversion is our own, in numpy: sRGB (IEC 61966-2-1) decoded to
linear light, the IEC 61966-2-1 RGB -> XYZ matrix, and the CIE 15 L*a*b*
formulas with the D65 white of that matrix (its row sums), so sRGB white maps
exactly to (100, 0, 0).

This module never reads files; :mod:`curate.skin_tone_files` does.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "ITA_BINS",
    "srgb_to_lab",
    "ita",
    "ita_bin",
    "skin_mask",
    "skin_pixels_lab",
    "estimate_ita",
]

#: (name, lower bound exclusive) from lightest to darkest; the last bin has no lower bound.
ITA_BINS: tuple[tuple[str, float], ...] = (
    ("very_light", 55.0),
    ("light", 41.0),
    ("intermediate", 28.0),
    ("tan", 10.0),
    ("brown", -30.0),
    ("dark", -np.inf),
)

# IEC 61966-2-1 (sRGB) linear RGB -> CIE XYZ, D65
_RGB_TO_XYZ = np.array(
    [
        [0.4124, 0.3576, 0.1805],
        [0.2126, 0.7152, 0.0722],
        [0.0193, 0.1192, 0.9505],
    ]
)
_WHITE = _RGB_TO_XYZ.sum(axis=1)  # D65 white of the matrix: (0.9505, 1.0, 1.089)
_DELTA = 6.0 / 29.0


def _as_unit_rgb(rgb) -> np.ndarray:
    arr = np.asarray(rgb)
    if arr.shape[-1:] != (3,):
        raise ValueError(f"expected RGB values in the last axis (size 3), got shape {arr.shape}")
    if arr.dtype == np.uint8:
        return arr.astype(np.float64) / 255.0
    if np.issubdtype(arr.dtype, np.integer):
        raise TypeError(f"integer RGB must be uint8, got {arr.dtype}")
    arr = arr.astype(np.float64)
    if arr.size and (np.nanmin(arr) < 0 or np.nanmax(arr) > 1):
        raise ValueError("float RGB must lie in [0, 1]")
    return arr


def srgb_to_lab(rgb) -> np.ndarray:
    """CIE L*a*b* (D65) of sRGB values.

    Parameters
    ----------
    rgb : array_like, shape (..., 3)
        ``uint8`` (0..255) or float in [0, 1].

    Returns
    -------
    ndarray, shape (..., 3), float64
        L* in [0, 100], a*, b*.

    Examples
    --------
    >>> srgb_to_lab(np.array([255, 255, 255], dtype=np.uint8)).round(6) + 0
    array([100.,   0.,   0.])
    >>> float(srgb_to_lab(np.array([0, 0, 0], dtype=np.uint8))[0])
    0.0
    """
    c = _as_unit_rgb(rgb)
    linear = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    xyz = linear @ _RGB_TO_XYZ.T / _WHITE
    f = np.where(xyz > _DELTA**3, np.cbrt(xyz), xyz / (3 * _DELTA**2) + 4.0 / 29.0)
    L = 116.0 * f[..., 1] - 16.0
    a = 500.0 * (f[..., 0] - f[..., 1])
    b = 200.0 * (f[..., 1] - f[..., 2])
    return np.stack([L, a, b], axis=-1)


def ita(lightness, b_star) -> np.ndarray:
    """Individual Typology Angle in degrees, in [-90, 90].

    Examples
    --------
    >>> float(ita(50 + 10 * np.sqrt(3), 10.0)).__round__(6)
    60.0
    >>> float(ita(70.0, 0.0)), float(ita(30.0, 0.0))
    (90.0, -90.0)
    """
    L = np.asarray(lightness, dtype=np.float64)
    b = np.asarray(b_star, dtype=np.float64)
    sign = np.where(b < 0, -1.0, 1.0)
    return np.degrees(np.arctan2((L - 50.0) * sign, np.abs(b)))


def ita_bin(values) -> np.ndarray:
    """Bin name of each ITA value (None where the value is NaN).

    Examples
    --------
    >>> ita_bin([60.0, 55.0, 41.0, 30.0, 10.0, -30.0, -45.0, float("nan")]).tolist()
    ['very_light', 'light', 'intermediate', 'intermediate', 'brown', 'dark', 'dark', None]
    """
    v = np.atleast_1d(np.asarray(values, dtype=np.float64))
    out = np.full(v.shape, None, dtype=object)
    assigned = np.isnan(v)
    for name, lower in ITA_BINS:
        hit = ~assigned & (v > lower) if np.isfinite(lower) else ~assigned
        out[hit] = name
        assigned |= hit
    return out


def _dark_corners(lab_l: np.ndarray, min_lightness: float) -> bool:
    """True when all four corners are dark: the black surround of a dermoscope's circular field."""
    h, w = lab_l.shape
    k = max(1, min(h, w) // 20)
    corners = [lab_l[:k, :k], lab_l[:k, -k:], lab_l[-k:, :k], lab_l[-k:, -k:]]
    return all(float(np.median(c)) < min_lightness + 5 for c in corners)


def skin_mask(
    shape: tuple[int, int],
    *,
    field: str = "band",
    border_fraction: float = 0.15,
    ring: tuple[float, float] = (0.6, 0.85),
) -> np.ndarray:
    """Boolean mask of where skin is sampled, away from a centred lesion.

    ``field="band"``: a band along the image border, ``border_fraction`` of the
    shorter side wide. ``field="circle"``: a ring inside the circle inscribed
    in the image, between ``ring[0]`` and ``ring[1]`` of its radius (for
    dermoscopy, whose field of view is a circle in a black surround).

    Examples
    --------
    >>> int(skin_mask((10, 10), field="band", border_fraction=0.1).sum())
    36
    >>> bool(skin_mask((100, 100), field="circle")[50, 50])
    False
    """
    h, w = shape
    if field == "band":
        if not 0 < border_fraction <= 0.5:
            raise ValueError(f"border_fraction must be in (0, 0.5], got {border_fraction!r}")
        band = max(1, int(round(border_fraction * min(h, w))))
        mask = np.zeros((h, w), dtype=bool)
        mask[:band, :] = mask[-band:, :] = True
        mask[:, :band] = mask[:, -band:] = True
        return mask
    if field == "circle":
        inner, outer = ring
        if not 0 <= inner < outer <= 1:
            raise ValueError(f"ring must satisfy 0 <= inner < outer <= 1, got {ring!r}")
        yy, xx = np.mgrid[0:h, 0:w]
        r = np.hypot(yy - (h - 1) / 2, xx - (w - 1) / 2) / (min(h, w) / 2)
        return (r >= inner) & (r <= outer)
    raise ValueError(f"field must be 'band' or 'circle', got {field!r}")


def skin_pixels_lab(
    rgb,
    *,
    field: str = "auto",
    border_fraction: float = 0.15,
    min_lightness: float = 10.0,
    dark_fraction: float = 0.25,
) -> np.ndarray:
    """L*a*b* of the pixels taken as skin (see the module notes), shape (n, 3).

    ``field="auto"`` uses the circular ring when the four corners are dark
    (a dermoscope's field of view), else the border band; see :func:`skin_mask`.

    Examples
    --------
    >>> img = np.full((20, 20, 3), 200, dtype=np.uint8)
    >>> img[5:15, 5:15] = 60        # a dark "lesion" in the centre
    >>> skin_pixels_lab(img).shape[1], bool((skin_pixels_lab(img)[:, 0] > 70).all())
    (3, True)
    """
    if not 0 <= dark_fraction < 1:
        raise ValueError(f"dark_fraction must be in [0, 1), got {dark_fraction!r}")
    arr = np.asarray(rgb)
    if arr.ndim != 3 or arr.shape[2] != 3:
        raise ValueError(f"expected an RGB image of shape (height, width, 3), got {arr.shape}")
    lab_all = srgb_to_lab(arr)
    if field == "auto":
        field = "circle" if _dark_corners(lab_all[..., 0], min_lightness) else "band"
    lab = lab_all[skin_mask(arr.shape[:2], field=field, border_fraction=border_fraction)]
    lab = lab[lab[:, 0] >= min_lightness]
    if len(lab) and dark_fraction > 0:
        cut = np.quantile(lab[:, 0], dark_fraction)
        lab = lab[lab[:, 0] >= cut]
    return lab


def estimate_ita(
    rgb,
    *,
    field: str = "auto",
    border_fraction: float = 0.15,
    min_lightness: float = 10.0,
    dark_fraction: float = 0.25,
    min_pixels: int = 20,
) -> float:
    """ITA (degrees) of the skin around a centred lesion; NaN if too few skin pixels.

    ``rgb`` is an image array (height, width, 3), typically a thumbnail.

    Examples
    --------
    >>> img = np.zeros((32, 32, 3), dtype=np.uint8)
    >>> img[...] = (224, 180, 160)     # light skin-like colour
    >>> value = estimate_ita(img)
    >>> round(value, 1), ita_bin(value).tolist()
    (58.7, ['very_light'])
    """
    lab = skin_pixels_lab(rgb, field=field, border_fraction=border_fraction, min_lightness=min_lightness,
                          dark_fraction=dark_fraction)
    if len(lab) < min_pixels:
        return float("nan")
    return float(ita(np.median(lab[:, 0]), np.median(lab[:, 2])))
