"""Second-stage crop check: is one image a crop of the other (possibly turned or flipped)?

Pure: takes two in-memory images (PIL) and returns a :class:`CropMatch`; it never
opens files. The file layer is :mod:`curate.crop_files`.

How a pair is checked:

1. Both images are made grey and reduced (:data:`WORK_SIDE` pixels on the long
   side for the fine search, where a smaller crop of a larger original keeps its own size;
   :data:`COARSE_SIDE` for the coarse one).
2. **Alignment.** Each image in turn plays the crop ("template") and the other the
   original. The template, in each of the 8 rotations/flips
   (:data:`curate.hashing.DIHEDRAL_TRANSFORMS` order), is scaled so that its width
   covers a share ``f`` of the original's width (its height follows its own aspect
   ratio), ``f`` on a grid over [:data:`MIN_KEEP`, 1]; every offset is scored by
   normalised cross-correlation (NCC, computed by FFT with running sums for the
   window statistics; the templates of one step go through the FFTs together, and
   each (orientation, width) is scored once per pair). All 16 (direction,
   orientation) choices are first tried at :data:`PROBE_SCALES`; when none reaches
   :data:`PROBE_MIN_NCC` the pair is not a crop, otherwise the best
   :data:`KEEP_ORIENTATIONS` go on to the full scale grid. The best (direction,
   orientation, scale) of the coarse search, when its NCC reaches
   :data:`COARSE_MIN_NCC`, is refined at the fine size on a finer grid around the
   coarse scale.
3. **Confirmation.** The aligned region of the original and the turned template are
   hashed again with :func:`curate.hashing.average_hash`,
   :func:`~curate.hashing.difference_hash`, :func:`~curate.hashing.dct_hash` and
   :func:`~curate.hashing.wavelet_hash`. A crop is *confirmed* when the NCC is at
   least :data:`MIN_NCC`, the NCC of the fine detail at least :data:`MIN_DETAIL_NCC`,
   **and** at least :data:`MIN_AGREEING` of these 4 hash families, the DCT hash among
   them, are within their :data:`CONFIRM_THRESHOLDS`, the 4 distances adding up to at
   most :data:`MAX_TOTAL` bits: several measures must agree, never one threshold on
   one hash. (The hashes are computed only when both NCC tests pass.)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from PIL import Image
from scipy import fft as sp_fft
from scipy.ndimage import gaussian_filter

from curate.hashing import (
    PIL_TRANSPOSE,
    average_hash,
    dct_hash,
    difference_hash,
    wavelet_hash,
)

__all__ = ["CropMatch", "check_crop", "MIN_NCC", "MIN_AGREEING", "CONFIRM_THRESHOLDS"]

#: Long side (pixels) of the grey images of the fine search and of the confirming hashes.
WORK_SIDE = 128
#: Long side (pixels) of the coarse search over all orientations, directions and scales.
COARSE_SIDE = 48
#: Smallest share of the original's width the crop may keep (a little under the 0.75 target).
MIN_KEEP = 0.70
#: Scales tried in the coarse search (share of the original's width).
COARSE_SCALES = np.linspace(MIN_KEEP, 1.0, 7)
#: Scales tried for every (direction, orientation) before the full scale search: a middle
#: crop, and the whole picture (a turned dermoscopic copy probed at 0.85 alone scored 0.55:
#: its round field of view does not line up at another scale).
PROBE_SCALES = (0.85, 1.0)
#: Smallest best NCC of those probes for the search to go on. Measured on a 5,000-image demo
#: (probing at 0.85): confirmed crops probed at 0.77 or more, half of the unrelated candidate
#: pairs under 0.62; a crop of scikit-image's "coins" photograph, cut at another scale, at 0.67.
PROBE_MIN_NCC = 0.60
#: How many (direction, orientation) choices go on to the full coarse scale search.
KEEP_ORIENTATIONS = 3
#: Smallest NCC of the best coarse alignment for the fine stage to run. On a 5,000-image demo
#: the 100 confirmed crops and turned copies among 1,600 checked pairs scored at least 0.97
#: coarse, and 47% of the unrelated pairs under 0.80 stop here. Textured photographs score
#: lower coarse than fine (the coarse grid misses the alignment by up to half a pixel): a
#: crop of scikit-image's "coins" scored 0.90 coarse and 0.98 fine, hence the margin.
COARSE_MIN_NCC = 0.80
#: Largest average-hash distance (bits) of the coarse alignment for the fine stage to run.
COARSE_MAX_AHASH = 12
#: Steps around the coarse scale tried in the fine search.
FINE_STEPS = np.linspace(-0.04, 0.04, 9)
#: Smallest normalised cross-correlation of the aligned region for a confirmed crop.
MIN_NCC = 0.95
#: Smallest NCC of the fine detail (image minus a Gaussian blur of sigma DETAIL_SIGMA pixels).
MIN_DETAIL_NCC = 0.5
#: Gaussian sigma (pixels at WORK_SIDE) separating fine detail from the smooth layout.
DETAIL_SIGMA = 2.0
#: Largest Hamming distance (bits, inclusive) at which each re-computed hash counts as agreeing.
CONFIRM_THRESHOLDS = {"ahash": 3, "dhash": 6, "phash": 6, "whash": 3}
#: How many of the 4 hash families must agree ...
MIN_AGREEING = 3
#: ... always including the DCT hash (whole look-alike demo lesions under a flip had the
#: average, difference and wavelet hashes agreeing but the DCT hash 10-20 bits apart) ...
REQUIRED_FAMILY = "phash"
#: ... with the 4 distances adding up to at most this many bits.
MAX_TOTAL = 12


@dataclass(frozen=True)
class CropMatch:
    """The best alignment of a crop inside an original, and the evidence for it.

    Attributes
    ----------
    confirmed : bool
        The alignment passes every confirmation rule (see the module docstring).
    crop_is_a : bool
        True when the first image given is the crop (of the second).
    orientation : int
        0..7: the rotation/flip (:data:`curate.hashing.DIHEDRAL_TRANSFORMS`) of the
        crop that aligns it with the original.
    scale : float
        Share of the original's width the crop covers.
    box : tuple of float
        (left, top, right, bottom) of the crop in the original, as fractions of its sides.
    ncc : float
        Normalised cross-correlation of the aligned region, -1..1.
    detail_ncc : float
        The same for the fine detail (image minus its Gaussian blur), -1..1.
    distances : dict
        Hamming distances (bits) of the re-computed hashes, by family; empty when the
        check stopped before them (the alignment could not be confirmed anyway).
    agreeing : int
        How many hash families are within :data:`CONFIRM_THRESHOLDS` (0 when not hashed).
    """

    confirmed: bool
    crop_is_a: bool
    orientation: int
    scale: float
    box: tuple
    ncc: float
    detail_ncc: float
    distances: dict
    agreeing: int


def _luma(image: Image.Image) -> Image.Image:
    if not isinstance(image, Image.Image):
        raise TypeError(f"expected a PIL.Image.Image, got {type(image).__name__}")
    return image.convert("L")


def _grey(luma: Image.Image, long_side: int) -> np.ndarray:
    f = long_side / max(luma.size)
    size = (max(8, round(luma.width * f)), max(8, round(luma.height * f)))
    return np.asarray(luma.resize(size, Image.Resampling.BILINEAR), dtype=np.float64)


def _turn(a: np.ndarray, t: int) -> np.ndarray:
    return (a, np.rot90(a, 1), np.rot90(a, 2), np.rot90(a, 3), a[:, ::-1], a[::-1, :], a.T,
            a[::-1, ::-1].T)[t]


def _running_sums(a: np.ndarray) -> np.ndarray:
    """Cumulative sums of the pixels and of their squares over both axes, each with a leading
    row and column of zeros (the sum over any window in 4 terms): shape (2, H + 1, W + 1)."""
    out = np.zeros((2, a.shape[0] + 1, a.shape[1] + 1))
    np.cumsum(np.stack([a, a * a]), axis=1, out=out[:, 1:, 1:])
    np.cumsum(out[:, 1:, 1:], axis=2, out=out[:, 1:, 1:])
    return out


#: Largest spectrum (bytes) of one batch of templates in one FFT call: under glibc's default
#: 128 KiB threshold above which each array is a fresh memory mapping, page-faulted on every call.
FFT_BATCH_BYTES = 120_000


class _Original:
    """An original image prepared for NCC of many templates: FFT and running sums, once.

    The FFTs are as long as the image (rounded up to a fast length): the correlation
    wraps around, but not at the offsets where the template fits inside the image.
    """

    def __init__(self, image: np.ndarray):
        self.image = image
        self.shape = H, W = image.shape
        self.fft_shape = (sp_fft.next_fast_len(H, real=True), sp_fft.next_fast_len(W, real=True))
        self.spectrum = sp_fft.rfft2(image, self.fft_shape, workers=1)
        self.sums = _running_sums(image)
        self._spread = {}  # (th, tw) -> square root of the window sums of squared deviations

    def _window_spread(self, th: int, tw: int) -> np.ndarray:
        if (th, tw) not in self._spread:
            c = self.sums
            s1, s2 = c[:, th:, tw:] - c[:, :-th, tw:] - c[:, th:, :-tw] + c[:, :-th, :-tw]
            self._spread[th, tw] = np.sqrt(np.maximum(s2 - s1 ** 2 / (th * tw), 0.0))
        return self._spread[th, tw]

    def ncc_maps(self, templates) -> list[np.ndarray]:
        """NCC of each template at every offset where it fits inside the image ('valid').

        The templates may differ in shape. They go through the FFTs in batches of at
        most :data:`FFT_BATCH_BYTES` of spectrum, one forward and one inverse call per
        batch (larger arrays cost page faults on every call); templates of one shape
        share the rest of the arithmetic.
        """
        by_shape = {}
        for k, template in enumerate(templates):
            by_shape.setdefault(template.shape, []).append(k)
        order = [k for ks in by_shape.values() for k in ks]
        per_batch = max(1, FFT_BATCH_BYTES // self.spectrum.nbytes)
        maps = [None] * len(templates)
        for start in range(0, len(order), per_batch):
            batch = order[start:start + per_batch]
            for k, m in zip(batch, self._ncc_batch([templates[k] for k in batch])):
                maps[k] = m
        return maps

    def _ncc_batch(self, templates) -> list[np.ndarray]:
        H, W = self.shape
        by_shape = {}
        for k, template in enumerate(templates):
            by_shape.setdefault(template.shape, []).append(k)
        stack = np.zeros((len(templates), *self.fft_shape))
        norms = {}
        for (th, tw), ks in by_shape.items():
            t = np.stack([templates[k] for k in ks]) if len(ks) > 1 else templates[ks[0]][None]
            t = t - (t.sum(axis=(1, 2)) / (th * tw))[:, None, None]
            norms[th, tw] = np.sqrt((t * t).sum(axis=(1, 2)))[:, None, None]
            stack[ks, :th, :tw] = t[:, ::-1, ::-1]
        product = self.spectrum * sp_fft.rfft2(stack, axes=(-2, -1), workers=1)
        full = sp_fft.irfft2(product, self.fft_shape, axes=(-2, -1), overwrite_x=True, workers=1)
        maps = [None] * len(templates)
        for (th, tw), ks in by_shape.items():
            n = th * tw
            den = self._window_spread(th, tw) * norms[th, tw]
            num = full[ks, th - 1:H, tw - 1:W]
            for k, m in zip(ks, np.where(den > 1e-6 * n, num / np.maximum(den, 1e-12), 0.0)):
                maps[k] = m
        return maps

    def ncc_map(self, template: np.ndarray) -> np.ndarray:
        """NCC of the template at every offset where it fits inside the image ('valid')."""
        return self.ncc_maps([template])[0]


def _ncc(x: np.ndarray, y: np.ndarray) -> float:
    """Normalised cross-correlation of two arrays of one shape (Pearson correlation)."""
    x, y = x - x.mean(), y - y.mean()
    den = np.sqrt((x * x).sum() * (y * y).sum())
    return float((x * y).sum() / den) if den > 1e-12 else 0.0


def _detail(a: np.ndarray) -> np.ndarray:
    """Fine detail: the image minus a Gaussian blur of it (a band-pass of the small image)."""
    return a - gaussian_filter(a, DETAIL_SIGMA, mode="nearest")


def _template_height(crop_hw, width: int, shape_hw) -> int | None:
    """Height of the crop resized to ``width`` pixels (aspect kept), or None when it does not fit."""
    h, w = crop_hw
    th = round(width * h / w)
    if width < 6 or th < 6 or width > shape_hw[1] or th > shape_hw[0] or th < MIN_KEEP * shape_hw[0] - 1:
        return None
    return th


class _Placements:
    """One image as the crop and the other as the original: best placements, each scored once.

    ``best`` answers what ``(orientation, scales)`` ask for; every template still missing
    (an orientation of the crop resized to one width) is scored in one batch of NCC maps.
    """

    def __init__(self, crop: np.ndarray, original: np.ndarray):
        self.original = _Original(original)
        self._crop = Image.fromarray(crop.astype(np.float32), mode="F")
        self._turned = {}  # orientation -> the crop turned, as a Pillow "F" image
        self._found = {}  # (orientation, width) -> (ncc, x, y, width, height), None when it does not fit
        self.templates = {}  # (orientation, width) -> template array

    def _template(self, t: int, width: int) -> np.ndarray | None:
        if t not in self._turned:
            self._turned[t] = self._crop if PIL_TRANSPOSE[t] is None else self._crop.transpose(PIL_TRANSPOSE[t])
        turned = self._turned[t]
        th = _template_height((turned.height, turned.width), width, self.original.shape)
        if th is None:
            return None
        img = turned.resize((width, th), Image.Resampling.BILINEAR)
        return np.frombuffer(img.tobytes(), np.float32).reshape(th, width).astype(np.float64)

    def _width(self, f) -> int:
        return round(f * self.original.shape[1])

    def best(self, requests) -> list[tuple[float, float, int, int, int, int]]:
        """(ncc, scale, x, y, width, height) of the best placement over the scales, per request.

        ``requests`` holds ``(orientation, scales)`` pairs. Scales outside
        [MIN_KEEP - 0.03, 1] and templates that do not fit are skipped; the first scale
        wins ties; ``(-2.0, 0.0, 0, 0, 0, 0)`` when nothing fits.
        """
        requests = [(t, [float(f) for f in scales if MIN_KEEP - 0.03 <= f <= 1.0]) for t, scales in requests]
        keys = [(t, self._width(f)) for t, scales in requests for f in scales]
        todo = []
        for key in dict.fromkeys(keys):
            if key not in self._found:
                template = self._template(*key)
                if template is None:
                    self._found[key] = None
                else:
                    todo.append(key)
                    self.templates[key] = template
        for key, m in zip(todo, self.original.ncc_maps([self.templates[key] for key in todo])):
            k = int(np.argmax(m))
            y, x = divmod(k, m.shape[1])
            th, tw = self.templates[key].shape
            self._found[key] = (float(m.flat[k]), x, y, tw, th)
        out = []
        for t, scales in requests:
            best = (-2.0, 0.0, 0, 0, 0, 0)
            for f in scales:
                found = self._found[t, self._width(f)]
                if found is not None and found[0] > best[0]:
                    best = (found[0], f, *found[1:])
            out.append(best)
        return out


def _hash_distances(region: Image.Image, crop: Image.Image) -> dict:
    return {
        "ahash": average_hash(region) - average_hash(crop),
        "dhash": difference_hash(region) - difference_hash(crop),
        "phash": dct_hash(region) - dct_hash(crop),
        "whash": wavelet_hash(region, image_scale=64) - wavelet_hash(crop, image_scale=64),
    }


def _stopped(crop_i, t, scale, ncc, box=(0.0, 0.0, 0.0, 0.0), detail_ncc=0.0) -> CropMatch:
    """The result of a check that stopped before the confirming hashes: not confirmed."""
    return CropMatch(False, crop_i == 0, int(t), float(scale), box, float(ncc), float(detail_ncc), {}, 0)


def check_crop(image_a: Image.Image, image_b: Image.Image) -> CropMatch:
    """Check whether one of two images is a crop (keeping >= 70% of the width) of the other.

    Either image may be the crop, in any of the 8 rotations/flips, at any size.

    Parameters
    ----------
    image_a, image_b : PIL.Image.Image
        The two pictures (any mode; reduced decodes are enough, about 128 pixels
        or more on the long side).

    Returns
    -------
    CropMatch
        The best alignment and whether it is confirmed.

    Notes
    -----
    Two alignments can score the same NCC in exact arithmetic: two pictures of one size
    compared whole, one direction against the other. Float rounding then picks one, and
    ``crop_is_a`` and ``orientation`` describe the same alignment from either side.

    Examples
    --------
    >>> import numpy as np
    >>> from PIL import Image
    >>> rng = np.random.default_rng(0)
    >>> big = Image.fromarray((rng.random((12, 16)) * 255).astype(np.uint8)).resize((160, 120))
    >>> m = check_crop(big, big.crop((10, 8, 150, 113)).rotate(90, expand=True))
    >>> m.confirmed, m.crop_is_a, m.orientation
    (True, False, 3)
    >>> check_crop(big, Image.linear_gradient("L").resize((120, 120))).confirmed
    False
    """
    luma = [_luma(image_a), _luma(image_b)]
    coarse = [_grey(luma[0], COARSE_SIDE), _grey(luma[1], COARSE_SIDE)]
    # placements of image a / b as the crop in the other
    searches = [_Placements(coarse[0], coarse[1]), _Placements(coarse[1], coarse[0])]
    # which image is the crop, and how it is turned: all 16 at one middle scale, then the
    # best few over every scale
    trials = []
    for crop_i in (0, 1):
        probes = searches[crop_i].best([(t, [f]) for t in range(8) for f in PROBE_SCALES])
        for t in range(8):
            ncc = max(p[0] for p in probes[t * len(PROBE_SCALES):(t + 1) * len(PROBE_SCALES)])
            trials.append((ncc, crop_i, t))
    if max(trials)[0] < PROBE_MIN_NCC:  # nothing lines up even roughly: not a crop
        _, crop_i, t = max(trials)
        return _stopped(crop_i, t, PROBE_SCALES[0], max(trials)[0])
    kept = sorted(trials, reverse=True)[:KEEP_ORIENTATIONS]
    for crop_i in (0, 1):  # score every kept orientation of one direction in one batch
        searches[crop_i].best([(t, COARSE_SCALES) for _, i, t in kept if i == crop_i])
    best = None
    for _, crop_i, t in kept:
        ncc, f, *_ = searches[crop_i].best([(t, COARSE_SCALES)])[0]
        if best is None or ncc > best[0]:
            best = (ncc, crop_i, t, f)
    coarse_ncc, crop_i, t, f0 = best
    if coarse_ncc < COARSE_MIN_NCC:
        return _stopped(crop_i, t, f0, coarse_ncc)
    # early reject: the coarse aligned region must already look like the crop (average hash)
    _, _, x, y, w, h = searches[crop_i].best([(t, [f0])])[0]
    piece = Image.fromarray(np.clip(searches[crop_i].original.image[y:y + h, x:x + w], 0, 255).astype(np.uint8))
    rough = Image.fromarray(np.clip(_turn(coarse[crop_i], t), 0, 255).astype(np.uint8))
    if w == 0 or average_hash(piece) - average_hash(rough) > COARSE_MAX_AHASH:
        return _stopped(crop_i, t, f0, coarse_ncc)
    # both sides resampled alike: where the original is reduced to WORK_SIDE, a smaller crop is
    # not enlarged first (its templates are then resized from it once): a 107-pixel crop of a
    # 150-pixel picture, enlarged first, lost 0.02 of NCC (0.939 vs 0.956). Where the original
    # is enlarged too, both carry the same blur: a star-field crop (scikit-image's
    # hubble_deep_field) scored 0.956 enlarged and 0.946 not.
    crop_side = WORK_SIDE if max(luma[1 - crop_i].size) <= WORK_SIDE else min(WORK_SIDE, max(luma[crop_i].size))
    fine = [_grey(l, crop_side if i == crop_i else WORK_SIDE) for i, l in enumerate(luma)]
    original = fine[1 - crop_i]
    search = _Placements(fine[crop_i], original)
    ncc, f, x, y, w, h = search.best([(t, f0 + FINE_STEPS)])[0]
    if w == 0:  # nothing fits at the fine size
        return _stopped(crop_i, t, f0, coarse_ncc)
    piece = original[y:y + h, x:x + w]
    template = search.templates[t, w]
    detail_ncc = _ncc(_detail(piece), _detail(template))
    H, W = original.shape
    box = (x / W, y / H, (x + w) / W, (y + h) / H)
    if ncc < MIN_NCC or detail_ncc < MIN_DETAIL_NCC:  # cannot be confirmed: the hashes are not needed
        return _stopped(crop_i, t, f, ncc, box, detail_ncc)
    region = Image.fromarray(np.clip(piece, 0, 255).astype(np.uint8))
    turned = luma[crop_i]
    if PIL_TRANSPOSE[t] is not None:
        turned = turned.transpose(PIL_TRANSPOSE[t])
    if max(turned.size) > 4 * WORK_SIDE:
        turned = Image.fromarray(np.clip(_turn(fine[crop_i], t), 0, 255).astype(np.uint8))
    distances = {k: int(v) for k, v in _hash_distances(region, turned).items()}
    agreeing = sum(distances[k] <= CONFIRM_THRESHOLDS[k] for k in CONFIRM_THRESHOLDS)
    confirmed = (agreeing >= MIN_AGREEING
                 and distances[REQUIRED_FAMILY] <= CONFIRM_THRESHOLDS[REQUIRED_FAMILY]
                 and sum(distances.values()) <= MAX_TOTAL)
    return CropMatch(bool(confirmed), crop_i == 0, int(t), float(f), box, float(ncc), float(detail_ncc),
                     distances, int(agreeing))
