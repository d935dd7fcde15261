"""The dark surround of a dermoscope's round field of view, found and filled before hashing.

A dermoscopic photograph shows the skin through a round window; outside it the
picture is near black. That surround is the same in every dermoscopic image, and
it dominates the low frequencies that perceptual hashes keep: two different
lesions seen through the same dermoscope hash within a few bits of each other.
Before hashing the surround is therefore painted over with the median colour of
the skin inside, so the hashes describe the skin and the lesion (the crop check
looks at the pictures as they are, and again filled when two whole dermoscopic
pictures line up). Masking the dark field-of-view surround is common practice in
dermoscopy image analysis (no single source).

Pure: takes and returns in-memory images; the file layer is :mod:`curate.hash_files`.

The rule (constants below): a pixel is *dark* when its grey level is under
:data:`DARK_SHARE` of the median grey level of the picture's brighter pixels
(taken over every 4th pixel of every 4th row; and under at least
:data:`DARK_FLOOR`). The surround is every dark region that touches the picture's edge, taken only when it covers at least :data:`MIN_AREA`
of the picture, at most :data:`MAX_AREA`, and reaches at least
:data:`MIN_CORNERS` of its four corners: a dark lesion or shadow at one edge is
left alone, and so is a photograph without a surround. The surround is grown by
:data:`GROW` of the shorter side to cover the soft rim of the field.
"""

from __future__ import annotations

import numpy as np
from PIL import Image
from scipy import ndimage

__all__ = ["surround_mask", "fill_surround", "DARK_SHARE", "DARK_FLOOR"]

#: A pixel is dark under this share of the median grey level of the pixels above DARK_FLOOR.
DARK_SHARE = 0.35
#: ... and the darkness threshold is never below this grey level (0..255).
DARK_FLOOR = 24
#: Smallest share of the picture the surround must cover.
MIN_AREA = 0.02
#: Largest share (also once grown): a picture mostly dark is left alone.
MAX_AREA = 0.9
#: How many of the 4 corners the surround must reach.
MIN_CORNERS = 2
#: Growth of the surround, as a share of the shorter side (the rim of the field is soft).
GROW = 0.02


def surround_mask(grey: np.ndarray) -> np.ndarray:
    """Boolean mask of the dark surround of a round field of view (all False when there is none).

    Parameters
    ----------
    grey : ndarray
        2-D array of grey levels, 0..255.

    Examples
    --------
    >>> yy, xx = np.mgrid[:40, :40]
    >>> disc = np.where((yy - 19.5) ** 2 + (xx - 19.5) ** 2 < 19 ** 2, 180, 5)
    >>> m = surround_mask(disc)
    >>> bool(m[0, 0]), bool(m[20, 20])
    (True, False)
    >>> surround_mask(np.full((40, 40), 180)).any()
    np.False_
    """
    g = np.asarray(grey, dtype=np.float64)
    if g.ndim != 2:
        raise ValueError(f"expected a 2-D grey image, got shape {g.shape}")
    sample = g[::4, ::4]  # every 16th pixel gives the median; most pictures stop at the corners
    bright = sample[sample >= DARK_FLOOR]
    if bright.size == 0:
        return np.zeros(g.shape, bool)
    threshold = max(DARK_FLOOR, DARK_SHARE * float(np.median(bright)))
    if (g[[0, 0, -1, -1], [0, -1, 0, -1]] < threshold).sum() < MIN_CORNERS:
        return np.zeros(g.shape, bool)
    dark = g < threshold
    labels, n = ndimage.label(dark)
    if n == 0:
        return np.zeros(g.shape, bool)
    edge = np.unique(np.concatenate([labels[0], labels[-1], labels[:, 0], labels[:, -1]]))
    mask = np.isin(labels, edge[edge > 0])  # holds every dark corner: corners lie on the edge
    if not MIN_AREA <= mask.mean() <= MAX_AREA:
        return np.zeros(g.shape, bool)
    grow = max(1, round(GROW * min(g.shape)))
    mask = ndimage.binary_dilation(mask, iterations=grow)
    return mask if mask.mean() <= MAX_AREA else np.zeros(g.shape, bool)


def fill_surround(image: Image.Image) -> Image.Image:
    """The picture in RGB with the dark surround of its field of view filled with the skin's median colour.

    A picture without such a surround comes back unchanged (converted to RGB).

    Examples
    --------
    >>> disc = Image.new("RGB", (64, 64), (5, 5, 5))
    >>> from PIL import ImageDraw
    >>> ImageDraw.Draw(disc).ellipse((2, 2, 61, 61), fill=(190, 140, 120))
    >>> fill_surround(disc).getpixel((0, 0))
    (190, 140, 120)
    """
    if not isinstance(image, Image.Image):
        raise TypeError(f"expected a PIL.Image.Image, got {type(image).__name__}")
    rgb = image if image.mode == "RGB" else image.convert("RGB")
    mask = surround_mask(np.asarray(rgb.convert("L")))
    if not mask.any() or mask.all():
        return rgb
    pixels = np.array(rgb)
    pixels[mask] = np.median(pixels[~mask], axis=0).round().astype(np.uint8)
    return Image.fromarray(pixels)
