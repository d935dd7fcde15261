"""Skin tone: our sRGB -> CIE L*a*b* against scikit-image and CIE values; ITA and its bins."""

import numpy as np
import pandas as pd
import pytest

from curate.skin_tone import ITA_BINS, estimate_ita, ita, ita_bin, skin_mask, skin_pixels_lab, srgb_to_lab

skcolor = pytest.importorskip("skimage.color")


def test_lab_matches_scikit_image_rgb2lab():
    # reference: scikit-image skimage.color.rgb2lab (illuminant D65, 2 degree observer)
    rng = np.random.default_rng(0)
    rgb = rng.integers(0, 256, size=(50, 40, 3), dtype=np.uint8)
    ours = srgb_to_lab(rgb)
    theirs = skcolor.rgb2lab(rgb)
    # scikit-image uses a longer-decimal matrix and white point; ours is the 4-decimal
    # IEC 61966-2-1 matrix with its own white, so allow 0.05 units
    np.testing.assert_allclose(ours, theirs, atol=0.05)


def test_float_input_matches_uint8():
    rgb = np.array([[12, 200, 99]], dtype=np.uint8)
    np.testing.assert_allclose(srgb_to_lab(rgb), srgb_to_lab(rgb / 255.0))


@pytest.mark.parametrize(
    "rgb, lab, tol",
    [
        # CIE 15 (L*a*b*) with IEC 61966-2-1 sRGB: white is the reference white -> (100, 0, 0)
        ((255, 255, 255), (100.0, 0.0, 0.0), 1e-6),
        # black -> L* = 0
        ((0, 0, 0), (0.0, 0.0, 0.0), 1e-9),
        # sRGB mid grey 128: Y = 0.2158, L* = 53.585 (from memory); greys have a* = b* = 0
        ((128, 128, 128), (53.585, 0.0, 0.0), 2e-3),
        # sRGB primaries, published values for D65 (from memory): red (53.24, 80.09, 67.20)
        ((255, 0, 0), (53.24, 80.09, 67.20), 0.1),
        # green (87.73, -86.18, 83.18), blue (32.30, 79.19, -107.86) (from memory)
        ((0, 255, 0), (87.73, -86.18, 83.18), 0.15),
        ((0, 0, 255), (32.30, 79.19, -107.86), 0.15),
    ],
)
def test_lab_reference_values(rgb, lab, tol):
    got = srgb_to_lab(np.array(rgb, dtype=np.uint8))
    np.testing.assert_allclose(got, lab, atol=tol)


def test_bad_rgb_input():
    with pytest.raises(ValueError):
        srgb_to_lab(np.zeros((4, 4)))
    with pytest.raises(ValueError):
        srgb_to_lab(np.full(3, 2.0))
    with pytest.raises(TypeError):
        srgb_to_lab(np.zeros(3, dtype=np.int32))


@pytest.mark.parametrize("L, b", [(75.0, 12.0), (65.0, 18.0), (55.0, 20.0), (45.0, 22.0), (30.0, 20.0),
                                  (20.0, 10.0)])
def test_ita_of_synthetic_patches_built_with_lab2rgb(L, b):
    # patches whose L* and b* are set exactly, built with scikit-image skimage.color.lab2rgb
    lab = np.zeros((16, 16, 3))
    lab[..., 0], lab[..., 1], lab[..., 2] = L, 8.0, b
    rgb = skcolor.lab2rgb(lab)
    expected = np.degrees(np.arctan((L - 50.0) / b))  # ITA definition, Chardon et al. 1991
    got = estimate_ita(rgb, dark_fraction=0.0)
    # 8-bit-free float patch: only the two colour conversions' differences remain
    assert got == pytest.approx(expected, abs=0.3)
    rgb8 = np.round(rgb * 255).astype(np.uint8)
    assert estimate_ita(rgb8, dark_fraction=0.0) == pytest.approx(expected, abs=1.0)


def test_ita_formula_and_b_zero():
    assert float(ita(60.0, 10.0)) == pytest.approx(45.0)
    assert float(ita(40.0, 10.0)) == pytest.approx(-45.0)
    assert float(ita(70.0, 0.0)) == 90.0 and float(ita(30.0, 0.0)) == -90.0
    # negative b*: same value as arctan((L - 50) / b) (no jump of 180 degrees)
    assert float(ita(60.0, -10.0)) == pytest.approx(np.degrees(np.arctan(10 / -10)))
    assert np.all(np.abs(ita(np.linspace(0, 100, 11), np.linspace(-30, 30, 11))) <= 90)


