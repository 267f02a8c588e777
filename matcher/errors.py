"""Exception types: a few, under one root, carrying data.

Every message names the thing (file, message id, config key path) and the
problem, and where it helps, the way out.
"""

from __future__ import annotations

__all__ = [
    "MatcherError",
    "InputError",
    "SkyMapError",
    "ConfigError",
    "MessageError",
    "CatalogError",
    "MatcherWarning",
]


class MatcherError(Exception):
    """Root of every error matcher raises on purpose."""


class InputError(MatcherError, ValueError):
    """Bad user input: a value out of range, an unreadable file, a wrong type."""


class SkyMapError(InputError):
    """A localization file or array that is not a usable HEALPix sky map.

    Parameters
    ----------
    source : str
        What was read (a path, ``"<bytes>"``, a URL).
    problem : str
        What is wrong with it.
    """

    def __init__(self, source: str, problem: str):
        self.source = source
        self.problem = problem
        super().__init__(f"{source}: {problem}")


class ConfigError(InputError):
    """A configuration value that fails validation; ``path`` is the key path."""

    def __init__(self, path: str, problem: str):
        self.path = path
        self.problem = problem
        super().__init__(f"config {path}: {problem}")


class MessageError(InputError):
    """A message that fails validation.

    Parameters
    ----------
    codec : str
        The codec that read it (``native``, ``mapped``, ``voevent``).
    message_id : str or None
        The event or transient id when it could be read.
    field : str or None
        The offending field.
    problem : str
        The constraint that failed.
    """

    def __init__(self, codec: str, message_id: str | None, field: str | None, problem: str):
        self.codec = codec
        self.message_id = message_id
        self.field = field
        self.problem = problem
        who = f" {message_id}" if message_id else ""
        where = f" {field}" if field else ""
        super().__init__(f"{codec} message{who}:{where} {problem}")


class CatalogError(InputError):
    """A galaxy catalogue or index that cannot be used."""


class MatcherWarning(UserWarning):
    """Something was accepted after a correction the user should know about."""
