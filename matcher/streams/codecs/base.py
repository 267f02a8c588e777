"""The codec protocol and its registry.

A codec turns one :class:`~matcher.streams.raw.RawItem` (bytes and where they came
from) into a validated message, or raises :class:`~matcher.errors.MessageError`
naming the codec, the message id when it could be read, the field and why.
Adding a format is one new module that calls :func:`register_codec`.
"""

from __future__ import annotations

from typing import Any, Callable, Mapping, Protocol, runtime_checkable

from matcher.errors import ConfigError
from matcher.streams.messages import Message
from matcher.streams.raw import RawItem

__all__ = [
    "Codec",
    "CodecFactory",
    "DEFAULT_MAX_MESSAGE_BYTES",
    "register_codec",
    "make_codec",
    "codec_names",
]

#: Largest message accepted by default (bytes): room for a base64 multi-order map.
DEFAULT_MAX_MESSAGE_BYTES = 16 * 1024 * 1024


@runtime_checkable
class Codec(Protocol):
    """Decodes raw items into messages.

    Attributes
    ----------
    name : str
        The codec's registry name, used in errors and stored with each message.
    """

    name: str

    def decode(self, item: RawItem) -> Message:
        """Return the validated message in ``item``; raise ``MessageError`` otherwise."""
        ...


#: ``factory(options, keypath=..., max_bytes=...) -> Codec``; raises ``ConfigError`` naming the key path.
CodecFactory = Callable[..., Codec]

_REGISTRY: dict[str, CodecFactory] = {}


def register_codec(name: str, factory: CodecFactory) -> None:
    """Register a codec factory under ``name`` (replacing any earlier one of that name)."""
    if not isinstance(name, str) or not name.isidentifier():
        raise ValueError(f"codec name must be an identifier, got {name!r}")
    _REGISTRY[name] = factory


def codec_names() -> tuple[str, ...]:
    """Names of the registered codecs, sorted."""
    return tuple(sorted(_REGISTRY))


def make_codec(name: str, options: Mapping[str, Any] | None = None, *, keypath: str = "codec",
               max_bytes: int = DEFAULT_MAX_MESSAGE_BYTES) -> Codec:
    """Build the codec registered as ``name`` with its options.

    Parameters
    ----------
    name : str
        ``native``, ``mapped``, ``voevent`` or any registered name.
    options : mapping, optional
        The codec's own options (for ``mapped``, its field mapping).
    keypath : str
        Where the options sit in the configuration, for error messages.
    max_bytes : int, bytes
        Messages larger than this are rejected before parsing.

    Raises
    ------
    ConfigError
        Unknown codec or invalid options.
    """
    factory = _REGISTRY.get(name)
    if factory is None:
        raise ConfigError(keypath, f"unknown codec {name!r}; known: {', '.join(codec_names())}")
    return factory(dict(options or {}), keypath=keypath, max_bytes=int(max_bytes))
