"""curate: assemble dermatology image datasets that do not leak.

The public API is re-exported here lazily, so ``import curate`` stays cheap and
imports no optional dependency (ipywidgets, click, dask).

curate curates data; it does not diagnose.
"""

from __future__ import annotations

import importlib
from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("curate")
except PackageNotFoundError:  # pragma: no cover - running from a source tree
    __version__ = "0+unknown"

# public name -> module that defines it; one block per concern
_EXPORTS: dict[str, str] = {
    # foundation
    "Workspace": "curate.store",
    "Finding": "curate.report",
    "Report": "curate.report",
    "IngestIssue": "curate.report",
    "LeakReason": "curate.report",
    "CurateError": "curate.errors",
    "CatalogError": "curate.errors",
    "ManifestError": "curate.errors",
    "LeakageError": "curate.errors",
    "TaxonomyError": "curate.errors",
    "WorkspaceError": "curate.errors",
    # embedded metadata (privacy)
    "identifying_metadata": "curate.exif_files",
    "write_clean_copies": "curate.exif_files",
    # workspace report
    "write_report": "curate.workspace_report",
    # ingest
    "scan_folder": "curate.ingest",
    "scan_metadata": "curate.ingest",
    "ScanResult": "curate.ingest",
    "exact_duplicates": "curate.ingest",
    "parse_columns": "curate.metadata",
    "file_sha256": "curate.file_probe",
    # review (ipywidgets is imported only when a widget is built; the function
    # `review` stays in curate.review because the submodule has that name)
    "ReviewSession": "curate.review_queue",
    "record_decision": "curate.review_queue",
    "current_decisions": "curate.review_queue",
    "ThumbnailCache": "curate.thumbnails",
    "review_clusters": "curate.review",
    "ReviewWidget": "curate.review",
    "ClusterWidget": "curate.review",
    # demo scenario and pipeline
    "generate_scenario": "curate.demo",
    "Scenario": "curate.demo",
    "run_pipeline": "curate.pipeline",
    # groups and splits
    "group_images": "curate.grouping",
    "Grouping": "curate.grouping",
    "GroupIssue": "curate.grouping",
    "is_placeholder_id": "curate.grouping",
    "BalancedGroupKFold": "curate.splitting",
    "assign": "curate.splitting",
    "propose_split": "curate.splitting",
    "SplitAssignment": "curate.splitting",
    "SplitIssue": "curate.splitting",
    "build_groups": "curate.split_store",
    "split_workspace": "curate.split_store",
    # leakage check and frozen manifests
    "check_leakage": "curate.leakage_check",
    "find_leaks": "curate.leakage",
    "LeakageReport": "curate.leakage",
    "read_manifest": "curate.manifest_io",
    "load_manifest": "curate.manifest_io",
    "write_manifest": "curate.manifest_io",
    "verify_manifest": "curate.manifest_io",
    "Manifest": "curate.manifest",
    "ManifestCheck": "curate.manifest",
    "ManifestIssue": "curate.manifest",
    "freeze_split": "curate.freeze",
    "FrozenManifest": "curate.freeze",
    "pseudonym": "curate.pseudonyms",
    # hashing
    "PerceptualHash": "curate.hashing",
    "average_hash": "curate.hashing",
    "difference_hash": "curate.hashing",
    "dct_hash": "curate.hashing",
    "wavelet_hash": "curate.hashing",
    "colour_hash": "curate.hashing",
    "hash_thumbnail": "curate.hashing",
    # (the function hash_files stays in curate.hash_files: the submodule has that name)
    "hash_workspace": "curate.hash_files",
    "load_hashes": "curate.hash_files",
    # pairs (near-duplicate search)
    "radius_pairs": "curate.hamming_index",
    "radius_query": "curate.hamming_index",
    "score_pairs": "curate.near_duplicates",
    "duplicate_clusters": "curate.near_duplicates",
    "find_pairs": "curate.pair_store",
    "load_pairs": "curate.pair_store",
    "find_near_duplicates": "curate.pair_store",
    # taxonomy, label mapping, balance, training classes, skin tone
    # (curate.balance is also callable as the function once the submodule is imported)
    "Taxonomy": "curate.taxonomy",
    "TaxonomyNode": "curate.taxonomy",
    "TaxonomyIssue": "curate.taxonomy",
    "read_taxonomy": "curate.taxonomy",
    "parse_taxonomy": "curate.taxonomy",
    "check_taxonomy": "curate.taxonomy",
    "example_taxonomy": "curate.taxonomy",
    "normalise_label": "curate.label_mapping",
    "propose_mappings": "curate.label_mapping",
    "apply_mapping": "curate.label_mapping",
    "read_mapping": "curate.label_mapping",
    "label_conflicts": "curate.label_mapping",
    "balance": "curate.balance",
    "check_balance": "curate.balance",
    "BalanceIssue": "curate.balance",
    "tree_view": "curate.balance",
    "plot_balance": "curate.balance",
    "propose_classes": "curate.training_classes",
    "ClassProposal": "curate.training_classes",
    "srgb_to_lab": "curate.skin_tone",
    "ita": "curate.skin_tone",
    "ita_bin": "curate.skin_tone",
    "estimate_ita": "curate.skin_tone",
    "estimate_skin_tone": "curate.skin_tone_files",
    "map_workspace_labels": "curate.taxonomy_workspace",
    "node_frame": "curate.taxonomy_workspace",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name: str):
    try:
        module = _EXPORTS[name]
    except KeyError:
        raise AttributeError(f"module 'curate' has no attribute {name!r}") from None
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__():
    return __all__
