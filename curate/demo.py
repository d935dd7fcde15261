"""Write the demo scenario to disk: images, per-source metadata CSVs, sources.json and truth.

The scenario (an invented teledermatology network of three clinics and one
dermoscopy archive) is planned by :mod:`curate.demo_scenario` and drawn by
:mod:`curate.demo_images`; this module is the I/O layer. Layout of ``OUT``::

    sources/<source>/...      image files (JPEG, some PNG copies, planted bad files)
    metadata/<source>.csv     one CSV per source, column names differ per source
    sources.json              list of {"name", "folder", "metadata", "columns"}:
                              the only thing the pipeline reads
    truth/images.csv          ground truth per file (never read by the pipeline)
    truth/lookalike_pairs.csv different lesions drawn to look alike
    truth/README.md           what the truth columns mean

Images are drawn in a process pool and written as they are made, so memory
stays bounded for 100,000 files.

The data are invented and carry no medical meaning; curate curates data, it
does not diagnose.
"""

from __future__ import annotations

import functools
import json
import multiprocessing
import os
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from curate.demo_scenario import SOURCES, TRUTH_COLUMNS, FileTask, plan_scenario

MARKER = ".curate-demo"
_OWNED = ("sources", "metadata", "truth", "workspace", "sources.json", MARKER)
_NOT_AN_IMAGE_TEXT = (
    "Referral note (demo, invented)\n"
    "This text file was saved with an image extension by mistake.\n"
)


@dataclass
class Scenario:
    """A generated demo scenario.

    Attributes
    ----------
    path : pathlib.Path
        The output folder ``OUT``.
    sources : list of dict
        The content of ``OUT/sources.json``.
    truth : pandas.DataFrame
        ``OUT/truth/images.csv``: one row per file.
    lookalike_pairs : pandas.DataFrame
        ``OUT/truth/lookalike_pairs.csv``.
    random_state : int
    seconds : float
        Wall time of the generation.
    """

    path: Path
    sources: list
    truth: pd.DataFrame
    lookalike_pairs: pd.DataFrame
    random_state: int
    seconds: float

    @property
    def n_images(self) -> int:
        return len(self.truth)

    def summary(self) -> str:
        """One line: files per source, copies, planted problem files."""
        per_source = self.truth["source"].value_counts().sort_index()
        parts = ", ".join(f"{name} {n}" for name, n in per_source.items())
        copies = int(self.truth["copy_of"].notna().sum())
        bad = int(self.truth["is_problem_file"].sum())
        return (
            f"demo scenario in {self.path}: {self.n_images} files ({parts}); {copies} copies, "
            f"{bad} planted bad files, {len(self.lookalike_pairs)} look-alike lesion pairs; "
            f"{self.seconds:.1f} s"
        )


def generate_scenario(
    out_dir,
    *,
    n_images: int = 600,
    random_state: int = 0,
    progress: bool = True,
    workers: int | None = None,
    image_scale: float = 1.0,
) -> Scenario:
    """Generate the demo scenario into ``out_dir``.

    Parameters
    ----------
    out_dir : str or path
        A new or empty folder, or one holding an earlier demo scenario (which
        is replaced; other folders are refused so nothing of yours is removed).
    n_images : int
        Total number of files, copies and planted bad files included (at least 40).
    random_state : int
        Pass an int for reproducible output across multiple function calls:
        the same seed gives byte-identical files.
    progress : bool
        Show a progress bar (tqdm, on stderr).
    workers : int, optional
        Processes drawing images; default ``min(2, cpu count)``. 1 draws in
        this process. The output does not depend on it.
    image_scale : float
        Multiplies the picture sizes (600x450 clinical, 512x512 dermoscopic).

    Returns
    -------
    Scenario

    Examples
    --------
    >>> import tempfile, os
    >>> sc = generate_scenario(tempfile.mkdtemp(), n_images=40, progress=False,
    ...                        workers=1, image_scale=0.1)
    >>> len(sc.truth), sorted(os.listdir(sc.path / "metadata"))[0]
    (40, 'derm_archive.csv')
    """
    if workers is not None and (not isinstance(workers, int) or workers < 1):
        raise ValueError(f"workers must be a positive int or None, got {workers!r}")
    started = time.perf_counter()
    out = _prepare(Path(out_dir))
    plan = plan_scenario(n_images, random_state=random_state, image_scale=image_scale)
    folders = {os.path.dirname(p) for p in plan.files["path"]} | {s.folder for s in SOURCES}
    for folder in sorted(folders):
        (out / folder).mkdir(parents=True, exist_ok=True)
    _write_images(out, plan.tasks, len(plan.files), progress, workers)
    sources = _write_metadata(out, plan.files)
    truth = plan.files[TRUTH_COLUMNS]
    _write_truth(out, truth, plan.lookalike_pairs)
    return Scenario(out, sources, truth, plan.lookalike_pairs, random_state, time.perf_counter() - started)


