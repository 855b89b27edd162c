"""Exceptions raised by xrec. All derive from ``XrecError`` so callers can catch one type."""

from __future__ import annotations


class XrecError(Exception):
    """Base class of every error xrec raises on purpose."""


class DataError(XrecError, ValueError):
    """Input data (catalog, interactions, files) is malformed."""


class ConfigError(XrecError, ValueError):
    """A spec, blend file or argument is invalid; the message names the field."""


class FingerprintMismatch(ConfigError):
    """A blend file was produced on different data than the data it is applied to."""


class BundleError(ConfigError):
    """A bundle folder is incomplete, altered or unreadable; the message names the file."""


class NotFittedError(XrecError, RuntimeError):
    """An estimator was used before ``fit`` (or a blend engine before ``prepare``).

    Also a :class:`RuntimeError`, which is what xrec raised here before this class existed.
    """
