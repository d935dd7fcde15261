"""Raw diagnosis labels -> taxonomy nodes: the mapping file, an assistant, label conflicts.

The mapping is a CSV file the user owns, one row per raw label (as normalised
by :func:`normalise_label`), with columns

``raw_label``  the label as a source wrote it (the most common spelling)
``node``       the taxonomy node it maps to (empty: not decided)
``status``     ``confirmed`` (applied), ``proposed`` (written by the assistant,
               waiting for a person) or ``rejected`` (leave unmapped)
``score``      0..1, how sure the assistant was (1 for the user's own rows)
``method``     ``user``, ``exact`` (normalised id or name), ``synonym``,
               ``reordered`` (same words, other order), ``fuzzy``,
               ``initials`` or ``prefix`` (a short code, score 0.5) or ``none``
``images``     images carrying the label when the row was last written
``variants``   other spellings seen that normalise to the same text

:func:`propose_mappings` suggests a node for every label the file lacks, by
normalised exact match on node ids and names, then our own synonym and
abbreviation list (:data:`SYNONYMS`), the same words in another order,
abbreviations expanded inside longer labels ("MM nodular"), fuzzy matching
(``difflib`` ratio, standard library; also on sorted words), and last, for a
one-word code, the initials or the start of exactly one node name ("VW",
"ecz"). Ambiguous guesses are left empty. :func:`merge_mappings` adds the proposals without touching
the user's rows, and :func:`apply_mapping` maps every image, listing the
labels left unmapped with their counts; nothing is dropped silently.

:func:`label_conflicts` lists lesions whose images map to different nodes, and
exact/near-duplicate pairs whose nodes differ.

Only :func:`read_mapping` and :func:`write_mapping` touch files.
"""

from __future__ import annotations

import csv
import difflib
import io
import os
import re
import unicodedata
from pathlib import Path

import pandas as pd

from curate.errors import TaxonomyError
from curate.report import Finding
from curate.taxonomy import Taxonomy, TaxonomyIssue

__all__ = [
    "MAPPING_COLUMNS",
    "STATUSES",
    "SYNONYMS",
    "normalise_label",
    "propose_mappings",
    "merge_mappings",
    "apply_mapping",
    "parse_mapping",
    "read_mapping",
    "write_mapping",
    "label_conflicts",
]

MAPPING_COLUMNS = ["raw_label", "node", "status", "score", "method", "images", "variants"]
STATUSES = ("confirmed", "proposed", "rejected")

# Spelling variants folded before matching (British spellings kept, as in the example tree).
_SPELLING = {
    "nevus": "naevus",
    "nevi": "naevi",
    "naevi": "naevus",
    "seborrheic": "seborrhoeic",
    "hemangioma": "haemangioma",
    "hemangiomas": "haemangioma",
    "tumor": "tumour",
    "verruca": "wart",
    "verrucae": "wart",
    "warts": "wart",
    "keratoses": "keratosis",
    "carcinomas": "carcinoma",
    "melanomas": "melanoma",
    "bowens": "bowen",
    "bowen's": "bowen",
    "seb": "seborrhoeic",
    "ca": "carcinoma",
}

