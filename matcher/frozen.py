"""Building frozen dataclass instances in hot loops.

A frozen dataclass's generated ``__init__`` sets each field with an
``object.__setattr__`` call; for objects made once per message (origins, raw
items, reports, decode results) that is a measurable share of the service loop.
:func:`build_frozen` fills the instance's ``__dict__`` at once instead: the same
object (type, fields, equality, hash, repr, still frozen, pickled alike). Only
for classes whose ``__post_init__`` (if any) would change nothing for the given
values; the callers' tests hold the results to the constructors.
"""

from __future__ import annotations

from typing import Any, TypeVar

__all__ = ["build_frozen"]

T = TypeVar("T")


def build_frozen(cls: type[T], fields: dict[str, Any]) -> T:
    """``cls(**fields)`` for a frozen dataclass, without its generated ``__init__`` (every field given)."""
    obj = object.__new__(cls)
    obj.__dict__.update(fields)
    return obj
