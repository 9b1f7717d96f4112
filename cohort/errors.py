"""Errors Dromos raises on purpose: each says what is wrong, where, and how to fix it."""

from __future__ import annotations


class DromosError(Exception):
    """Base class; the CLI prints the message (no traceback) and exits non-zero."""

    exit_code = 2


class InputFileError(DromosError):
    """A source file cannot be read as declared (missing, wrong layout, wrong encoding)."""


class MappingError(DromosError):
    """A mapping file is malformed or does not fit the source it is applied to."""


class RegistryError(DromosError):
    """The registry file is missing, locked, or not a Dromos registry."""


class RuleSetError(DromosError):
    """A rule set file is malformed or unknown."""


class SpecError(DromosError):
    """A study spec is malformed or asks for an impossible combination."""


class DataError(DromosError):
    """Data passed to an estimator or classifier violates its requirements."""