def _prepare(out: Path) -> Path:
    """Make ``out`` ready: new, empty, or an earlier demo whose parts are removed."""
    if out.exists() and not out.is_dir():
        raise NotADirectoryError(f"{out} exists and is not a folder")
    out.mkdir(parents=True, exist_ok=True)
    if any(out.iterdir()):
        if not (out / MARKER).is_file():
            raise FileExistsError(
                f"{out} is not empty and holds no earlier demo scenario; choose a new or empty folder"
            )
        for name in _OWNED:
            target = out / name
            if target.is_dir() and not target.is_symlink():
                shutil.rmtree(target)
            elif target.exists() or target.is_symlink():
                target.unlink()
    (out / MARKER).write_text("generated by curate demo; this folder may be replaced by the next run\n")
    return out


def _write_images(out: Path, tasks: list[FileTask], total: int, progress: bool, workers) -> None:
    from tqdm.auto import tqdm

    workers = workers or max(1, min(2, os.cpu_count() or 1))
    write = functools.partial(write_task, out_dir=str(out))
    with tqdm(total=total, disable=not progress, unit=" files", desc="drawing demo images") as bar:
        if workers == 1:
            for task in tasks:
                bar.update(write(task))
            return
        method = "fork" if "fork" in multiprocessing.get_all_start_methods() else "spawn"
        with multiprocessing.get_context(method).Pool(workers) as pool:
            for n in pool.imap_unordered(write, tasks, chunksize=8):
                bar.update(n)