def test_bins_and_boundaries():
    # six categories of Del Bino et al. 2006 (very light > 55, light 41-55, intermediate 28-41,
    # tan 10-28, brown -30-10, dark < -30)
    assert [name for name, _ in ITA_BINS] == ["very_light", "light", "intermediate", "tan", "brown", "dark"]
    values = [70, 55.01, 55, 41.01, 41, 28.01, 28, 10.01, 10, -29.99, -30, -60]
    assert ita_bin(values).tolist() == [
        "very_light", "very_light", "light", "light", "intermediate", "intermediate", "tan", "tan",
        "brown", "brown", "dark", "dark"]


def test_estimate_ignores_a_dark_centred_lesion_and_hair():
    lab = np.zeros((64, 64, 3))
    lab[..., 0], lab[..., 1], lab[..., 2] = 68.0, 10.0, 16.0
    lab[16:48, 16:48] = (25.0, 15.0, 20.0)  # lesion in the centre
    lab[:, 3] = (15.0, 0.0, 2.0)  # a hair crossing the border band
    rgb = skcolor.lab2rgb(lab)
    expected = np.degrees(np.arctan((68.0 - 50.0) / 16.0))
    assert estimate_ita(rgb) == pytest.approx(expected, abs=0.5)


def test_dermoscopic_circular_field_uses_the_ring():
    h = w = 100
    lab = np.zeros((h, w, 3))
    lab[..., 0], lab[..., 1], lab[..., 2] = 60.0, 10.0, 20.0
    yy, xx = np.mgrid[0:h, 0:w]
    r = np.hypot(yy - 49.5, xx - 49.5) / 50
    lab[r > 0.95] = (3.0, 0.0, 0.0)  # black surround outside the field
    lab[(r > 0.85) & (r <= 0.95), 0] = 35.0  # vignetting at the field's edge
    rgb = skcolor.lab2rgb(lab)
    expected = np.degrees(np.arctan((60.0 - 50.0) / 20.0))
    assert estimate_ita(rgb) == pytest.approx(expected, abs=0.5)
    # the plain border band would sample the vignette and the surround
    assert abs(estimate_ita(rgb, field="band") - expected) > 5


def test_mask_and_too_few_pixels():
    assert skin_mask((10, 10), field="band", border_fraction=0.1).sum() == 36
    with pytest.raises(ValueError):
        skin_mask((10, 10), field="square")
    black = np.zeros((30, 30, 3), dtype=np.uint8)
    assert np.isnan(estimate_ita(black))
    assert skin_pixels_lab(black).shape == (0, 3)


def test_workspace_estimate_in_two_processes_matches_one_file_at_a_time(tmp_path):
    from PIL import Image

    from curate.ingest import scan_folder
    from curate.skin_tone_files import estimate_skin_tone, image_ita
    from curate.store import Workspace

    rng = np.random.default_rng(3)
    folder = tmp_path / "photos"
    folder.mkdir()
    for k in range(40):
        skin = np.array([200, 150, 120]) - k * 3  # darker skin file by file
        pixels = np.clip(skin + rng.normal(0, 6, (64, 64, 3)), 0, 255).astype(np.uint8)
        pixels[24:40, 24:40] = (70, 45, 35)  # a dark lesion in the middle
        Image.fromarray(pixels).save(folder / f"p{k:02d}.png")
    (folder / "broken.png").write_bytes(b"not a picture")
    ws = Workspace.create(tmp_path / "ws")
    scan_folder(ws, folder, source="clinic", progress=False)
    two = estimate_skin_tone(ws, workers=2, progress=False)
    one = estimate_skin_tone(ws, workers=1, recompute=True, progress=False)
    pd.testing.assert_frame_equal(two, one)
    paths = ws.catalog().set_index("sha256")["path"]
    expected = [image_ita(paths[s]) for s in two["sha256"]]
    np.testing.assert_allclose(two["ita"].to_numpy(float), expected)
    assert two["ita"].notna().sum() == 40  # the broken file is not decodable: not estimated
    # darker skin gives a smaller ITA (CIE L*a*b*: L* falls as skin darkens)
    by_name = dict(zip(paths.reindex(two["sha256"]).map(lambda p: p.rsplit("/", 1)[-1]), two["ita"]))
    assert by_name["p00.png"] > by_name["p39.png"]