#: Our own synonym and abbreviation list: normalised text -> node id. Only
#: entries whose node exists in the tree in use are considered. Abbreviations
#: are those in common clinical use (common practice).
SYNONYMS: dict[str, str] = {
    "bcc": "basal_cell_carcinoma",
    "basalioma": "basal_cell_carcinoma",
    "basal cell ca": "basal_cell_carcinoma",
    "rodent ulcer": "basal_cell_carcinoma",
    "scc": "squamous_cell_carcinoma",
    "cscc": "squamous_cell_carcinoma",
    "squamous cell ca": "squamous_cell_carcinoma",
    "mm": "melanoma",
    "mel": "melanoma",
    "malignant melanoma": "melanoma",
    "ssm": "superficial_spreading_melanoma",
    "nm": "nodular_melanoma",
    "lmm": "lentigo_maligna_melanoma",
    "alm": "acral_lentiginous_melanoma",
    "mis": "melanoma_in_situ",
    "in situ melanoma": "melanoma_in_situ",
    "lm": "lentigo_maligna",
    "ak": "actinic_keratosis",
    "akiec": "actinic_keratosis",
    "solar keratosis": "actinic_keratosis",
    "senile keratosis": "actinic_keratosis",
    "sk": "seborrhoeic_keratosis",
    "seb k": "seborrhoeic_keratosis",
    "basal cell papilloma": "seborrhoeic_keratosis",
    "bowen": "bowen_disease",
    "bowen disease": "bowen_disease",
    "scc in situ": "bowen_disease",
    "squamous cell carcinoma in situ": "bowen_disease",
    "intraepidermal carcinoma": "bowen_disease",
    "mole": "naevus",
    "naevus": "naevus",
    "benign naevus": "naevus",
    "common naevus": "naevus",
    "melanocytic naevus": "naevus",
    "atypical naevus": "dysplastic_naevus",
    "clark naevus": "dysplastic_naevus",
    "intradermal naevus": "dermal_naevus",
    "idn": "dermal_naevus",
    "dn": "dysplastic_naevus",
    "df": "dermatofibroma",
    "benign fibrous histiocytoma": "dermatofibroma",
    "angioma": "haemangioma",
    "cherry haemangioma": "cherry_angioma",
    "campbell de morgan spot": "cherry_angioma",
    "pg": "pyogenic_granuloma",
    "lobular capillary haemangioma": "pyogenic_granuloma",
    "senile lentigo": "solar_lentigo",
    "lentigo senilis": "solar_lentigo",
    "age spot": "solar_lentigo",
    "liver spot": "solar_lentigo",
    "lplk": "lichen_planus_like_keratosis",
    "wart": "viral_wart",
    "common wart": "viral_wart",
    "ringworm": "tinea",
    "dermatophytosis": "tinea",
    "dermatitis": "eczema",
    "atopic eczema": "atopic_dermatitis",
    "skin tag": "acrochordon",
    "sebaceous cyst": "epidermoid_cyst",
    "epidermal cyst": "epidermoid_cyst",
    "dfsp": "dermatofibrosarcoma_protuberans",
    "mcc": "merkel_cell_carcinoma",
    "ks": "kaposi_sarcoma",
    "shingles": "herpes_zoster",
    "cold sore": "herpes_simplex",
}

_NON_WORD = re.compile(r"[^0-9a-z']+")


def normalise_label(text) -> str:
    """Fold case, accents, punctuation and spacing, and British/American spellings.

    Examples
    --------
    >>> normalise_label("  Seborrheic  Keratosis (SK) ")
    'seborrhoeic keratosis sk'
    >>> normalise_label("Nevus, compound")
    'naevus compound'
    >>> normalise_label("Bowen's_disease")
    'bowen disease'
    """
    if text is None or (isinstance(text, float) and text != text):
        return ""
    s = unicodedata.normalize("NFKD", str(text))
    s = "".join(ch for ch in s if not unicodedata.combining(ch)).casefold()
    s = s.replace("\u2019", "'")
    words = [w.strip("'") for w in _NON_WORD.sub(" ", s).split()]
    words = [_SPELLING.get(w, w) for w in words if w]
    words = [w[:-2] if w.endswith("'s") else w for w in words]
    return " ".join(w for w in words if w)


def _name_variants(taxonomy: Taxonomy) -> dict[str, str]:
    """Normalised node ids and names -> node id; names without their bracketed part come last."""
    out: dict[str, str] = {}
    for node in taxonomy.order:
        for text in (node, taxonomy.name(node)):
            out.setdefault(normalise_label(text), node)
    for node in taxonomy.order:  # "Dermal (intradermal) naevus" -> "dermal naevus"
        out.setdefault(normalise_label(re.sub(r"\(.*?\)", " ", taxonomy.name(node))), node)
    out.pop("", None)
    return out


