"""Which embedded metadata fields may identify a patient.

Photographs carry Exif metadata written by the camera or by the software that
exported them: capture time, GPS position, free-text descriptions (where a
clinic may have typed a name), the camera owner's name and serial numbers.
None of that belongs in a dataset that is shared for training.

The field list follows the tag numbers of the Exif 2.3 standard (CIPA DC-008,
JEITA CP-3451C) and, for the Windows ``XP*`` text tags, Microsoft's
registered tags (both from memory). The choice of *what* counts as
identifying mirrors the spirit of DICOM PS3.15 Annex E (the Basic Application
Level Confidentiality Profile): dates and times, free text, device serial
numbers and locations are removed or replaced (from memory, not a clause by
clause mapping).

This module is pure: it classifies a mapping ``{tag number: value}`` per IFD
and never opens a file.
"""

from __future__ import annotations

from dataclasses import dataclass

from curate.report import Reason


class ExifFinding(Reason):
    """Why an embedded field may identify a patient (or where and when they were seen)."""

    LOCATION = "location"
    DATE_TIME = "date_time"
    FREE_TEXT = "free_text"
    PERSON_NAME = "person_name"
    DEVICE_SERIAL = "device_serial"
    UNIQUE_ID = "unique_id"


#: IFD0 / Exif IFD tags that may identify someone: tag -> (name, finding)
IDENTIFYING_TAGS: dict[int, tuple[str, ExifFinding]] = {
    0x010E: ("ImageDescription", ExifFinding.FREE_TEXT),
    0x013B: ("Artist", ExifFinding.PERSON_NAME),
    0x8298: ("Copyright", ExifFinding.PERSON_NAME),
    0x0132: ("DateTime", ExifFinding.DATE_TIME),
    0x9003: ("DateTimeOriginal", ExifFinding.DATE_TIME),
    0x9004: ("DateTimeDigitized", ExifFinding.DATE_TIME),
    0x9286: ("UserComment", ExifFinding.FREE_TEXT),
    0xA430: ("CameraOwnerName", ExifFinding.PERSON_NAME),
    0xA431: ("BodySerialNumber", ExifFinding.DEVICE_SERIAL),
    0xA435: ("LensSerialNumber", ExifFinding.DEVICE_SERIAL),
    0xA420: ("ImageUniqueID", ExifFinding.UNIQUE_ID),
    0x9C9B: ("XPTitle", ExifFinding.FREE_TEXT),
    0x9C9C: ("XPComment", ExifFinding.FREE_TEXT),
    0x9C9D: ("XPAuthor", ExifFinding.PERSON_NAME),
    0x9C9E: ("XPKeywords", ExifFinding.FREE_TEXT),
    0x9C9F: ("XPSubject", ExifFinding.FREE_TEXT),
}

#: pointer to the GPS IFD in IFD0 (Exif 2.3, tag 34853); any GPS field is a location
GPS_IFD_POINTER = 0x8825
#: pointer to the Exif IFD in IFD0 (Exif 2.3, tag 34665)
EXIF_IFD_POINTER = 0x8769
#: the Orientation tag (Exif 2.3, tag 274), kept when metadata is removed
ORIENTATION_TAG = 0x0112


@dataclass(frozen=True)
class IdentifyingField:
    """One embedded field that may identify a patient."""

    tag: int
    name: str
    finding: ExifFinding
    value: str


def _shown(value, limit: int = 60) -> str:
    if isinstance(value, bytes):
        value = value.decode("utf-16-le" if value[1:2] == b"\x00" else "latin-1", "replace")
    text = str(value).replace("\x00", "").strip()
    return text if len(text) <= limit else text[: limit - 3] + "..."


def identifying_fields(ifd0: dict, exif_ifd: dict | None = None, gps_ifd: dict | None = None) -> list[IdentifyingField]:
    """List the fields of an image's metadata that may identify a patient.

    Parameters
    ----------
    ifd0, exif_ifd, gps_ifd : dict
        ``{tag number: value}`` of IFD0, the Exif IFD and the GPS IFD (Pillow's
        ``Image.getexif()`` and its ``get_ifd(0x8769)``/``get_ifd(0x8825)``).

    Returns
    -------
    list of IdentifyingField
        In tag order; empty fields are ignored. A non-empty GPS IFD gives one
        ``location`` field whatever it holds.

    Examples
    --------
    >>> [f.name for f in identifying_fields({0x010E: "Jo Bloggs", 0x0110: "cam"}, {0x9003: "2021:01:02 10:00:00"})]
    ['ImageDescription', 'DateTimeOriginal']
    >>> identifying_fields({0x0112: 1})
    []
    >>> [f.finding.value for f in identifying_fields({}, None, {2: (51, 30, 0)})]
    ['location']
    """
    found: list[IdentifyingField] = []
    for ifd in (ifd0, exif_ifd or {}):
        for tag in sorted(ifd):
            if tag in IDENTIFYING_TAGS and _shown(ifd[tag]):
                name, finding = IDENTIFYING_TAGS[tag]
                found.append(IdentifyingField(tag, name, finding, _shown(ifd[tag])))
    if gps_ifd:
        found.append(
            IdentifyingField(GPS_IFD_POINTER, "GPSInfo", ExifFinding.LOCATION, f"{len(gps_ifd)} GPS fields")
        )
    return found
