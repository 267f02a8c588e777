"""The decode step of the service loop: a raw item becomes an accepted message or a rejection.

``decode_item`` never raises for bad input: every problem a sender can cause
(bytes, JSON, fields, the localization it points to) comes back as a
:class:`Rejected` with a reason naming the codec and the field, ready to be
quarantined. ``record`` then writes either kind into a store transaction.
Both kinds have ``.item`` and ``.reason`` (``None`` when accepted), which is all a
source needs to settle an item after the store has committed it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

from matcher.errors import MessageError, SkyMapError
from matcher.frozen import build_frozen
from matcher.streams.codecs.base import Codec
from matcher.streams.localization import LoadedLocalization, LocalizationLimits, load_localization
from matcher.streams.messages import Message
from matcher.streams.raw import RawItem

__all__ = ["Accepted", "Rejected", "Decoded", "decode_item", "record", "record_batch"]


@dataclass(frozen=True)
class Accepted:
    """A valid message, with its loaded localization when it has one.

    ``prepared``: what the decode process computed for a report it decoded, ``(dedup key,
    extra_text, content, numbers, row)``: the item's :func:`~matcher.streams.raw.dedup_key`;
    the last value of the report's transients row and the row's text (as
    :meth:`matcher.store.Transaction.transient_values` gives them); and the batch's numbers
    array (``REPORT_NUMBERS`` of :mod:`matcher.coincidence.batch`) with the report's row in it.
    Not part of the value: equality and repr ignore it.
    """

    item: RawItem
    codec: str
    message: Message
    localization: LoadedLocalization | None = None
    reason: None = None
    prepared: tuple | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True)
class Rejected:
    """Input that is not a usable message, and why (``field`` names the offending field)."""

    item: RawItem
    codec: str
    reason: str
    field: str | None = None


Decoded = Accepted | Rejected


def decode_item(item: RawItem, codec: Codec, limits: LocalizationLimits = LocalizationLimits(), *,
                opener: Callable | None = None) -> Decoded:
    """Decode ``item`` with ``codec`` and load its localization.

    Parameters
    ----------
    item : RawItem
    codec : Codec
    limits : LocalizationLimits
        Size cap, URL allow-list and timeouts for the localization.
    opener : callable, optional
        Passed to :func:`~matcher.streams.localization.load_localization` (URL fetches).

    Returns
    -------
    Accepted or Rejected
    """
    try:
        message = codec.decode(item)
    except MessageError as exc:
        return Rejected(item, codec.name, str(exc), exc.field)
    loc = getattr(message, "localization", None)
    if loc is None:
        # Accepted(item, codec.name, message): the result of almost every item.
        return build_frozen(Accepted, {"item": item, "codec": codec.name, "message": message,
                                       "localization": None, "reason": None, "prepared": None})
    try:
        loaded = load_localization(loc, limits, opener=opener)
    except SkyMapError as exc:
        mid = getattr(message, "event_id", None) or getattr(message, "transient_id", None)
        return Rejected(item, codec.name, f"{codec.name} message {mid}: localization {exc}", "localization")
    return Accepted(item, codec.name, message, loaded)


def record(tx, decoded: Decoded):
    """Write a decoded item into a store transaction.

    Returns
    -------
    StoredMessage or None or bool
        For an accepted message what :meth:`matcher.store.Transaction.add_message` returns
        (``None``: already stored); for a rejection whether it was newly quarantined.
    """
    if isinstance(decoded, Accepted):
        return tx.add_message(decoded.item, decoded.codec, decoded.message, decoded.localization)
    return tx.quarantine(decoded.item, decoded.codec, decoded.reason, decoded.field)


def record_batch(tx, decoded) -> list:
    """:func:`record` for a batch, in order, with the accepted messages written in bulk.

    Returns
    -------
    list
        One entry per decoded item, as :func:`record` returns it.
    """
    out: list = [None] * len(decoded)
    accepted = [(i, d) for i, d in enumerate(decoded) if isinstance(d, Accepted)]
    stored = tx.add_messages([(d.item, d.codec, d.message, d.localization, d.prepared) for _, d in accepted])
    for (i, _), r in zip(accepted, stored):
        out[i] = r
    for i, d in enumerate(decoded):
        if not isinstance(d, Accepted):
            out[i] = tx.quarantine(d.item, d.codec, d.reason, d.field)
    return out