class _Matcher:
    """Tries the matching rules in order of confidence; see :func:`propose_mappings`."""

    def __init__(self, taxonomy: Taxonomy, *, fuzzy_cutoff: float):
        self.names = _name_variants(taxonomy)
        self.synonyms = {normalise_label(k): v for k, v in SYNONYMS.items() if v in taxonomy}
        # abbreviations (one-word synonyms) expand inside longer labels: "mm nodular"
        self.expand = {k: normalise_label(taxonomy.name(v)) for k, v in self.synonyms.items() if " " not in k}
        self.candidates = {**self.synonyms, **self.names}
        self.by_tokens: dict[str, set[str]] = {}
        for text, node in self.candidates.items():
            self.by_tokens.setdefault(_sorted_tokens(text), set()).add(node)
        self.choices = sorted(set(self.candidates) | set(self.by_tokens))
        self.initials: dict[str, set[str]] = {}
        self.first_words: dict[str, set[str]] = {}
        for text, node in self.names.items():
            words = text.split()
            self.initials.setdefault("".join(w[0] for w in words), set()).add(node)
            self.first_words.setdefault(words[0], set()).add(node)
        self.fuzzy_cutoff = fuzzy_cutoff

    def _lookup(self, key: str):
        if key in self.names:
            return self.names[key], 1.0, "exact"
        if key in self.synonyms:
            return self.synonyms[key], 1.0, "synonym"
        nodes = self.by_tokens.get(_sorted_tokens(key), set())
        if len(nodes) == 1:  # same words in another order: "naevus, junctional"
            return next(iter(nodes)), 0.95, "reordered"
        return None

    def match(self, key: str) -> tuple[str, float, str]:
        if not key:
            return "", 0.0, "none"
        found = self._lookup(key)
        if found:
            return found
        expanded = " ".join(self.expand.get(w, w) for w in key.split())
        if expanded != key:
            found = self._lookup(expanded)
            if found:
                return found[0], 0.9, "synonym"
        scored = []  # (ratio, choice) over the label as written, expanded, and with sorted words
        for probe in dict.fromkeys([key, expanded, _sorted_tokens(key), _sorted_tokens(expanded)]):
            for best in difflib.get_close_matches(probe, self.choices, n=1, cutoff=self.fuzzy_cutoff):
                scored.append((difflib.SequenceMatcher(None, probe, best).ratio(), best))
        if scored:
            ratio, best = max(scored)
            nodes = {self.candidates[best]} if best in self.candidates else self.by_tokens[best]
            if len(nodes) == 1:
                return next(iter(nodes)), round(ratio, 3), "fuzzy"
        if " " not in key and key.isalpha():
            # a clinic's own short code: initials ("vw") or a word's start ("ecz"), if unambiguous
            nodes = self.initials.get(key, set()) if len(key) >= 2 else set()
            if len(nodes) == 1:
                return next(iter(nodes)), 0.5, "initials"
            if len(key) >= 3:
                nodes = set().union(*(v for w, v in self.first_words.items() if w.startswith(key)), set())
                if len(nodes) == 1:
                    return next(iter(nodes)), 0.5, "prefix"
        return "", 0.0, "none"


def _sorted_tokens(text: str) -> str:
    return " ".join(sorted(text.split()))


