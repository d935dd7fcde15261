"""Procedural skin-lesion-like pictures for the demo scenario (numpy + Pillow, in memory).

Nothing here reads or writes files: functions take parameters and a seed and
return ``uint8`` RGB arrays. The pictures are invented; they only have to look
enough like clinical photographs and dermoscopy images for the curation steps
(hashing, near-duplicate search, skin-tone estimates) to have something real
to work on. They carry no medical meaning.

A lesion has a stable identity (:class:`LesionLook`: boundary harmonics,
colour palette, internal pattern seed), so every visit of the same lesion is
drawn from the same description with a different pose, size, lighting, hair
and camera noise: the same lesion, never a copy.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, replace

import numpy as np
from PIL import Image, ImageChops, ImageDraw

# --- colour -------------------------------------------------------------------------

# CIE standard illuminant D65 white point (X, Y, Z), Y normalised to 1 (common practice).
_D65 = np.array([0.95047, 1.0, 1.08883])
# linear sRGB from CIE XYZ (IEC 61966-2-1 sRGB matrix, from memory).
_XYZ_TO_RGB = np.array(
    [
        [3.2404542, -1.5371385, -0.4985314],
        [-0.9692660, 1.8760108, 0.0415560],
        [0.0556434, -0.2040259, 1.0572252],
    ]
)


def lab_to_srgb(lab) -> np.ndarray:
    """Convert CIE 1976 L*a*b* (D65) colours to sRGB in 0..1.

    Parameters
    ----------
    lab : array_like, shape (..., 3)
        L* in 0..100, a* and b* roughly -128..127.

    Returns
    -------
    numpy.ndarray
        sRGB values in 0..1, clipped, same leading shape.

    Notes
    -----
    The CIE L*a*b* to XYZ inverse and the sRGB transfer curve (IEC 61966-2-1),
    written out from the standard formulas.

    Examples
    --------
    >>> lab_to_srgb([100.0, 0.0, 0.0]).round(3)
    array([1., 1., 1.])
    >>> lab_to_srgb([0.0, 0.0, 0.0]).round(3)
    array([0., 0., 0.])
    """
    lab = np.asarray(lab, dtype=float)
    fy = (lab[..., 0] + 16.0) / 116.0
    fx = fy + lab[..., 1] / 500.0
    fz = fy - lab[..., 2] / 200.0
    f = np.stack([fx, fy, fz], axis=-1)
    eps = 6.0 / 29.0
    xyz = np.where(f > eps, f**3, 3 * eps**2 * (f - 4.0 / 29.0)) * _D65
    rgb = xyz @ _XYZ_TO_RGB.T
    rgb = np.clip(rgb, 0.0, 1.0)
    return np.where(rgb <= 0.0031308, 12.92 * rgb, 1.055 * rgb ** (1 / 2.4) - 0.055)


def skin_lab(ita_degrees: float, b_star: float, a_star: float) -> tuple[float, float, float]:
    """The L*a*b* colour of skin with a given Individual Typology Angle (ITA).

    ITA = arctan((L* - 50) / b*) in degrees (common practice in dermatology
    colorimetry), so L* = 50 + b* tan(ITA).

    Examples
    --------
    >>> skin_lab(45.0, 15.0, 10.0)
    (65.0, 10.0, 15.0)
    """
    if not -89.0 < ita_degrees < 89.0:
        raise ValueError(f"ita_degrees must lie in (-89, 89), got {ita_degrees}")
    L = 50.0 + b_star * float(np.tan(np.radians(ita_degrees)))
    return (round(float(np.clip(L, 5.0, 95.0)), 6), float(a_star), float(b_star))


# --- lesion identity ------------------------------------------------------------------

# Palettes per look (L*, a*, b*): the colours a lesion is mixed from. Invented values.
PALETTES: dict[str, list[tuple[float, float, float]]] = {
    "naevus": [(45, 14, 24), (35, 12, 18), (55, 13, 24)],
    "dysplastic": [(48, 15, 26), (32, 12, 16), (58, 16, 20), (40, 20, 22)],
    "blue": [(40, -2, -12), (30, 0, -8), (50, -4, -6)],
    "melanoma": [(30, 8, 10), (15, 2, 2), (45, 14, 22), (42, 0, -14), (48, 35, 20)],
    "pink": [(62, 28, 12), (70, 20, 10), (55, 35, 14)],
    "red": [(45, 48, 24), (38, 42, 18), (55, 40, 20)],
    "scaly": [(65, 22, 14), (78, 6, 10), (58, 30, 16)],
    "keratosis": [(40, 10, 22), (30, 6, 12), (55, 8, 24)],
    "lentigo": [(58, 12, 26), (52, 13, 26), (64, 10, 24)],
    "wart": [(66, 6, 16), (58, 5, 12), (72, 4, 14)],
}

#: look of each demo diagnosis: palette name, edge softness, annular (ring-shaped)
DIAGNOSIS_LOOK: dict[str, tuple[str, float, bool]] = {
    "superficial_spreading_melanoma": ("melanoma", 0.06, False),
    "nodular_melanoma": ("melanoma", 0.04, False),
    "lentigo_maligna_melanoma": ("melanoma", 0.12, False),
    "melanoma_in_situ": ("dysplastic", 0.08, False),
    "junctional_naevus": ("naevus", 0.06, False),
    "compound_naevus": ("naevus", 0.05, False),
    "dermal_naevus": ("wart", 0.08, False),
    "dysplastic_naevus": ("dysplastic", 0.10, False),
    "blue_naevus": ("blue", 0.10, False),
    "basal_cell_carcinoma": ("pink", 0.08, False),
    "squamous_cell_carcinoma": ("scaly", 0.08, False),
    "actinic_keratosis": ("scaly", 0.15, False),
    "bowen_disease": ("red", 0.10, False),
    "seborrhoeic_keratosis": ("keratosis", 0.04, False),
    "solar_lentigo": ("lentigo", 0.12, False),
    "dermatofibroma": ("naevus", 0.15, False),
    "haemangioma": ("red", 0.04, False),
    "pyogenic_granuloma": ("red", 0.03, False),
    "psoriasis": ("scaly", 0.10, False),
    "eczema": ("pink", 0.25, False),
    "tinea": ("pink", 0.10, True),
    "viral_wart": ("wart", 0.05, False),
}

_LOCAL_SIZE = 128  # side of the lesion-local canvas, in pixels
_LOCAL_EXTENT = 1.6  # the local canvas spans u, v in [-extent, extent] radii


@dataclass(frozen=True)
class LesionLook:
    """What stays the same about one lesion across visits.

    Parameters
    ----------
    shape_seed : int
        Seeds the boundary harmonics and the internal pattern.
    palette : tuple of (L*, a*, b*) tuples
        Colours the lesion is mixed from.
    edge_softness : float
        Width of the boundary blur, as a share of the radius.
    annular : bool
        Ring-shaped (clear centre), as for tinea.
    size : float
        Radius as a share of the shorter image side at the first visit.
    elongation : float
        Ratio of the long to the short axis (>= 1).
    """

    shape_seed: int
    palette: tuple
    edge_softness: float = 0.06
    annular: bool = False
    size: float = 0.12
    elongation: float = 1.2

    def with_new_shape(self, shape_seed: int) -> "LesionLook":
        """A look-alike: same colours, size and softness, a different shape and pattern."""
        return replace(self, shape_seed=int(shape_seed))


def lesion_look(diagnosis: str, rng: np.random.Generator) -> LesionLook:
    """Draw a lesion identity for a demo diagnosis id.

    Examples
    --------
    >>> look = lesion_look("compound_naevus", np.random.default_rng(0))
    >>> look.annular, 0.05 <= look.size <= 0.2
    (False, True)
    """
    try:
        palette_name, edge, annular = DIAGNOSIS_LOOK[diagnosis]
    except KeyError:
        raise ValueError(f"unknown demo diagnosis {diagnosis!r}") from None
    base = np.array(PALETTES[palette_name], dtype=float)
    jitter = rng.normal(0.0, [3.0, 2.0, 2.5], size=base.shape)
    palette = tuple(tuple(round(float(v), 3) for v in row) for row in base + jitter)
    return LesionLook(
        shape_seed=int(rng.integers(2**31)),
        palette=palette,
        edge_softness=float(edge * rng.uniform(0.8, 1.25)),
        annular=bool(annular),
        size=float(rng.uniform(0.06, 0.18)),
        elongation=float(rng.uniform(1.0, 1.6)),
    )


def _local_lesion(look: LesionLook, visit_seed: int) -> Image.Image:
    """The lesion drawn in its own coordinates: an RGBA canvas, alpha = lesion coverage.

    The outline (boundary harmonics) and internal pattern come from
    ``look.shape_seed``; ``visit_seed`` changes the outline a little.
    """
    rng = np.random.default_rng(look.shape_seed)
    k = np.arange(2, 9, dtype=np.float32)
    amp = (rng.uniform(0.0, 1.0, k.size) * 0.22 / k**0.9).astype(np.float32)
    phase = rng.uniform(0, 2 * np.pi, k.size).astype(np.float32)
    n_colours = len(look.palette)
    coarse = rng.standard_normal((n_colours + 1, 7, 7)).astype(np.float32)
    dots_yx = rng.uniform(0.2, 0.8, size=(int(rng.integers(3, 25)), 2))
    dots_w = rng.uniform(0.5, 1.0, len(dots_yx))
    vr = np.random.default_rng(visit_seed)  # small visit-to-visit change of the outline
    amp = amp * vr.uniform(0.9, 1.1, k.size).astype(np.float32)
    phase = phase + vr.normal(0.0, 0.05, k.size).astype(np.float32)

    n = _LOCAL_SIZE
    axis = np.linspace(-_LOCAL_EXTENT, _LOCAL_EXTENT, n, dtype=np.float32)
    u, v = axis[None, :], axis[:, None]
    rho = np.sqrt(u * u + v * v)
    theta = np.arctan2(v, u)
    bound = 1.0 + np.tensordot(amp, np.cos(np.multiply.outer(k, theta) + phase[:, None, None]), 1)
    edge = max(look.edge_softness, 0.02)
    alpha = np.clip((bound - rho) / edge, 0.0, 1.0)
    if look.annular:
        alpha = alpha * np.clip((rho - 0.6 * bound) / (edge * 2), 0.0, 1.0)
    pattern = np.stack([_upsample(c, n, n) for c in coarse])
    dots = np.zeros((n, n), np.float32)
    yx = (dots_yx * n).astype(int)
    dots[yx[:, 0], yx[:, 1]] = dots_w * 40.0
    dots = _upsample(np.asarray(Image.fromarray(dots, mode="F").resize((24, 24), Image.Resampling.BOX)), n, n)
    logits = pattern[:n_colours] * 1.6
    logits[0] += 0.8 * (1.0 - rho)  # centre tends to the first colour
    if n_colours > 1:
        logits[1] += dots  # dots and globules in the darker colour
    weights = np.exp(logits - logits.max(axis=0))
    weights /= weights.sum(axis=0)
    palette = lab_to_srgb(np.asarray(look.palette)).astype(np.float32)
    colour = np.tensordot(weights.transpose(1, 2, 0), palette, 1)
    opacity = alpha * np.clip(0.85 + 0.1 * pattern[-1], 0.6, 1.0)
    rgba = np.concatenate([colour, opacity[..., None]], axis=-1)
    return Image.fromarray((rgba * 255.0 + 0.5).astype(np.uint8), mode="RGBA")


def _upsample(a: np.ndarray, width: int, height: int) -> np.ndarray:
    """Smoothly enlarge a small float field (bicubic, Pillow 'F' mode)."""
    img = Image.fromarray(np.ascontiguousarray(a, dtype=np.float32), mode="F")
    return np.asarray(img.resize((width, height), Image.Resampling.BICUBIC), dtype=np.float32)


# --- one picture -------------------------------------------------------------------


@dataclass(frozen=True)
class Capture:
    """How one photograph of a lesion is taken (what changes between visits).

    Parameters
    ----------
    modality : {"clinical", "dermoscopic"}
    width, height : int
        Picture size in pixels.
    skin_lab : (L*, a*, b*)
        The patient's skin colour.
    growth : float
        Lesion radius multiplier relative to the first visit.
    angle : float
        Lesion rotation in radians.
    centre : (float, float)
        Lesion centre as shares of width and height.
    zoom : float
        Radius multiplier for the framing (dermoscopy frames the lesion larger).
    brightness : float
        Overall lighting multiplier.
    light_angle : float
        Direction of the shading gradient, radians.
    white_balance : (float, float, float)
        Per-channel gains of the camera.
    hair : int
        Number of hair strands.
    ruler : bool
        Draw ruler marks.
    falloff : float
        How much the skin darkens towards one side (a limb curving away), 0..0.6.
    falloff_angle : float
        Direction of that darkening, radians.
    drape : tuple, optional
        ``(angle, offset, (r, g, b))``: beyond a line at ``offset`` (-1..1 along
        ``angle``) the picture shows a drape or background of that colour (0..1).
    seed : int
        Seeds the skin texture, hair, noise and the small visit change of the outline.
    """

    modality: str
    width: int
    height: int
    skin_lab: tuple
    growth: float = 1.0
    angle: float = 0.0
    centre: tuple = (0.5, 0.5)
    zoom: float = 1.0
    brightness: float = 1.0
    light_angle: float = 0.0
    white_balance: tuple = (1.0, 1.0, 1.0)
    hair: int = 0
    ruler: bool = False
    falloff: float = 0.0
    falloff_angle: float = 0.0
    drape: tuple | None = None
    seed: int = 0


def draw_lesion(look: LesionLook, capture: Capture) -> np.ndarray:
    """Draw one picture of a lesion.

    Parameters
    ----------
    look : LesionLook
        The lesion's identity.
    capture : Capture
        Modality, size, skin, pose, lighting and per-picture seed.

    Returns
    -------
    numpy.ndarray
        ``uint8`` array of shape (height, width, 3).

    Notes
    -----
    Deterministic: the same look and capture give the same pixels. Smooth
    fields (shading, lesion) are computed small and enlarged by Pillow; only
    the fine grain is drawn at full size, so a 600x450 picture takes a few
    milliseconds.

    Examples
    --------
    >>> look = lesion_look("superficial_spreading_melanoma", np.random.default_rng(1))
    >>> cap = Capture("dermoscopic", 64, 64, skin_lab(40.0, 16.0, 10.0), seed=3)
    >>> a = draw_lesion(look, cap)
    >>> a.shape, a.dtype, bool((a == draw_lesion(look, cap)).all())
    ((64, 64, 3), dtype('uint8'), True)
    """
    return np.asarray(draw_lesion_image(look, capture))


def draw_lesion_image(look: LesionLook, capture: Capture) -> Image.Image:
    """:func:`draw_lesion` as a Pillow RGB image (what the demo writer encodes).

    Examples
    --------
    >>> look = lesion_look("blue_naevus", np.random.default_rng(2))
    >>> draw_lesion_image(look, Capture("clinical", 40, 30, skin_lab(20.0, 14.0, 9.0))).size
    (40, 30)
    """
    if capture.modality not in ("clinical", "dermoscopic"):
        raise ValueError(f"modality must be 'clinical' or 'dermoscopic', got {capture.modality!r}")
    w, h = int(capture.width), int(capture.height)
    if w < 16 or h < 16:
        raise ValueError(f"picture size must be at least 16x16 pixels, got {w}x{h}")
    rng = np.random.default_rng(capture.seed)

    img = _skin(capture, w, h, rng)
    placed = _placed_lesion(look, capture, w, h)
    if placed is not None:
        layer, corner = placed
        img.paste(layer, corner, mask=layer)  # alpha-blend the lesion onto the skin
    if capture.hair:
        _draw_hair(img, capture.hair, rng)
    if capture.ruler:
        _draw_ruler(img, rng)
    gains = capture.brightness * np.asarray(capture.white_balance, dtype=float)
    ramp = np.arange(256, dtype=float)
    lut = np.concatenate([np.clip(ramp * g + 0.5, 0, 255) for g in gains]).astype(int)
    img = img.point(lut.tolist())
    if capture.modality == "dermoscopic":
        img = Image.composite(img, Image.new("RGB", (w, h), (6, 5, 5)), _field_mask(w, h))
    # camera grain: a triangular distribution from random bytes (cheap), -7..7 levels
    noise = np.frombuffer(rng.bytes(h * w), dtype=np.uint8).reshape(h, w)
    grain = Image.fromarray(((noise & 15) >> 1) + 7 - (noise >> 5), mode="L")
    return ImageChops.add(img, Image.merge("RGB", (grain, grain, grain)), scale=1.0, offset=-7)


def _skin(cap: Capture, w: int, h: int, rng: np.random.Generator) -> Image.Image:
    """Skin colour with lighting gradient, blotches and pore-scale texture (drawn small)."""
    sw, sh = max(w // 4, 4), max(h // 4, 4)
    skin = lab_to_srgb(cap.skin_lab).astype(np.float32)
    yy = np.linspace(-1.0, 1.0, sh, dtype=np.float32)[:, None]
    xx = np.linspace(-1.0, 1.0, sw, dtype=np.float32)[None, :]
    shade = 1.0 + 0.1 * (xx * np.cos(cap.light_angle) + yy * np.sin(cap.light_angle))
    shade = shade + 0.04 * _upsample(rng.standard_normal((5, 6)), sw, sh)
    shade = shade + 0.02 * rng.standard_normal((sh, sw), dtype=np.float32)
    if cap.falloff:
        side = xx * np.cos(cap.falloff_angle) + yy * np.sin(cap.falloff_angle)
        shade = shade * (1.0 - cap.falloff * np.clip(side, 0.0, 1.0) ** 2)
    small = skin[None, None, :] * shade[..., None]
    redness = _upsample(rng.standard_normal((4, 5)), sw, sh)
    small[..., 0] += 0.02 * redness
    small[..., 2] -= 0.01 * redness
    if cap.drape is not None:
        angle, offset, colour = cap.drape
        along = xx * np.cos(angle) + yy * np.sin(angle) + 0.08 * np.sin(3.0 * (yy * np.cos(angle) - xx * np.sin(angle)))
        cover = np.clip((along - offset) / 0.03, 0.0, 1.0)[..., None]
        cloth = np.asarray(colour, np.float32) * (1.0 + 0.05 * rng.standard_normal((sh, sw, 1), dtype=np.float32))
        small = small * (1.0 - cover) + cloth * cover
    small = np.clip(small * 255.0 + 0.5, 0, 255).astype(np.uint8)
    return Image.fromarray(small, mode="RGB").resize((w, h), Image.Resampling.BILINEAR)


def _placed_lesion(look: LesionLook, cap: Capture, w: int, h: int):
    """The local lesion canvas rotated, scaled and moved into place.

    Returns the RGBA layer covering the lesion's bounding box and the box's
    top-left corner in the picture (``None`` when the lesion lies outside).
    """
    local = _local_lesion(look, cap.seed)
    radius = max(look.size * cap.zoom * cap.growth * min(w, h), 3.0)
    cx, cy = cap.centre[0] * w, cap.centre[1] * h
    c, s = float(np.cos(cap.angle)), float(np.sin(cap.angle))
    ru, rv = radius * look.elongation, radius
    # bounding box of the rotated local canvas (half-sides extent * ru and extent * rv)
    reach_x = _LOCAL_EXTENT * (abs(c) * ru + abs(s) * rv) + 2
    reach_y = _LOCAL_EXTENT * (abs(s) * ru + abs(c) * rv) + 2
    x0, y0 = int(max(cx - reach_x, 0)), int(max(cy - reach_y, 0))
    x1, y1 = int(min(cx + reach_x + 1, w)), int(min(cy + reach_y + 1, h))
    if x1 <= x0 or y1 <= y0:
        return None
    # box pixel (x, y) -> picture (x + x0, y + y0) -> local (u, v) in radii -> canvas pixel
    k = (_LOCAL_SIZE - 1) / (2 * _LOCAL_EXTENT)
    a, b = k * c / ru, k * s / ru
    d, e = -k * s / rv, k * c / rv
    off = (_LOCAL_SIZE - 1) / 2
    px, py = x0 - cx, y0 - cy
    data = (a, b, off + a * px + b * py, d, e, off + d * px + e * py)
    layer = local.transform((x1 - x0, y1 - y0), Image.Transform.AFFINE, data, Image.Resampling.BILINEAR)
    return layer, (x0, y0)


@functools.lru_cache(maxsize=8)
def _field_mask(w: int, h: int) -> Image.Image:
    """Dermoscope field: 255 inside a soft-edged circle, falling to 0 outside."""
    sw, sh = max(w // 4, 8), max(h // 4, 8)
    yy = np.linspace(-1.0, 1.0, sh, dtype=np.float32)[:, None] * max(h / w, 1.0)
    xx = np.linspace(-1.0, 1.0, sw, dtype=np.float32)[None, :] * max(w / h, 1.0)
    rr = np.sqrt(xx**2 + yy**2)
    field = np.clip((0.98 - rr) / 0.04, 0.0, 1.0) * (1.0 - 0.3 * np.clip(rr, 0, 1) ** 4)
    mask = Image.fromarray((field * 255 + 0.5).astype(np.uint8), mode="L")
    return mask.resize((w, h), Image.Resampling.BILINEAR)


def _draw_hair(img: Image.Image, count: int, rng: np.random.Generator) -> None:
    """Dark curved hair strands (quadratic curves), drawn in place."""
    w, h = img.size
    draw = ImageDraw.Draw(img)
    t = np.linspace(0.0, 1.0, 24)[:, None]
    for _ in range(int(count)):
        p = rng.uniform([-0.1 * w, -0.1 * h], [1.1 * w, 1.1 * h], size=(3, 2))
        pts = (1 - t) ** 2 * p[0] + 2 * (1 - t) * t * p[1] + t**2 * p[2]
        width = int(rng.integers(1, 3 if max(w, h) < 800 else 5))
        shade = tuple(int(x) for x in rng.integers(15, 45, 3))
        draw.line([tuple(q) for q in pts], fill=shade, width=width)


def _draw_ruler(img: Image.Image, rng: np.random.Generator) -> None:
    """A pale ruler strip with ticks along the bottom edge, drawn in place."""
    w, h = img.size
    band = max(h // 12, 6)
    draw = ImageDraw.Draw(img)
    draw.rectangle([0, h - band, w, h], fill=(226, 224, 214))
    step = max(w // 40, 4)
    start = int(rng.integers(0, step))
    for i, x in enumerate(range(start, w, step)):
        tick = band if i % 10 == 0 else (band * 2 // 3 if i % 5 == 0 else band // 3)
        draw.line([(x, h - tick), (x, h)], fill=(30, 30, 30), width=1)
