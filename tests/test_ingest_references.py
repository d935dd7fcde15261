"""Ingest checked against references outside curate: FIPS 180-4 digests, scikit-image samples."""

from __future__ import annotations

import hashlib
import importlib.resources
import os
import shutil

import pytest
from PIL import Image

from curate.file_probe import file_sha256
from curate.ingest import scan_folder
from curate.store import Workspace

# SHA-256 example values: NIST FIPS 180-4 "Secure Hash Standard" (2015), example messages
# published with it (csrc.nist.gov, "SHA256.pdf" in the Examples with Intermediate Values).
FIPS_EXAMPLES = [
    (b"abc", "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"),
    (
        b"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq",  # the 448-bit message
        "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1",
    ),
    # one million repetitions of "a": the long-message example of FIPS 180-2 (from memory)
    (b"a" * 1_000_000, "cdc76e5c9914fb9281a1c7e284d73e67f1809a48a497200e046d39ccc7112cd0"),
    # the empty message: the well-known SHA-256 of zero bytes (from memory)
    (b"", "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"),
]


@pytest.mark.parametrize("message, digest", FIPS_EXAMPLES, ids=["abc", "448-bit", "million-a", "empty"])
@pytest.mark.parametrize("chunk_size", [1, 64, 1 << 20])
def test_file_digest_matches_fips_180_4_examples(tmp_path, message, digest, chunk_size):
    if chunk_size == 1 and len(message) > 1000:
        pytest.skip("byte-at-a-time over a megabyte is slow; other chunk sizes cover it")
    path = tmp_path / "message.bin"
    path.write_bytes(message)
    assert file_sha256(path, chunk_size=chunk_size) == digest  # FIPS 180-4 example value
    assert hashlib.sha256(message).hexdigest() == digest  # and Python's hashlib agrees


def test_scan_stores_the_fips_digest_of_a_file_named_like_an_image(tmp_path):
    # the digest is of the bytes, whatever they are: "abc" saved as .jpg is not an image
    (tmp_path / "abc.jpg").write_bytes(b"abc")
    ws = Workspace.create(tmp_path / "ws")
    result = scan_folder(ws, tmp_path, progress=False)
    assert result.report.counts() == {"not_an_image": 1}
    assert ws.catalog()["sha256"].tolist() == [FIPS_EXAMPLES[0][1]]  # FIPS 180-4 "abc" example


def _skimage_data_dir():
    skimage_data = pytest.importorskip("skimage.data")
    return importlib.resources.files(skimage_data)


# scikit-image's sample photographs shipped inside the wheel (skimage/data/*.png); the
# expected shapes are those scikit-image documents for skimage.data.astronaut(), camera(),
# coffee() and chelsea() (scikit-image 0.22-0.26 gallery, from memory), as (height, width[, 3]).
SKIMAGE_SAMPLES = {
    "astronaut.png": (512, 512, 3),
    "camera.png": (512, 512),
    "coffee.png": (400, 600, 3),
    "chelsea.png": (300, 451, 3),
}


def test_scikit_image_samples_sizes_and_modes(tmp_path):
    skio = pytest.importorskip("skimage.io")
    data_dir = _skimage_data_dir()
    folder = tmp_path / "samples"
    folder.mkdir()
    for name in SKIMAGE_SAMPLES:
        source = data_dir / name
        if not source.is_file():
            pytest.skip(f"{name} is not shipped with this scikit-image")
        with importlib.resources.as_file(source) as p:
            shutil.copyfile(p, folder / name)
    ws = Workspace.create(tmp_path / "ws")
    result = scan_folder(ws, folder, progress=False)
    assert result.report.ok
    cat = ws.catalog().set_index(ws.catalog()["path"].map(os.path.basename))
    for name, shape in SKIMAGE_SAMPLES.items():
        row = cat.loc[name]
        path = folder / name
        # reference 1: Pillow's own reading of the file (PIL.Image.open: size, mode, format)
        with Image.open(path) as img:
            assert (row["width"], row["height"], row["mode"], row["format"]) == (*img.size, img.mode, "PNG")
        # reference 2: scikit-image's reader (skimage.io.imread array shape: rows, columns[, channels])
        array = skio.imread(path)
        assert array.shape == shape
        assert (row["height"], row["width"]) == array.shape[:2]
        assert row["mode"] == ("L" if array.ndim == 2 else "RGB")
        # reference 3: hashlib over the shipped file's bytes
        assert row["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