def propose_mappings(
    labels: pd.Series,
    taxonomy: Taxonomy,
    *,
    fuzzy_cutoff: float = 0.8,
    known: set[str] | None = None,
) -> pd.DataFrame:
    """Propose a node for every distinct raw label (by normalised text).

    Parameters
    ----------
    labels : Series
        Raw labels, one per image (missing values are counted as the empty label).
    taxonomy : Taxonomy
    fuzzy_cutoff : float, default 0.8
        Lowest ``difflib.SequenceMatcher`` ratio (0..1) accepted for a fuzzy match.
    known : set of str, optional
        Normalised labels already in the user's mapping; they get no proposal.

    Returns
    -------
    DataFrame
        :data:`MAPPING_COLUMNS`, status ``proposed``; a label without any
        match gets an empty node and method ``none``. Sorted by image count,
        most common first.

    Examples
    --------
    >>> from curate.taxonomy import example_taxonomy
    >>> t = example_taxonomy()
    >>> p = propose_mappings(pd.Series(["BCC", "bcc", "Melanoma in-situ", "dermatofibrom", "xyz"]), t)
    >>> p[["raw_label", "node", "method", "images"]].to_string(index=False)
    ...                                                  # doctest: +NORMALIZE_WHITESPACE
    '       raw_label                 node method  images\\n             BCC basal_cell_carcinoma synonym       2\\nMelanoma in-situ     melanoma_in_situ  exact       1\\n   dermatofibrom       dermatofibroma  fuzzy       1\\n             xyz                        none       1'
    """
    if not 0 < fuzzy_cutoff <= 1:
        raise ValueError(f"fuzzy_cutoff must be in (0, 1], got {fuzzy_cutoff!r}")
    known = known or set()
    frame = pd.DataFrame({"raw": labels.astype("object").where(labels.notna(), "")})
    frame["key"] = frame["raw"].map(normalise_label)
    matcher = _Matcher(taxonomy, fuzzy_cutoff=fuzzy_cutoff)
    rows = []
    for key, grp in frame.groupby("key", sort=False):
        if key in known:
            continue
        spellings = grp["raw"].value_counts()
        raw = str(spellings.index[0])
        variants = "; ".join(str(v) for v in spellings.index[1:])
        node, score, method = matcher.match(key)
        rows.append((raw, node, "proposed", score, method, len(grp), variants))
    out = pd.DataFrame(rows, columns=MAPPING_COLUMNS)
    return out.sort_values(["images", "raw_label"], ascending=[False, True], kind="stable").reset_index(drop=True)


def merge_mappings(existing: pd.DataFrame, proposals: pd.DataFrame) -> pd.DataFrame:
    """The user's rows unchanged, then proposals for labels they lack.

    A proposal whose normalised label is already a row is skipped, so a
    person's decision is never overwritten.
    """
    have = set(existing["raw_label"].map(normalise_label)) if len(existing) else set()
    new = proposals[~proposals["raw_label"].map(normalise_label).isin(have)]
    frames = [f for f in (existing, new) if len(f)]
    if not frames:
        return pd.DataFrame(columns=MAPPING_COLUMNS)
    return pd.concat(frames, ignore_index=True)[MAPPING_COLUMNS]


def parse_mapping(text: str, taxonomy: Taxonomy | None = None, *, file: str | None = None) -> pd.DataFrame:
    """Parse and check a mapping CSV; every problem is reported at once.

    Raises :class:`~curate.errors.TaxonomyError` (reasons ``missing_columns``,
    ``unknown_node``, ``bad_status``, ``conflicting_mapping``, each with its
    line number) when the file cannot be used. The returned frame has a
    ``line`` column (1-based, header = 1).

    Examples
    --------
    >>> m = parse_mapping("raw_label,node,status\\nBCC,basal_cell_carcinoma,confirmed\\n")
    >>> m.loc[0, ["raw_label", "node", "status"]].tolist(), int(m.loc[0, "line"])
    (['BCC', 'basal_cell_carcinoma', 'confirmed'], 2)
    """
    reader = csv.DictReader(io.StringIO(text))
    header = [h.strip() for h in (reader.fieldnames or [])]
    missing = [c for c in ("raw_label", "node") if c not in header]
    if missing:
        f = Finding("taxonomy", TaxonomyIssue.MISSING_COLUMNS.value,
                    f"missing column(s) {', '.join(missing)}", file=file, row=1)
        raise TaxonomyError(f"{file or 'mapping'}: {f.message}", (f,))
    reader.fieldnames = header
    rows, problems = [], []
    seen: dict[str, tuple[str, int]] = {}
    for rec in reader:
        line = reader.line_num
        raw = (rec.get("raw_label") or "").strip()
        node = (rec.get("node") or "").strip()
        status = (rec.get("status") or "").strip().lower() or ("confirmed" if node else "proposed")
        if status not in STATUSES:
            problems.append(Finding("taxonomy", TaxonomyIssue.BAD_STATUS.value,
                                    f"status {status!r} is not one of {', '.join(STATUSES)}",
                                    file=file, row=line, value=status))
        if node and taxonomy is not None and node not in taxonomy:
            problems.append(Finding("taxonomy", TaxonomyIssue.UNKNOWN_NODE.value,
                                    f"label {raw!r} maps to {node!r}, which is not a taxonomy node",
                                    file=file, row=line, value=node))
        key = normalise_label(raw)
        if status == "confirmed" and key in seen and seen[key][0] != node:
            problems.append(Finding("taxonomy", TaxonomyIssue.CONFLICTING_MAPPING.value,
                                    f"label {raw!r} maps to {node!r} here and to {seen[key][0]!r} "
                                    f"on line {seen[key][1]}", file=file, row=line, value=raw))
        elif status == "confirmed":
            seen.setdefault(key, (node, line))
        score = pd.to_numeric(rec.get("score") or "", errors="coerce")
        images = pd.to_numeric(rec.get("images") or "", errors="coerce")
        rows.append((raw, node, status, 1.0 if pd.isna(score) and status == "confirmed" else score,
                     (rec.get("method") or "user").strip(), images, (rec.get("variants") or "").strip(), line))
    if problems:
        lines = "\n".join(f"  {p.reason}: line {p.row}: {p.message}" for p in problems[:50])
        raise TaxonomyError(f"{file or 'mapping'}: {len(problems)} problem(s)\n{lines}", tuple(problems))
    return pd.DataFrame(rows, columns=MAPPING_COLUMNS + ["line"])


