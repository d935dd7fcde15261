"""Identifying embedded metadata: found, and removed from copies without touching pixels."""

import hashlib
import io

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from PIL import Image, ImageCms

from curate.cli import main
from curate.exif_fields import ExifFinding, identifying_fields
from curate.exif_files import identifying_metadata, strip_jpeg, strip_png, write_clean_copy


def _picture(seed=0, size=(64, 48)):
    rng = np.random.default_rng(seed)
    return Image.fromarray(rng.integers(0, 255, (size[1], size[0], 3), dtype=np.uint8))


def _patient_exif(orientation=None):
    # tag numbers from the Exif 2.3 standard (CIPA DC-008): 0x010E ImageDescription (IFD0),
    # 0x9003 DateTimeOriginal (Exif IFD 0x8769), GPS IFD 0x8825 with 0x0002 GPSLatitude
    exif = Image.Exif()
    exif[0x010E] = "Patient: Jo Example"
    exif[0x0110] = "phone"  # Model: not identifying
    exif.get_ifd(0x8769)[0x9003] = "2021:03:04 10:00:00"
    exif.get_ifd(0x8825)[0x0001] = "N"
    exif.get_ifd(0x8825)[0x0002] = (51.0, 30.0, 0.0)
    if orientation:
        exif[0x0112] = orientation
    return exif


def _read_exif(data: bytes):
    with Image.open(io.BytesIO(data)) as img:
        ex = img.getexif()
        return identifying_fields(dict(ex), dict(ex.get_ifd(0x8769)), dict(ex.get_ifd(0x8825))), ex.get(0x0112)


def test_fields_are_classified_by_exif_tag_number():
    buf = io.BytesIO()
    _picture().save(buf, "JPEG", exif=_patient_exif())
    fields, _ = _read_exif(buf.getvalue())
    assert {(f.name, f.finding) for f in fields} == {
        ("ImageDescription", ExifFinding.FREE_TEXT),
        ("DateTimeOriginal", ExifFinding.DATE_TIME),
        ("GPSInfo", ExifFinding.LOCATION),
    }


@pytest.mark.parametrize("orientation", [None, 6])
def test_jpeg_copy_keeps_pixels_and_orientation_but_no_identifying_field(orientation):
    buf = io.BytesIO()
    # an ICC profile (APP2) must survive: colour management is not identifying
    icc = ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()
    _picture().save(buf, "JPEG", exif=_patient_exif(orientation), icc_profile=icc, quality=90)
    clean = strip_jpeg(buf.getvalue(), orientation=orientation)
    fields, kept_orientation = _read_exif(clean)
    assert fields == []
    assert kept_orientation == orientation
    # reference: Pillow decodes the same pixels from both files (the scan data is copied byte for byte)
    before = np.asarray(Image.open(buf))
    after = np.asarray(Image.open(io.BytesIO(clean)))
    assert np.array_equal(before, after)
    assert Image.open(io.BytesIO(clean)).info.get("icc_profile") == icc


def test_png_copy_drops_text_and_exif_chunks_keeps_pixels():
    from PIL.PngImagePlugin import PngInfo

    info = PngInfo()
    info.add_text("Comment", "Patient: Jo Example")
    buf = io.BytesIO()
    _picture(1).save(buf, "PNG", pnginfo=info, exif=_patient_exif())
    clean = strip_png(buf.getvalue())
    img = Image.open(io.BytesIO(clean))
    # reference: Pillow exposes PNG tEXt chunks in .text (PNG spec, ISO/IEC 15948)
    assert img.text == {}
    assert _read_exif(clean)[0] == []
    assert np.array_equal(np.asarray(Image.open(buf)), np.asarray(img))


def test_clean_copy_never_overwrites_and_leaves_the_original_alone(tmp_path):
    original = tmp_path / "a.jpg"
    _picture().save(original, "JPEG", exif=_patient_exif())
    digest = hashlib.sha256(original.read_bytes()).hexdigest()
    assert write_clean_copy(original, tmp_path / "out" / "a.jpg") == "cleaned"
    with pytest.raises(FileExistsError):
        write_clean_copy(original, tmp_path / "out" / "a.jpg")
    assert hashlib.sha256(original.read_bytes()).hexdigest() == digest
    bmp = tmp_path / "b.bmp"
    _picture().save(bmp)
    assert write_clean_copy(bmp, tmp_path / "out" / "b.bmp") == "unsupported"


def test_damaged_jpeg_is_an_error_not_a_silent_copy():
    with pytest.raises(ValueError, match="JPEG"):
        strip_jpeg(b"not a jpeg")


def test_cli_lists_fields_and_exit_codes(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    _picture(2).save(src / "clean.jpg", "JPEG")
    runner = CliRunner()
    assert runner.invoke(main, ["init", str(tmp_path / "ws")]).exit_code == 0
    assert runner.invoke(main, ["scan", str(tmp_path / "ws"), str(src), "--quiet"]).exit_code == 0
    result = runner.invoke(main, ["exif", str(tmp_path / "ws"), "--quiet"])
    assert result.exit_code == 0, result.output
    _picture(3).save(src / "tagged.jpg", "JPEG", exif=_patient_exif())
    assert runner.invoke(main, ["scan", str(tmp_path / "ws"), str(src), "--quiet"]).exit_code == 0
    out_csv = tmp_path / "fields.csv"
    result = runner.invoke(
        main, ["exif", str(tmp_path / "ws"), "--quiet", "--csv", str(out_csv), "--clean-copies", str(tmp_path / "clean")]
    )
    assert result.exit_code == 1, result.output
    assert set(pd.read_csv(out_csv)["finding"]) == {"free_text", "date_time", "location"}
    copies = list((tmp_path / "clean").rglob("*.jpg"))
    assert len(copies) == 2 and identifying_metadata(copies).empty


def test_every_planted_patient_exif_in_the_demo_is_found(tmp_path):
    from curate.demo import generate_scenario

    generate_scenario(tmp_path, n_images=60, random_state=5, progress=False, workers=1, image_scale=0.25)
    truth = pd.read_csv(tmp_path / "truth" / "images.csv")
    planted = truth[truth["problem_kind"].fillna("").str.contains("exif_patient_data")]
    assert len(planted) > 0
    found = identifying_metadata([tmp_path / p for p in truth["path"]])
    found_paths = {str(p) for p in found["path"]}
    assert {str(tmp_path / p) for p in planted["path"]} <= found_paths
    # each planted file carries a location, a capture time and a free-text description
    per_file = found.groupby("path")["finding"].agg(set)
    assert all(per_file[str(tmp_path / p)] >= {"location", "date_time", "free_text"} for p in planted["path"])
