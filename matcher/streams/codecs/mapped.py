"""The field-mapped codec: read someone else's JSON by naming where our fields are.

A mapping goes from *our* field names (the ``matcher/1`` schema; dotted for nested
ones such as ``source_probs.bns`` or ``localization.url``) to a rule:

- a string: a dotted path in the foreign JSON (``candidate.ra``; an all-digit
  segment indexes a list: ``detections.0.mjd``);
- ``{path: ..., unit: ..., values: {...}, default: ...}``: a path with a unit
  (angles ``deg``, ``rad``, ``arcmin``, ``arcsec``, ``hourangle``; times ``iso``,
  ``unix``, ``gps``, ``mjd``, ``jd``; distances ``Mpc``, ``Gpc``, ``kpc``, ``pc``;
  false-alarm rates ``per_year``, ``per_day``, ``hz``), a table translating the
  foreign values (``{RETRACTION: withdrawn}``), and a value used when the path is absent;
- ``{const: VALUE}``: a fixed value (``type``, ``class``, ``state``...).

``schema`` is ``matcher/1`` unless mapped. The translated fields then go through
:func:`~matcher.streams.messages.message_from_fields`, the same validation as native
messages; an error about a field whose path was missing says which path.

Example (YAML, under a source's ``codec:``)::

    name: mapped
    fields:
      type: {const: transient}
      class: {const: optical}
      transient_id: objectId
      ra_deg: {path: candidate.ra, unit: deg}
      dec_deg: {path: candidate.dec, unit: deg}
      pos_err_deg: {path: candidate.sigmapos, unit: arcsec}
      time: {path: candidate.jd, unit: jd}
      last_nondetection: {path: prv_candidates.0.jd, unit: jd}
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

from matcher.errors import ConfigError, MessageError
from matcher.streams.codecs.base import DEFAULT_MAX_MESSAGE_BYTES, register_codec
from matcher.streams.codecs.jsonbytes import load_json
from matcher.streams.codecs.units import (
    ANGLE_UNITS,
    DISTANCE_UNITS,
    RATE_UNITS,
    TIME_UNITS,
    angle_to_deg,
    distance_to_mpc,
    gps_to_iso_us,
    rate_to_per_year,
    time_to_gps,
)
from matcher.streams.messages import SCHEMA, SOURCE_CLASSES, Message, message_from_fields
from matcher.streams.raw import RawItem

__all__ = ["MappedCodec", "FieldRule", "parse_mapping", "lookup_path"]

_ANGLE_FIELDS = frozenset({"ra_deg", "dec_deg", "pos_err_deg"})
_TIME_FIELDS = frozenset({"merger_time", "time", "last_nondetection"})
_DISTANCE_FIELDS = frozenset({"distance_mpc", "distance_err_mpc"})
_RATE_FIELDS = frozenset({"far_per_year"})
_NUMBER_FIELDS = (_ANGLE_FIELDS | _DISTANCE_FIELDS | _RATE_FIELDS
                  | {"p_astro", "redshift", "redshift_err"} | {f"source_probs.{k}" for k in SOURCE_CLASSES})
_INT_FIELDS = frozenset({"revision"})
_UNITS_BY_KIND = {
    "angle": (_ANGLE_FIELDS, tuple(ANGLE_UNITS)),
    "time": (_TIME_FIELDS, TIME_UNITS),
    "distance": (_DISTANCE_FIELDS, tuple(DISTANCE_UNITS)),
    "rate": (_RATE_FIELDS, tuple(RATE_UNITS)),
}
_ID_FIELDS = ("event_id", "transient_id")
_NOTHING = object()


@dataclass(frozen=True)
class FieldRule:
    """How one of our fields is found in a foreign message.

    Attributes
    ----------
    target : tuple of str
        Our field, split at dots (``("source_probs", "bns")``).
    path : tuple of (str or int) or None
        Where it is in the foreign JSON; ``None`` for a constant.
    const : object
        The fixed value when ``path`` is ``None``.
    unit : str or None
    values : mapping or None
        Translation of foreign values (keys compared as strings).
    default : object
        Used when the path is absent (absent when not given).
    """

    target: tuple[str, ...]
    path: tuple[str | int, ...] | None = None
    const: Any = None
    unit: str | None = None
    values: Mapping[str, Any] | None = None
    default: Any = _NOTHING

    @property
    def name(self) -> str:
        return ".".join(self.target)

    @property
    def source(self) -> str:
        return "const" if self.path is None else ".".join(str(p) for p in self.path)


def _parse_path(text: Any, keypath: str) -> tuple[str | int, ...]:
    if not isinstance(text, str) or not text.strip():
        raise ConfigError(keypath, f"must be a dotted path such as 'candidate.ra', got {text!r}")
    parts = text.split(".")
    if any(not p for p in parts):
        raise ConfigError(keypath, f"{text!r} has an empty segment")
    return tuple(int(p) if p.isdigit() else p for p in parts)


def _check_unit(target: str, unit: Any, keypath: str) -> str | None:
    if unit is None:
        return None
    for kind, (fields, units) in _UNITS_BY_KIND.items():
        if target in fields:
            if unit not in units:
                raise ConfigError(keypath, f"unknown {kind} unit {unit!r} for {target}; known: {', '.join(units)}")
            return unit
    raise ConfigError(keypath, f"{target} takes no unit (units apply to angles, times, distances and rates)")


def parse_mapping(spec: Any, keypath: str = "codec.fields") -> tuple[FieldRule, ...]:
    """Validate a field mapping (our field → rule) into :class:`FieldRule` objects.

    Raises
    ------
    ConfigError
        Naming the key path of the bad rule.
    """
    if not isinstance(spec, Mapping) or not spec:
        raise ConfigError(keypath, "must be a non-empty mapping from our field names to paths or rules")
    rules = []
    for target, rule in spec.items():
        kp = f"{keypath}.{target}"
        if not isinstance(target, str) or not target or any(not p for p in target.split(".")):
            raise ConfigError(kp, f"field name must be a dotted name, got {target!r}")
        parts = tuple(target.split("."))
        if isinstance(rule, str):
            rules.append(FieldRule(parts, _parse_path(rule, kp)))
            continue
        if not isinstance(rule, Mapping):
            raise ConfigError(kp, f"must be a path string or a mapping with path or const, got {type(rule).__name__}")
        unknown = sorted(set(rule) - {"path", "const", "unit", "values", "default"})
        if unknown:
            raise ConfigError(f"{kp}.{unknown[0]}", "unknown key (known: path, const, unit, values, default)")
        if ("path" in rule) == ("const" in rule):
            raise ConfigError(kp, "needs exactly one of path or const")
        values = rule.get("values")
        if values is not None and (not isinstance(values, Mapping) or not values):
            raise ConfigError(f"{kp}.values", "must be a non-empty mapping from foreign values to ours")
        unit = _check_unit(target, rule.get("unit"), f"{kp}.unit")
        if "const" in rule:
            if unit is not None or values is not None or "default" in rule:
                raise ConfigError(kp, "a const takes no unit, values or default")
            rules.append(FieldRule(parts, None, rule["const"]))
        else:
            rules.append(FieldRule(parts, _parse_path(rule["path"], f"{kp}.path"), None, unit,
                                   None if values is None else {str(k): v for k, v in values.items()},
                                   rule.get("default", _NOTHING)))
    targets = [r.target for r in rules]
    for t in targets:
        for other in targets:
            if other != t and other[: len(t)] == t:
                raise ConfigError(f"{keypath}.{'.'.join(t)}", f"conflicts with {'.'.join(other)} (one is inside the other)")
    return tuple(rules)


def lookup_path(obj: Any, path: tuple[str | int, ...]) -> Any:
    """Follow ``path`` into nested dicts and lists; return a sentinel-free ``(found, value)``."""
    cur = obj
    for seg in path:
        if isinstance(cur, Mapping):
            key = seg if isinstance(seg, str) else str(seg)
            if key not in cur:
                return False, None
            cur = cur[key]
        elif isinstance(cur, list) and isinstance(seg, int):
            if seg >= len(cur):
                return False, None
            cur = cur[seg]
        else:
            return False, None
    return True, cur


class MappedCodec:
    """Decode foreign JSON through a field mapping (see the module docstring).

    Parameters
    ----------
    fields : mapping or sequence of FieldRule
        The mapping (validated with :func:`parse_mapping` when a mapping).
    max_bytes : int, bytes
    keypath : str
        Where the mapping sits in the configuration (for errors).
    """

    name = "mapped"
    decode_ahead = True  # decode() reads only the item's bytes, size and folder: it may run on a child process

    def __init__(self, fields, *, max_bytes: int = DEFAULT_MAX_MESSAGE_BYTES, keypath: str = "codec.fields"):
        self.rules = parse_mapping(fields, keypath) if isinstance(fields, Mapping) else tuple(fields)
        self.max_bytes = int(max_bytes)
        self._id_rules = [r for r in self.rules if r.name in _ID_FIELDS]

    def decode(self, item: RawItem) -> Message:
        obj = load_json(item, self.name, self.max_bytes)
        if not isinstance(obj, Mapping):
            raise MessageError(self.name, None, None, f"must be a JSON object, got {type(obj).__name__}")
        mid = self._message_id(obj)
        out: dict[str, Any] = {"schema": SCHEMA}
        missing: dict[str, str] = {}
        for rule in self.rules:
            if rule.path is None:
                value = rule.const
            else:
                found, value = lookup_path(obj, rule.path)
                if not found:
                    if rule.default is _NOTHING:
                        missing[rule.name] = rule.source
                        continue
                    value = rule.default
            if value is None:
                continue
            value = self._convert(rule, value, mid)
            _put(out, rule.target, value)
        try:
            return message_from_fields(out, codec=self.name, base_dir=item.base_dir)
        except MessageError as exc:
            if exc.field in missing and "required" in exc.problem:
                raise MessageError(self.name, exc.message_id, exc.field,
                                   f"is required; mapped from {missing[exc.field]!r}, which the input does not have") from None
            raise

    def _message_id(self, obj: Mapping) -> str | None:
        for rule in self._id_rules:
            value = rule.const if rule.path is None else lookup_path(obj, rule.path)[1]
            if isinstance(value, (str, int)) and not isinstance(value, bool):
                return str(value)
        return None

    def _convert(self, rule: FieldRule, value: Any, mid: str | None) -> Any:
        name = rule.name
        where = f" (from {rule.source!r})" if rule.path is not None else ""
        if rule.values is not None:
            key = value if isinstance(value, str) else _scalar_text(value)
            if key not in rule.values:
                known = ", ".join(repr(k) for k in list(rule.values)[:8])
                raise MessageError(self.name, mid, name, f"value {value!r}{where} is not in the mapping's values ({known})")
            value = rule.values[key]
        try:
            if name in _TIME_FIELDS:
                unit = rule.unit or "iso"
                if unit == "iso":
                    return value  # validated by message_from_fields
                return gps_to_iso_us(time_to_gps(_number(value), unit))
            if name in _INT_FIELDS:
                return _integer(value)
            if name in _NUMBER_FIELDS:
                v = _number(value)
                if rule.unit is None:
                    return v
                if name in _ANGLE_FIELDS:
                    return angle_to_deg(v, rule.unit)
                if name in _DISTANCE_FIELDS:
                    return distance_to_mpc(v, rule.unit)
                return rate_to_per_year(v, rule.unit)
        except ValueError as exc:
            raise MessageError(self.name, mid, name, f"{exc}{where}") from None
        if name in _ID_FIELDS and isinstance(value, int) and not isinstance(value, bool):
            return str(value)  # numeric ids are common in foreign streams
        return value


def _scalar_text(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    return str(value)


def _number(value: Any) -> float:
    """Numbers as they are; numeric strings (common in foreign JSON) parsed; anything else refused."""
    if isinstance(value, bool):
        raise ValueError("must be a number, got a boolean")
    if isinstance(value, (int, float)):
        v = float(value)
    elif isinstance(value, str):
        try:
            v = float(value.strip())
        except ValueError:
            raise ValueError(f"must be a number, got the string {value[:40]!r}") from None
    else:
        raise ValueError(f"must be a number, got {type(value).__name__}")
    if not math.isfinite(v):
        raise ValueError(f"must be finite, got {v!r}")
    return v


def _integer(value: Any) -> int:
    if isinstance(value, int) and not isinstance(value, bool):
        return value
    v = _number(value)
    if v != int(v):
        raise ValueError(f"must be an integer, got {v!r}")
    return int(v)


def _put(out: dict, target: tuple[str, ...], value: Any) -> None:
    cur = out
    for seg in target[:-1]:
        nxt = cur.get(seg)
        if not isinstance(nxt, dict):
            nxt = cur[seg] = {}
        cur = nxt
    cur[target[-1]] = value


def _factory(options: Mapping[str, Any], *, keypath: str, max_bytes: int) -> MappedCodec:
    unknown = sorted(set(options) - {"name", "fields"})
    if unknown:
        raise ConfigError(f"{keypath}.{unknown[0]}", "unknown key for the mapped codec (known: fields)")
    if "fields" not in options:
        raise ConfigError(f"{keypath}.fields", "is required: the mapping from our field names to paths in the input")
    return MappedCodec(options["fields"], max_bytes=max_bytes, keypath=f"{keypath}.fields")


register_codec("mapped", _factory)
