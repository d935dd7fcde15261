"""The demo scenario as a plan: people, lesions, visits, sources, copies and planted problems.

An invented regional teledermatology network pools images from three clinics
(``north_clinic``, ``harbour_clinic``, ``valley_clinic``) and one dermoscopy
archive (``derm_archive``) that also re-exports clinic images. Every name, id,
date and place here is made up by this code.

:func:`plan_scenario` is pure: from ``n_images`` and ``random_state`` it returns
a :class:`ScenarioPlan` holding one truth row and one metadata row per file and
the drawing tasks; :mod:`curate.demo` writes them to disk. No pixels are made
here, so the plan of 100,000 files takes seconds and little memory.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, timedelta

import numpy as np
import pandas as pd

from curate.demo_images import Capture, LesionLook, lesion_look, skin_lab

# --- the diagnoses and how each source writes them -----------------------------------

#: demo diagnosis id -> relative frequency (skewed, invented; benign naevi and
#: keratinocyte lesions common, rare entities rare)
DIAGNOSIS_WEIGHTS: dict[str, float] = {
    "compound_naevus": 16, "junctional_naevus": 9, "dermal_naevus": 8, "dysplastic_naevus": 7,
    "blue_naevus": 1.5, "superficial_spreading_melanoma": 5, "nodular_melanoma": 1.5,
    "lentigo_maligna_melanoma": 1.2, "melanoma_in_situ": 3, "basal_cell_carcinoma": 9,
    "squamous_cell_carcinoma": 3, "actinic_keratosis": 5, "bowen_disease": 2,
    "seborrhoeic_keratosis": 10, "solar_lentigo": 4, "dermatofibroma": 3, "haemangioma": 2,
    "pyogenic_granuloma": 0.8, "psoriasis": 1.5, "eczema": 1.5, "tinea": 0.7, "viral_wart": 2,
}  # fmt: skip

#: demo diagnosis id -> spellings: (full British, short/abbreviation, American or synonym, other)
LABEL_SPELLINGS: dict[str, tuple[str, str, str, str]] = {
    "superficial_spreading_melanoma": ("Superficial spreading melanoma", "SSM", "melanoma, superficial spreading", "MM - superficial spreading"),
    "nodular_melanoma": ("Nodular melanoma", "NM", "melanoma (nodular)", "MM nodular"),
    "lentigo_maligna_melanoma": ("Lentigo maligna melanoma", "LMM", "lentigo maligna melanoma", "MM lentigo maligna"),
    "melanoma_in_situ": ("Melanoma in situ", "MIS", "melanoma in-situ", "MM in situ"),
    "junctional_naevus": ("Junctional naevus", "JN", "junctional nevus", "naevus, junctional"),
    "compound_naevus": ("Compound naevus", "CN", "mole", "compound nevus"),
    "dermal_naevus": ("Dermal naevus", "IDN", "intradermal nevus", "dermal nevus"),
    "dysplastic_naevus": ("Dysplastic naevus", "DN", "atypical nevus", "dysplastic nevus"),
    "blue_naevus": ("Blue naevus", "BN", "blue nevus", "naevus, blue"),
    "basal_cell_carcinoma": ("Basal cell carcinoma", "BCC", "basal-cell carcinoma", "basal cell ca"),
    "squamous_cell_carcinoma": ("Squamous cell carcinoma", "SCC", "cutaneous SCC", "squamous cell ca"),
    "actinic_keratosis": ("Actinic keratosis", "AK", "solar keratosis", "actinic keratoses"),
    "bowen_disease": ("Bowen's disease", "Bowens", "SCC in situ", "bowen disease"),
    "seborrhoeic_keratosis": ("Seborrhoeic keratosis", "SK", "seborrheic keratosis", "seb. keratosis"),
    "solar_lentigo": ("Solar lentigo", "SL", "lentigo, solar", "sun spot"),
    "dermatofibroma": ("Dermatofibroma", "DF", "fibrous histiocytoma", "dermatofibroma"),
    "haemangioma": ("Haemangioma", "HAEM", "hemangioma", "angioma"),
    "pyogenic_granuloma": ("Pyogenic granuloma", "PG", "pyogenic granuloma", "granuloma, pyogenic"),
    "psoriasis": ("Psoriasis", "PSO", "plaque psoriasis", "psoriasis vulgaris"),
    "eczema": ("Eczema", "ECZ", "dermatitis", "atopic eczema"),
    "tinea": ("Tinea", "TIN", "ringworm", "tinea corporis"),
    "viral_wart": ("Viral wart", "VW", "verruca", "wart"),
}  # fmt: skip

#: a plausible wrong label for the planted label conflict (a copy carrying another diagnosis)
_CONFUSED_WITH = {
    "dysplastic_naevus": "melanoma_in_situ", "compound_naevus": "dysplastic_naevus",
    "seborrhoeic_keratosis": "superficial_spreading_melanoma", "actinic_keratosis": "bowen_disease",
    "basal_cell_carcinoma": "squamous_cell_carcinoma", "junctional_naevus": "solar_lentigo",
}  # fmt: skip

BODY_SITES = ("face", "scalp", "neck", "chest", "back", "abdomen", "upper arm", "forearm",
              "hand", "thigh", "lower leg", "foot")  # fmt: skip

COPY_KINDS = ("byte_copy", "reencode", "resize", "rotate90", "rotate180", "rotate270",
              "flip_h", "flip_v", "crop", "colour_shift", "combination")  # fmt: skip
_COPY_WEIGHTS = (3, 2, 2, 1, 1, 1, 1, 1, 2, 2, 2)
_LOSSLESS_FRIENDLY = {"rotate90", "rotate180", "rotate270", "flip_h", "flip_v", "crop"}

MIN_IMAGES = 40

# drape and background colours seen at the edge of clinical photographs (sRGB 0..1, invented)
_DRAPE_COLOURS = ((0.25, 0.45, 0.55), (0.3, 0.55, 0.45), (0.9, 0.9, 0.88), (0.35, 0.35, 0.38),
                  (0.12, 0.14, 0.2), (0.6, 0.7, 0.8))  # fmt: skip

#: skin-tone bands by Individual Typology Angle in degrees, dark to very light
#: (the usual ITA categories: dark < -30 < brown < 10 < tan < 28 < intermediate
#: < 41 < light < 55 < very light; common practice)
ITA_BANDS = ((-55.0, -30.0), (-30.0, 10.0), (10.0, 28.0), (28.0, 41.0), (41.0, 55.0), (55.0, 72.0))

# --- the sources -------------------------------------------------------------------


@dataclass(frozen=True)
class SourceStyle:
    """How one source names its columns and writes its values."""

    name: str
    columns: dict  # our field -> this source's CSV column
    date_format: str
    modality_names: dict
    label_style: int  # index into LABEL_SPELLINGS tuples; -1 = mixed
    jpeg_quality: int
    dermoscopy_rate: float  # share of visits with a dermoscopic picture too
    exif_rate: float  # share of its JPEG originals carrying patient-like EXIF
    placeholder: str  # how it writes an unknown patient
    weight: float  # share of patients first seen here

    @property
    def folder(self) -> str:
        return f"sources/{self.name}"

    @property
    def metadata(self) -> str:
        return f"metadata/{self.name}.csv"


SOURCES: tuple[SourceStyle, ...] = (
    SourceStyle(
        "north_clinic",
        {"path": "file", "patient": "patient", "lesion": "lesion", "label": "diagnosis",
         "modality": "modality", "body_site": "site", "capture_date": "date"},
        "%Y-%m-%d", {"clinical": "clinical", "dermoscopic": "dermoscopic"}, 0, 92, 0.5, 0.05,
        "unknown", 0.34,
    ),
    SourceStyle(
        "harbour_clinic",
        {"path": "image_name", "patient": "pat", "lesion": "lesion_ref", "label": "dx",
         "modality": "type", "body_site": "body_location", "capture_date": "taken"},
        "%Y/%m/%d", {"clinical": "clin", "dermoscopic": "derm"}, 1, 88, 0.4, 0.0, "n/a", 0.30,
    ),
    SourceStyle(
        "valley_clinic",
        {"path": "Filename", "patient": "Patient ID", "lesion": "Lesion No", "label": "Diagnosis",
         "modality": "Image type", "body_site": "Anatomical site", "capture_date": "Date taken"},
        "%Y-%m-%d %H:%M", {"clinical": "Clinical photo", "dermoscopic": "Dermoscopy"}, 2, 85, 0.0,
        0.08, "UNKNOWN", 0.22,
    ),
    SourceStyle(
        "derm_archive",  # keeps no lesion ids and no body site
        {"path": "image_path", "patient": "subject_id", "label": "finding",
         "modality": "device", "capture_date": "acquired_on"},
        "%Y%m%d", {"clinical": "macro camera", "dermoscopic": "dermatoscope"}, -1, 90, 1.0, 0.0,
        "?", 0.14,
    ),
)  # fmt: skip
SOURCE_BY_NAME = {s.name: s for s in SOURCES}
ARCHIVE = "derm_archive"

# picture sizes (width, height) at image_scale 1
CLINICAL_SIZE = (600, 450)
DERMOSCOPIC_SIZE = (512, 512)

TRUTH_COLUMNS = [
    "path", "source", "true_patient", "true_lesion", "true_node", "visit", "modality",
    "copy_of", "copy_kind", "copy_detail", "crop_keep_fraction", "is_problem_file",
    "problem_kind", "skin_ita", "capture_day", "recorded_patient", "recorded_lesion", "recorded_label",
]  # fmt: skip


# --- the plan ------------------------------------------------------------------------


@dataclass
class FileTask:
    """What a worker writes: one rendered picture and the copies made from it, or a bad file.

    ``kind`` is ``"capture"`` (``look``/``capture`` set), ``"zero_byte"`` or ``"not_an_image"``.
    """

    kind: str
    path: str
    look: LesionLook | None = None
    capture: Capture | None = None
    quality: int = 90
    exif: tuple | None = None  # (description, taken, (lat, lon), model)
    truncate: bool = False
    copies: list = field(default_factory=list)  # dicts: path, kind, ops, fmt, quality

    @property
    def n_files(self) -> int:
        return 1 + len(self.copies)


@dataclass
class ScenarioPlan:
    """Everything to write, decided up front.

    Attributes
    ----------
    files : pandas.DataFrame
        One row per file: :data:`TRUTH_COLUMNS` plus the metadata values as the
        source writes them (``m_path``, ``m_patient``, ...) and ``in_metadata``.
    tasks : list of FileTask
    lookalike_pairs : pandas.DataFrame
    random_state : int
    """

    files: pd.DataFrame
    tasks: list
    lookalike_pairs: pd.DataFrame
    random_state: int


def plan_scenario(n_images: int, *, random_state: int = 0, image_scale: float = 1.0) -> ScenarioPlan:
    """Decide every file of the demo scenario.

    Parameters
    ----------
    n_images : int
        Total number of files, planted problem files and copies included
        (at least :data:`MIN_IMAGES`).
    random_state : int
        Pass an int for reproducible output across multiple function calls.
    image_scale : float
        Multiplies the picture sizes (600x450 clinical, 512x512 dermoscopic).

    Returns
    -------
    ScenarioPlan

    Notes
    -----
    About 12% of files are copies (every copy kind at least once), a few are
    truncated, zero-byte or not images at all; the rest are original pictures
    of lesions across visits.

    Examples
    --------
    >>> plan = plan_scenario(60, random_state=1)
    >>> len(plan.files), plan.files["path"].is_unique
    (60, True)
    >>> set(plan.files["copy_kind"].dropna()) >= set(COPY_KINDS)
    True
    """
    if not isinstance(n_images, (int, np.integer)) or isinstance(n_images, bool):
        raise TypeError(f"n_images must be an int, got {type(n_images).__name__}")
    if n_images < MIN_IMAGES:
        raise ValueError(f"n_images must be at least {MIN_IMAGES}, got {n_images}")
    if not 0.1 <= image_scale <= 8:
        raise ValueError(f"image_scale must lie in [0.1, 8], got {image_scale}")
    return _Planner(int(n_images), int(random_state), float(image_scale)).run()


class _Planner:
    """Builds a plan step by step from one random generator (sequential, so deterministic)."""

    def __init__(self, n_images: int, random_state: int, image_scale: float):
        self.n = n_images
        self.random_state = random_state
        self.scale = image_scale
        self.rng = np.random.default_rng(random_state)
        self.rows: list[dict] = []  # one per file
        self.tasks: list[FileTask] = []
        self.patients: list[dict] = []
        self.lesions: list[dict] = []
        self.lookalikes: list[tuple[int, int]] = []
        self.ids: dict[tuple[str, int], str] = {}  # (source, patient index) -> recorded id
        self.lesion_ids: dict[tuple[str, int], str] = {}
        self.seq: dict[str, int] = {s.name: 0 for s in SOURCES}
        self.ita_bins: list[int] = []
        self.lesion_count: dict[tuple, int] = {}  # (source,) and (source, patient) -> lesions named

    # -- overall -----------------------------------------------------------------

    def run(self) -> ScenarioPlan:
        n_trunc = max(1, self.n // 250)
        n_zero = max(1, self.n // 400)
        n_not_image = 1 + self.n // 2000
        n_copies = max(len(COPY_KINDS) + 1, int(round(0.12 * self.n)))
        n_originals = self.n - n_zero - n_not_image - n_copies
        captures = self._people(n_originals)
        originals = self._originals(captures)
        self._plant_exif(originals)
        for i in self.rng.choice(len(originals), size=n_trunc, replace=False):
            task, row = originals[i]
            task.truncate = True
            row.update(is_problem_file=1, problem_kind=_add_kind(row["problem_kind"], "truncated"))
        self._copies(originals, n_copies)
        self._bad_files(n_zero, n_not_image)
        self._placeholders(max(2, self.n // 300))
        files = pd.DataFrame([{k: v for k, v in r.items() if k != "_lesion"} for r in self.rows])
        files["visit"] = files["visit"].astype("Int64")
        files = files.sort_values("path", kind="stable").reset_index(drop=True)
        return ScenarioPlan(files, self.tasks, self._lookalike_frame(files), self.random_state)

    # -- people, lesions, visits --------------------------------------------------

    def _people(self, n_originals: int) -> list[dict]:
        """Patients, their lesions and visits until ``n_originals`` pictures are planned."""
        rng = self.rng
        must_have = list(DIAGNOSIS_WEIGHTS)
        rng.shuffle(must_have)
        captures: list[dict] = []
        while len(captures) < n_originals:
            if len(self.patients) < len(SOURCES):  # every source gets patients of its own
                source = SOURCES[len(self.patients)]
            else:
                source = SOURCES[_pick(rng, _SOURCE_CUMULATIVE)]
            lookalike_of = None
            if self.lesions and (len(self.patients) == len(SOURCES) or rng.random() < 0.06):
                lookalike_of = self.lesions[int(rng.integers(len(self.lesions)))]
            patient = self._new_patient(source, lookalike_of)
            for k in range(min(1 + int(rng.geometric(0.5)) - 1, 4) + 1):
                if lookalike_of is not None and k == 0:
                    lesion = self._new_lesion(patient, lookalike_of["node"], lookalike_of)
                else:
                    node = must_have.pop() if must_have else self._draw_node()
                    lesion = self._new_lesion(patient, node, None)
                captures.extend(self._visits(patient, lesion, source))
                if len(captures) >= n_originals:
                    break
        return captures[:n_originals]

    def _draw_node(self) -> str:
        return _DIAGNOSES[_pick(self.rng, _DIAGNOSIS_CUMULATIVE)]

    def _new_patient(self, source: SourceStyle, lookalike_of: dict | None) -> dict:
        rng = self.rng
        if lookalike_of is not None:  # a look-alike lesion on the same kind of skin
            ita, skin = lookalike_of["patient"]["ita"], lookalike_of["patient"]["skin"]
        else:
            if not self.ita_bins:  # each run of six patients covers every skin-tone band
                self.ita_bins = [int(i) for i in rng.permutation(len(ITA_BANDS))]
            low, high = ITA_BANDS[self.ita_bins.pop()]
            ita = float(rng.uniform(low, high))
            skin = skin_lab(ita, float(rng.uniform(11.0, 20.0)), float(rng.uniform(5.0, 13.0)))
        patient = {
            "index": len(self.patients),
            "id": f"patient_{len(self.patients) + 1:05d}",
            "home": source.name,
            "ita": round(ita, 2),
            "skin": skin,
            "hair": float(rng.choice([0.0, 0.0, 1.0, 3.0, 6.0])),
        }
        self.patients.append(patient)
        return patient

    def _new_lesion(self, patient: dict, node: str, lookalike_of: dict | None) -> dict:
        rng = self.rng
        if lookalike_of is not None:
            look = lookalike_of["look"].with_new_shape(int(rng.integers(2**31)))
        else:
            look = lesion_look(node, rng)
        lesion = {
            "index": len(self.lesions),
            "id": f"lesion_{len(self.lesions) + 1:06d}",
            "patient": patient,
            "node": node,
            "look": look,
            "site": BODY_SITES[int(rng.integers(len(BODY_SITES)))],
            "angle": float(rng.uniform(0, 2 * np.pi)),
            "first": date(2019, 1, 1) + timedelta(days=int(rng.integers(0, 4 * 365))),
        }
        self.lesions.append(lesion)
        if lookalike_of is not None:
            self.lookalikes.append((lookalike_of["index"], lesion["index"]))
        return lesion

    def _visits(self, patient: dict, lesion: dict, source: SourceStyle) -> list[dict]:
        rng = self.rng
        n_visits = min(int(rng.geometric(0.55)), 5)
        out = []
        day = lesion["first"]
        for visit in range(1, n_visits + 1):
            if visit > 1:
                day = day + timedelta(days=int(rng.integers(60, 400)))
            growth = 1.0 + (visit - 1) * float(rng.uniform(0.01, 0.06))
            modalities = ["dermoscopic"] if source.name == ARCHIVE else ["clinical"]
            if source.name != ARCHIVE and rng.random() < source.dermoscopy_rate:
                modalities.append("dermoscopic")
            for modality in modalities:
                out.append(
                    {
                        "patient": patient,
                        "lesion": lesion,
                        "source": source,
                        "visit": visit,
                        "date": day,
                        "modality": modality,
                        "capture": self._capture(patient, lesion, modality, growth),
                    }
                )
        return out

    def _capture(self, patient: dict, lesion: dict, modality: str, growth: float) -> Capture:
        rng = self.rng
        base = CLINICAL_SIZE if modality == "clinical" else DERMOSCOPIC_SIZE
        w, h = (max(int(round(v * self.scale)), 16) for v in base)
        look: LesionLook = lesion["look"]
        zoom = float(rng.uniform(0.8, 1.25))
        if modality == "dermoscopic":
            zoom = min(float(rng.uniform(1.6, 2.3)), 0.26 / look.size)
        return Capture(
            modality=modality,
            width=w,
            height=h,
            skin_lab=patient["skin"],
            growth=growth,
            angle=lesion["angle"] + float(rng.normal(0.0, 0.35)),
            centre=(float(rng.uniform(0.3, 0.7)), float(rng.uniform(0.32, 0.68))),
            zoom=zoom,
            brightness=float(rng.uniform(0.9, 1.08)),
            light_angle=float(rng.uniform(0, 2 * np.pi)),
            white_balance=tuple(float(g) for g in rng.normal(1.0, 0.025, 3)),
            hair=int(rng.poisson(patient["hair"])),
            ruler=bool(rng.random() < (0.25 if modality == "clinical" else 0.1)),
            falloff=float(rng.uniform(0.0, 0.4)),
            falloff_angle=float(rng.uniform(0, 2 * np.pi)),
            drape=self._drape(modality),
            seed=int(rng.integers(2**31)),
        )

    def _drape(self, modality: str):
        """A drape or background along one side of some clinical pictures."""
        rng = self.rng
        if modality != "clinical" or rng.random() < 0.4:
            return None
        colour = _DRAPE_COLOURS[int(rng.integers(len(_DRAPE_COLOURS)))]
        return (float(rng.uniform(0, 2 * np.pi)), float(rng.uniform(0.45, 0.85)), colour)

    # -- files --------------------------------------------------------------------

    def _originals(self, captures: list[dict]) -> list[tuple[FileTask, dict]]:
        """One JPEG per capture, numbered per source in order of capture date."""
        order = sorted(range(len(captures)), key=lambda i: (captures[i]["date"], i))
        out = []
        for i in order:
            c = captures[i]
            source = c["source"]
            path = self._file_name(source, c["date"], "jpg")
            row = self._row(path, source, c["patient"], c["lesion"], c["visit"], c["modality"], c["date"])
            task = FileTask("capture", path, look=c["lesion"]["look"], capture=c["capture"],
                            quality=source.jpeg_quality)  # fmt: skip
            self.tasks.append(task)
            self.rows.append(row)
            out.append((task, row))
        return out

    def _file_name(self, source: SourceStyle, day: date, ext: str) -> str:
        self.seq[source.name] += 1
        n = self.seq[source.name]
        token = self.rng.bytes(6).hex()
        if source.name == "north_clinic":
            name = f"img_{n:06d}.{ext}"
        elif source.name == "harbour_clinic":
            name = f"{day.year}/{day.month:02d}/H{n:06d}.{ext}"
        elif source.name == "valley_clinic":
            name = f"VC_{token[:8]}.{'jpeg' if ext == 'jpg' else ext}"
        else:
            name = f"export/{token[:2]}/{token}.{ext}"
        return f"{source.folder}/{name}"

    def _row(self, path, source: SourceStyle, patient, lesion, visit, modality, day) -> dict:
        node = lesion["node"] if lesion else None
        label = self._label(source, node) if node else None
        row = {
            "path": path,
            "source": source.name,
            "true_patient": patient["id"] if patient else None,
            "true_lesion": lesion["id"] if lesion else None,
            "true_node": node,
            "visit": visit,
            "modality": modality,
            "copy_of": None,
            "copy_kind": None,
            "copy_detail": None,
            "crop_keep_fraction": None,
            "is_problem_file": 0,
            "problem_kind": None,
            "skin_ita": patient["ita"] if patient else None,
            "capture_day": day.isoformat() if day else None,
            "recorded_patient": self._patient_id(source, patient) if patient else None,
            "recorded_lesion": self._lesion_id(source, lesion) if lesion else None,
            "recorded_label": label,
            "m_modality": source.modality_names.get(modality, modality) if modality else None,
            "m_body_site": _site(source, lesion["site"]) if lesion else None,
            "m_capture_date": _date_text(source, day, self.rng) if day else None,
            "_lesion": lesion,
        }
        return row

    def _patient_id(self, source: SourceStyle, patient: dict) -> str:
        key = (source.name, patient["index"])
        if key not in self.ids:
            n = patient["index"] + 1
            if source.name == "north_clinic":
                self.ids[key] = f"N-{n:05d}"
            elif source.name == "harbour_clinic":
                self.ids[key] = f"HC{n}"
            elif source.name == "valley_clinic":
                self.ids[key] = f"VAL/{2015 + n % 9}/{n:04d}"
            else:
                self.ids[key] = "S" + self.rng.bytes(4).hex().upper()[:7]
        return self.ids[key]

    def _lesion_id(self, source: SourceStyle, lesion: dict) -> str | None:
        if "lesion" not in source.columns:
            return None
        key = (source.name, lesion["index"])
        if key not in self.lesion_ids:
            pid = self._patient_id(source, lesion["patient"])
            count = self.lesion_count[(source.name,)] = self.lesion_count.get((source.name,), 0) + 1
            pkey = (source.name, lesion["patient"]["index"])
            nth = self.lesion_count[pkey] = self.lesion_count.get(pkey, 0) + 1
            if source.name == "north_clinic":
                self.lesion_ids[key] = f"{pid}-L{nth}"
            elif source.name == "harbour_clinic":
                self.lesion_ids[key] = f"{pid[2:]}/{nth}"
            else:
                self.lesion_ids[key] = f"V{count:06d}"
        return self.lesion_ids[key]

    def _label(self, source: SourceStyle, node: str) -> str:
        rng = self.rng
        spellings = LABEL_SPELLINGS[node]
        if source.label_style < 0:
            text = spellings[int(rng.integers(4))]
            text = text.lower() if rng.random() < 0.5 else text
        else:
            text = spellings[source.label_style]
        r = rng.random()
        if r < 0.04:
            text = _typo(text, rng)
        elif r < 0.08:
            text = f" {text.upper()} " if rng.random() < 0.5 else text.replace(" ", "  ")
        return text

    def _plant_exif(self, originals) -> None:
        """Patient-like EXIF on some clinic JPEGs (at least two in any scenario)."""
        rng = self.rng
        eligible = [(t, r) for t, r in originals if SOURCE_BY_NAME[r["source"]].exif_rate > 0]
        forced = {id(t) for t, _ in eligible[:2]}
        for task, row in eligible:
            if id(task) in forced or rng.random() < SOURCE_BY_NAME[row["source"]].exif_rate:
                name = _invented_name(rng)
                born = date(1930, 1, 1) + timedelta(days=int(rng.integers(0, 70 * 365)))
                day = row["capture_day"].replace("-", ":")
                taken = f"{day} {int(rng.integers(8, 18)):02d}:{int(rng.integers(60)):02d}:{int(rng.integers(60)):02d}"
                gps = (float(rng.uniform(50.0, 57.0)), float(rng.uniform(-6.0, 2.0)))
                task.exif = (f"Patient: {name}, born {born.isoformat()}", taken, gps, "clinic phone 3")
                row["problem_kind"] = _add_kind(row["problem_kind"], "exif_patient_data")

    def _copies(self, originals, n_copies: int) -> None:
        rng = self.rng
        usable = [(t, r) for t, r in originals if not t.truncate]
        n_conflicts = max(1, n_copies // 40)
        for i in range(n_copies):
            kind = COPY_KINDS[i] if i < len(COPY_KINDS) else COPY_KINDS[_pick(rng, _COPY_CUMULATIVE)]
            task, orig = usable[int(rng.integers(len(usable)))]
            r = rng.random()
            if r < 0.75:
                target = SOURCE_BY_NAME[ARCHIVE]
            elif r < 0.9:
                target = SOURCE_BY_NAME[orig["source"]]
            else:
                target = SOURCES[int(rng.integers(3))]
            lossless = kind in _LOSSLESS_FRIENDLY and (i < len(COPY_KINDS) or rng.random() < 0.3)
            if kind in ("resize", "colour_shift") and rng.random() < 0.3:
                lossless = True
            spec, detail, keep = self._copy_ops(kind, task.capture, orig)
            fmt = "PNG" if lossless else "JPEG"
            ext = "jpg" if kind == "byte_copy" or fmt == "JPEG" else "png"
            lesion = orig["_lesion"]
            day = date.fromisoformat(orig["capture_day"])
            path = self._file_name(target, day, ext)
            row = self._row(path, target, lesion["patient"], lesion, orig["visit"], orig["modality"], day)
            quality = int(rng.integers(55, 81)) if kind in ("reencode", "combination") else target.jpeg_quality
            row.update(copy_of=orig["path"], copy_kind=kind, copy_detail=detail, crop_keep_fraction=keep)
            if kind == "byte_copy":
                row["copy_detail"] = "same bytes"
                row["problem_kind"] = orig["problem_kind"]  # the EXIF travels with the bytes
            if i >= len(COPY_KINDS) and n_conflicts > 0 and lesion["node"] in _CONFUSED_WITH:
                n_conflicts -= 1
                row["recorded_label"] = self._label(target, _CONFUSED_WITH[lesion["node"]])
                row["problem_kind"] = _add_kind(row["problem_kind"], "conflicting_label")
            task.copies.append({"path": path, "kind": kind, "ops": spec, "fmt": fmt, "quality": quality})
            self.rows.append(row)
        if n_conflicts > 0:  # no copy of a confusable diagnosis came up: relabel the last copy
            row = self.rows[-1]
            lesion = row["_lesion"]
            wrong = _CONFUSED_WITH.get(lesion["node"], "compound_naevus" if lesion["node"] != "compound_naevus" else "dermal_naevus")
            row["recorded_label"] = self._label(SOURCE_BY_NAME[row["source"]], wrong)
            row["problem_kind"] = _add_kind(row["problem_kind"], "conflicting_label")

    def _copy_ops(self, kind: str, cap: Capture, orig: dict):
        """Operations, a readable detail and the crop keep fraction of one copy."""
        rng = self.rng
        w, h = cap.width, cap.height
        if kind in ("byte_copy", "reencode"):
            return [], kind, None
        if kind in ("rotate90", "rotate180", "rotate270", "flip_h", "flip_v"):
            return [(kind, None)], kind, None
        if kind == "crop":
            op, keep = self._crop(w, h)
            return [op], f"crop{op[1]}", keep
        if kind == "resize":
            f = float(rng.uniform(0.45, 0.85))
            size = (max(int(w * f), 8), max(int(h * f), 8))
            return [("resize", size)], f"resize{size}", None
        if kind == "colour_shift":
            op = self._colour_op()
            return [op], f"colour_shift{op[1]}", None
        # combination: two or three of crop, a rotation or flip, resize, colour shift
        parts = ["crop", "geometric", "resize", "colour"]
        chosen = sorted(rng.choice(4, size=int(rng.integers(2, 4)), replace=False))
        ops, keep = [], None
        for k in chosen:
            if parts[k] == "crop":
                op, keep = self._crop(w, h)
                ops.append(op)
                w, h = op[1][2] - op[1][0], op[1][3] - op[1][1]
            elif parts[k] == "geometric":
                name = ("rotate90", "rotate180", "rotate270", "flip_h", "flip_v")[int(rng.integers(5))]
                ops.append((name, None))
                if name in ("rotate90", "rotate270"):
                    w, h = h, w
            elif parts[k] == "resize":
                f = float(rng.uniform(0.5, 0.9))
                ops.append(("resize", (max(int(w * f), 8), max(int(h * f), 8))))
            else:
                ops.append(self._colour_op())
        detail = "+".join(op[0] for op in ops) + "+reencode"
        return ops, detail, keep

    def _crop(self, w: int, h: int):
        keep = round(float(self.rng.uniform(0.75, 0.95)), 3)
        cw, ch = max(int(round(w * keep)), 8), max(int(round(h * keep)), 8)
        x0 = int(self.rng.integers(0, w - cw + 1))
        y0 = int(self.rng.integers(0, h - ch + 1))
        return ("crop", (x0, y0, x0 + cw, y0 + ch)), keep

    def _colour_op(self):
        rng = self.rng
        brightness = round(float(rng.uniform(0.85, 1.15)), 3)
        gains = tuple(round(float(g), 3) for g in rng.normal(1.0, 0.05, 3))
        hue = round(float(rng.uniform(-12, 12)), 1) if rng.random() < 0.5 else 0.0
        return ("colour_shift", (brightness, gains, hue))

    def _bad_files(self, n_zero: int, n_not_image: int) -> None:
        """Zero-byte and not-an-image files with ordinary-looking metadata rows."""
        rng = self.rng
        for kind, count in (("zero_byte", n_zero), ("not_an_image", n_not_image)):
            for _ in range(count):
                source = SOURCES[int(rng.integers(3))]
                patient = self.patients[int(rng.integers(len(self.patients)))]
                day = date(2023, 1, 1) + timedelta(days=int(rng.integers(0, 365)))
                path = self._file_name(source, day, "jpg")
                row = self._row(path, source, None, None, None, "clinical", day)
                row.update(recorded_patient=self._patient_id(source, patient), is_problem_file=1,
                           problem_kind=kind, recorded_label=self._label(source, self._draw_node()))  # fmt: skip
                self.tasks.append(FileTask(kind, path))
                self.rows.append(row)

    def _placeholders(self, count: int) -> None:
        """A few rows whose patient id is a placeholder such as 'unknown'."""
        candidates = [r for r in self.rows if r["true_patient"] and not r["is_problem_file"]]
        for i in self.rng.choice(len(candidates), size=min(count, len(candidates)), replace=False):
            row = candidates[int(i)]
            row["recorded_patient"] = SOURCE_BY_NAME[row["source"]].placeholder
            row["problem_kind"] = _add_kind(row["problem_kind"], "placeholder_patient")

    def _lookalike_frame(self, files: pd.DataFrame) -> pd.DataFrame:
        originals = files[files["copy_of"].isna() & (files["is_problem_file"] == 0)]
        first = originals.groupby("true_lesion")["path"].first()
        rows = []
        for a, b in self.lookalikes:
            la, lb = self.lesions[a], self.lesions[b]
            if la["id"] in first.index and lb["id"] in first.index:
                rows.append({
                    "lesion_a": la["id"], "lesion_b": lb["id"],
                    "patient_a": la["patient"]["id"], "patient_b": lb["patient"]["id"],
                    "node": la["node"], "path_a": first[la["id"]], "path_b": first[lb["id"]],
                })  # fmt: skip
        cols = ["lesion_a", "lesion_b", "patient_a", "patient_b", "node", "path_a", "path_b"]
        return pd.DataFrame(rows, columns=cols)


# --- small helpers -------------------------------------------------------------------


def _cumulative(weights) -> np.ndarray:
    w = np.asarray(weights, dtype=float)
    return np.cumsum(w) / w.sum()


def _pick(rng: np.random.Generator, cumulative: np.ndarray) -> int:
    """Index drawn with the probabilities whose running sum is ``cumulative`` (one uniform draw)."""
    return min(int(np.searchsorted(cumulative, rng.random(), side="right")), len(cumulative) - 1)


_DIAGNOSES = tuple(DIAGNOSIS_WEIGHTS)
_DIAGNOSIS_CUMULATIVE = _cumulative(list(DIAGNOSIS_WEIGHTS.values()))
_SOURCE_CUMULATIVE = _cumulative([s.weight for s in SOURCES])
_COPY_CUMULATIVE = _cumulative(_COPY_WEIGHTS)


def _add_kind(current: str | None, kind: str) -> str:
    return kind if not current else f"{current};{kind}"


def _site(source: SourceStyle, site: str) -> str | None:
    if "body_site" not in source.columns:
        return None
    if source.name == "harbour_clinic":
        return site.title()
    if source.name == "valley_clinic":
        return site.upper().replace(" ", "_")
    return site


def _date_text(source: SourceStyle, day: date, rng: np.random.Generator) -> str:
    if "%H" in source.date_format:
        hour, minute = int(rng.integers(8, 18)), int(rng.integers(60))
        return f"{day.isoformat()} {hour:02d}:{minute:02d}"
    return day.strftime(source.date_format)


def _typo(text: str, rng: np.random.Generator) -> str:
    """Swap two neighbouring letters or drop one (a typing slip)."""
    letters = [i for i, ch in enumerate(text) if ch.isalpha()]
    if len(letters) < 4:
        return text
    i = letters[int(rng.integers(1, len(letters) - 1))]
    if rng.random() < 0.5 and i + 1 < len(text):
        return text[:i] + text[i + 1] + text[i] + text[i + 2 :]
    return text[:i] + text[i + 1 :]


_SYLLABLES = ("ka", "ri", "mo", "ta", "len", "so", "vi", "ne", "dor", "al", "mi", "ros", "te", "bel", "un")


def _invented_name(rng: np.random.Generator) -> str:
    """A made-up person's name built from syllables."""

    def word(n):
        return "".join(rng.choice(_SYLLABLES, size=n)).capitalize()

    return f"{word(2)} {word(3)}"