def write_task(task: FileTask, out_dir: str) -> int:
    """Draw and write one task's files; return how many files were written.

    A capture is drawn, encoded as JPEG (with planted EXIF where asked) and
    written; each copy is made from the decoded bytes of that original, as an
    archive re-exporting the file would.
    """
    from curate.demo_copies import apply_ops, decode, encode, patient_exif
    from curate.demo_images import draw_lesion_image

    target = os.path.join(out_dir, task.path)
    if task.kind == "zero_byte":
        open(target, "wb").close()
        return 1
    if task.kind == "not_an_image":
        with open(target, "w", encoding="utf-8") as f:
            f.write(_NOT_AN_IMAGE_TEXT)
        return 1
    picture = draw_lesion_image(task.look, task.capture)
    exif = patient_exif(*task.exif) if task.exif else None
    data = encode(picture, "JPEG", quality=task.quality, exif=exif)
    with open(target, "wb") as f:
        f.write(data[: len(data) // 2] if task.truncate else data)
    if task.copies:
        original = decode(data)
        for copy in task.copies:
            if copy["kind"] == "byte_copy":
                blob = data
            else:
                blob = encode(apply_ops(original, copy["ops"]), copy["fmt"], quality=copy["quality"])
            with open(os.path.join(out_dir, copy["path"]), "wb") as f:
                f.write(blob)
    return task.n_files


def _write_metadata(out: Path, files: pd.DataFrame) -> list[dict]:
    """One CSV per source with that source's column names; returns the sources.json list."""
    fields = {
        "path": "m_path",
        "patient": "recorded_patient",
        "lesion": "recorded_lesion",
        "label": "recorded_label",
        "modality": "m_modality",
        "body_site": "m_body_site",
        "capture_date": "m_capture_date",
    }
    entries = []
    (out / "metadata").mkdir(exist_ok=True)
    for style in SOURCES:
        rows = files[files["source"] == style.name].copy()
        rows["m_path"] = [p[len(style.folder) + 1 :] for p in rows["path"]]
        table = pd.DataFrame({column: rows[fields[name]] for name, column in style.columns.items()})
        table.to_csv(out / style.metadata, index=False, lineterminator="\n")
        entries.append(
            {"name": style.name, "folder": style.folder, "metadata": style.metadata, "columns": dict(style.columns)}
        )
    with open(out / "sources.json", "w", encoding="utf-8") as f:
        json.dump(entries, f, indent=2)
        f.write("\n")
    return entries


def _write_truth(out: Path, truth: pd.DataFrame, pairs: pd.DataFrame) -> None:
    folder = out / "truth"
    folder.mkdir(exist_ok=True)
    truth.to_csv(folder / "images.csv", index=False, lineterminator="\n")
    pairs.to_csv(folder / "lookalike_pairs.csv", index=False, lineterminator="\n")
    (folder / "README.md").write_text(TRUTH_README, encoding="utf-8")


TRUTH_README = """\
# Ground truth of the demo scenario

Invented data written by `curate demo` / `curate.demo.generate_scenario`. The
pipeline never reads this folder; tests and benchmarks use it to score what the
pipeline found. Nothing here describes real people: every name, id, date and
place is made up. curate curates data; it does not diagnose.

## images.csv (one row per file under sources/)

| column | meaning |
| --- | --- |
| path | file path relative to the scenario folder |
| source | the clinic or archive whose folder holds the file |
| true_patient | the real person (invented id), the same across sources; empty for planted bad files that show nobody |
| true_lesion | the real lesion (invented id), the same across visits, modalities and copies |
| true_node | the diagnosis as a taxonomy leaf id (see curate/data/example_taxonomy.yaml) |
| visit | 1-based visit number of the lesion at which the picture was taken |
| modality | clinical or dermoscopic (the truth, whatever the source wrote) |
| copy_of | path of the original this file was made from; empty for originals |
| copy_kind | byte_copy, reencode, resize, rotate90, rotate180, rotate270, flip_h, flip_v, crop, colour_shift, combination; empty for originals |
| copy_detail | the operations with their parameters, e.g. crop(x0, y0, x1, y1) in pixels of the original, resize(width, height), colour_shift(brightness, (gain_r, gain_g, gain_b), hue_degrees); combinations list their steps in order, then re-encode |
| crop_keep_fraction | share of each side the crop kept (0.75 to 0.95), for crop and combinations with a crop |
| is_problem_file | 1 for planted bad files: truncated, zero_byte, not_an_image |
| problem_kind | planted problems, `;`-separated: truncated, zero_byte, not_an_image, exif_patient_data (GPS position, DateTimeOriginal and a made-up name in ImageDescription), placeholder_patient (patient id written as unknown / n/a / ?), conflicting_label (a copy that carries another diagnosis than its original) |
| skin_ita | the skin colour drawn, as Individual Typology Angle in degrees (higher is lighter) |
| capture_day | ISO date the picture was taken |
| recorded_patient, recorded_lesion, recorded_label | the values the source's metadata CSV gives (each source spells ids and labels its own way; derm_archive keeps no lesion ids) |

Copies are made from the decoded original file. Rotations are counter-clockwise
(rotate90 equals numpy.rot90(original, 1)); flip_h mirrors left-right
(numpy.fliplr), flip_v top-bottom (numpy.flipud). Copies saved as PNG are
lossless, so their pixels equal the operation applied to the decoded original.

Follow-up visits of one lesion are different pictures of the same lesion (not
copies): copy_of is empty and true_lesion is shared.

## lookalike_pairs.csv

Pairs of different lesions drawn deliberately alike (same colours, size and
skin, a different shape): hard negatives that a near-duplicate search should
not merge. Columns: lesion_a, lesion_b, patient_a, patient_b, node, and path_a,
path_b (one original picture of each).
"""
