"""Exception types raised by curate.

Every exception here is small and picklable: it carries paths, ids and
reason codes, never images or DataFrames, because errors cross process
boundaries when hashing runs in a worker pool.
"""

from __future__ import annotations


class CurateError(Exception):
    """Base class of every error curate raises on purpose."""


class WorkspaceError(CurateError):
    """A workspace folder is missing, not a workspace, or of an unknown schema."""


class CatalogError(CurateError):
    """Input that cannot be used at all (a metadata file without the required columns...).

    ``findings`` holds the rows of the report that explain why, as plain
    tuples, so the error pickles cleanly.
    """

    def __init__(self, message: str, findings: tuple = ()):
        super().__init__(message)
        self.findings = tuple(findings)

    def __reduce__(self):
        return (type(self), (self.args[0], self.findings))


class ManifestError(CurateError):
    """A manifest file is malformed, of an unknown format version, or would be overwritten."""


class TaxonomyError(CurateError):
    """A taxonomy tree or label-mapping file has problems; ``problems`` lists every one."""

    def __init__(self, message: str, problems: tuple = ()):
        super().__init__(message)
        self.problems = tuple(problems)

    def __reduce__(self):
        return (type(self), (self.args[0], self.problems))


class LeakageError(CurateError):
    """A split leaks: the same patient, lesion or image sits in more than one split."""


class OptionalDependencyError(CurateError, ImportError):
    """An optional dependency is needed for this call; the message says what to install."""