def apply_mapping(
    labels: pd.Series, mapping: pd.DataFrame, *, accept_proposed: bool = False
) -> tuple[pd.Series, pd.DataFrame]:
    """Map raw labels to nodes with a mapping frame.

    Rows with status ``confirmed`` are applied; with ``accept_proposed`` also
    ``proposed`` rows that name a node. Labels are matched by normalised text.

    Returns
    -------
    nodes : Series
        Node per label (same index as ``labels``), missing when unmapped.
    unmapped : DataFrame
        ``raw_label``, ``images``, ``status`` (``absent`` when the file has no
        row for it), most common first. Empty when every label is mapped.

    Examples
    --------
    >>> m = pd.DataFrame({"raw_label": ["BCC"], "node": ["basal_cell_carcinoma"],
    ...                   "status": ["confirmed"]})
    >>> nodes, unmapped = apply_mapping(pd.Series(["bcc", "B.C.C.", "other"]), m)
    >>> nodes.tolist()
    ['basal_cell_carcinoma', None, None]
    >>> unmapped[["raw_label", "images", "status"]].values.tolist()
    [['B.C.C.', 1, 'absent'], ['other', 1, 'absent']]
    """
    ok = mapping["status"].eq("confirmed")
    if accept_proposed:
        ok |= mapping["status"].eq("proposed")
    ok &= mapping["node"].fillna("").astype(str).str.len() > 0
    table = dict(zip(mapping.loc[ok, "raw_label"].map(normalise_label), mapping.loc[ok, "node"]))
    status_of = dict(zip(mapping["raw_label"].map(normalise_label), mapping["status"]))
    keys = labels.map(normalise_label)
    nodes = keys.map(table).astype("object")
    nodes = nodes.where(nodes.notna(), None)
    missing = labels[nodes.isna()]
    if len(missing):
        raw = missing.astype("object").where(missing.notna(), "")
        unmapped = (
            pd.DataFrame({"raw_label": raw, "key": keys[nodes.isna()]})
            .groupby("key", sort=False)
            .agg(raw_label=("raw_label", lambda s: s.value_counts().index[0]), images=("raw_label", "size"))
            .reset_index()
        )
        unmapped["status"] = unmapped["key"].map(status_of).fillna("absent")
        unmapped = unmapped.drop(columns="key").sort_values(
            ["images", "raw_label"], ascending=[False, True], kind="stable").reset_index(drop=True)
    else:
        unmapped = pd.DataFrame(columns=["raw_label", "images", "status"])
    return nodes, unmapped


