"""Codecs: raw bytes to validated messages (native JSON, field-mapped JSON, VOEvent 2.0 XML).

``make_codec(name, options)`` builds one from the registry; see :mod:`.base`.
"""

from matcher.streams.codecs.base import (
    DEFAULT_MAX_MESSAGE_BYTES,
    Codec,
    CodecFactory,
    codec_names,
    make_codec,
    register_codec,
)
from matcher.streams.codecs.mapped import MappedCodec, parse_mapping
from matcher.streams.codecs.native import NativeCodec
from matcher.streams.codecs.voevent import VOEventCodec

__all__ = [
    "Codec",
    "CodecFactory",
    "DEFAULT_MAX_MESSAGE_BYTES",
    "register_codec",
    "make_codec",
    "codec_names",
    "NativeCodec",
    "MappedCodec",
    "parse_mapping",
    "VOEventCodec",
]