def read_mapping(path: str | os.PathLike, taxonomy: Taxonomy | None = None) -> pd.DataFrame:
    """Read a mapping CSV (see :func:`parse_mapping`); a missing file is an empty mapping."""
    path = Path(path)
    if not path.exists():
        return pd.DataFrame(columns=MAPPING_COLUMNS + ["line"])
    return parse_mapping(path.read_text(encoding="utf-8-sig"), taxonomy, file=str(path))


def write_mapping(mapping: pd.DataFrame, path: str | os.PathLike) -> None:
    """Write the mapping CSV atomically (temporary file, then rename)."""
    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    mapping[MAPPING_COLUMNS].to_csv(tmp, index=False)
    os.replace(tmp, path)


CONFLICT_COLUMNS = ["kind", "lesion_id", "image_a", "image_b", "node_a", "node_b", "relation", "n_images"]


def label_conflicts(
    frame: pd.DataFrame,
    pairs: pd.DataFrame | None = None,
    taxonomy: Taxonomy | None = None,
    *,
    verdicts: tuple[str, ...] = ("exact", "near"),
) -> pd.DataFrame:
    """Lesions and duplicate pairs whose images carry different nodes, to review.

    Parameters
    ----------
    frame : DataFrame
        ``image_id``, ``node`` and optionally ``lesion_id``.
    pairs : DataFrame, optional
        The near-duplicate pairs table (``image_a``, ``image_b``, ``verdict``);
        pairs whose verdict is in ``verdicts`` are checked.
    taxonomy : Taxonomy, optional
        When given, ``relation`` says whether one node is an ``ancestor`` of
        the other (less specific label) or they are ``disjoint``.

    Returns
    -------
    DataFrame
        :data:`CONFLICT_COLUMNS`. ``kind`` is ``lesion`` (one row per lesion,
        first two distinct nodes shown, ``n_images`` its images) or the pair's
        verdict.

    Examples
    --------
    >>> f = pd.DataFrame({"image_id": [1, 2, 3], "lesion_id": ["L1", "L1", "L2"],
    ...                   "node": ["mel", "nev", "nev"]})
    >>> p = pd.DataFrame({"image_a": [1, 2], "image_b": [3, 3], "verdict": ["near", "possible"]})
    >>> label_conflicts(f, p)[["kind", "image_a", "image_b", "node_a", "node_b"]].values.tolist()
    [['lesion', 1, 2, 'mel', 'nev'], ['near', 1, 3, 'mel', 'nev']]
    """
    out = []
    mapped = frame[frame["node"].notna()]

    def relation(a, b):
        if taxonomy is None or a not in taxonomy or b not in taxonomy:
            return None
        if a in taxonomy.ancestors(b) or b in taxonomy.ancestors(a):
            return "ancestor"
        return "disjoint"

    if "lesion_id" in mapped.columns:
        with_lesion = mapped[mapped["lesion_id"].notna()].sort_values("image_id", kind="stable")
        for lesion, grp in with_lesion.groupby("lesion_id", sort=True):
            firsts = grp.drop_duplicates("node")
            if len(firsts) > 1:
                a, b = firsts.iloc[0], firsts.iloc[1]
                out.append(("lesion", lesion, int(a["image_id"]), int(b["image_id"]), a["node"], b["node"],
                            relation(a["node"], b["node"]), len(grp)))
    if pairs is not None and len(pairs):
        node_of = dict(zip(mapped["image_id"], mapped["node"]))
        chosen = pairs[pairs["verdict"].isin(verdicts)].sort_values(["image_a", "image_b"], kind="stable")
        for a, b, verdict in zip(chosen["image_a"], chosen["image_b"], chosen["verdict"]):
            na, nb = node_of.get(a), node_of.get(b)
            if na is not None and nb is not None and na != nb:
                out.append((verdict, None, int(a), int(b), na, nb, relation(na, nb), 2))
    return pd.DataFrame(out, columns=CONFLICT_COLUMNS)
