"""The validated, immutable messages every codec produces.

A codec turns raw bytes into a mapping of *our* field names (the native
``matcher/1`` schema, documented in the README) and hands it to
:func:`message_from_fields`, the one place where messages are validated.
Errors name the codec, the message id, the field and the constraint.

Times are converted once, here, from ISO-8601 UTC to float GPS seconds.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from matcher.errors import MessageError
from matcher.frozen import build_frozen
from matcher.timeconv import iso_to_gps

__all__ = [
    "SCHEMA",
    "GW_STATES",
    "SOURCE_CLASSES",
    "MAX_REVISION",
    "Localization",
    "GWAlert",
    "TransientReport",
    "Message",
    "message_from_fields",
]

SCHEMA = "matcher/1"
GW_STATES = ("issued", "revised", "withdrawn")
SOURCE_CLASSES = ("bns", "nsbh", "bbh", "terrestrial")
#: The largest revision number taken (the store keeps revisions as SQLite integers).
MAX_REVISION = 2**31 - 1


@dataclass(frozen=True)
class Localization:
    """Where a HEALPix map is: exactly one of a path, an https URL, or base64 FITS.

    ``path`` is resolved against ``base_dir`` (the folder of the message file
    or archive) when relative.
    """

    path: str | None = None
    url: str | None = None
    fits_base64: str | None = None
    base_dir: str | None = None

    def resolved_path(self) -> str | None:
        if self.path is None:
            return None
        import os

        if os.path.isabs(self.path) or not self.base_dir:
            return self.path
        return os.path.join(self.base_dir, self.path)


@dataclass(frozen=True)
class GWAlert:
    """One revision of a gravitational-wave event.

    Attributes
    ----------
    event_id : str
    revision : int
        Monotonically increasing per event; an older revision never replaces a newer one.
    state : str
        ``issued``, ``revised`` or ``withdrawn``.
    merger_time : float, GPS s
    merger_time_iso : str
    far_per_year : float or None, yr**-1
    p_astro : float or None
        Probability that the event is astrophysical.
    source_probs : mapping or None
        ``bns``, ``nsbh``, ``bbh``, ``terrestrial`` probabilities.
    localization : Localization or None
        Required unless the state is ``withdrawn``.
    """

    event_id: str
    revision: int
    state: str
    merger_time: float
    merger_time_iso: str
    far_per_year: float | None = None
    p_astro: float | None = None
    source_probs: Mapping[str, float] | None = None
    localization: Localization | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)

    kind = "gw_alert"

    @property
    def key(self) -> str:
        return f"{self.event_id}#{self.revision}"


@dataclass(frozen=True)
class TransientReport:
    """A report of a possible counterpart (optical transient, gamma-ray trigger, ...).

    Attributes
    ----------
    transient_id : str
    klass : str
        The counterpart class name (the ``class`` field), a key of the configuration's ``classes``.
    ra_deg, dec_deg : float, deg
    pos_err_deg : float or None, deg
        1σ radius of a circular Gaussian position error.
    time : float, GPS s
        Trigger time (sharp classes) or first detection (bracketed classes).
    time_iso : str
    last_nondetection : float or None, GPS s
    redshift, redshift_err : float or None
    distance_mpc, distance_err_mpc : float or None, Mpc
    localization : Localization or None
        The report's own HEALPix region (coarse gamma-ray or neutrino regions).
    """

    transient_id: str
    klass: str
    ra_deg: float
    dec_deg: float
    time: float
    time_iso: str
    pos_err_deg: float | None = None
    last_nondetection: float | None = None
    redshift: float | None = None
    redshift_err: float | None = None
    distance_mpc: float | None = None
    distance_err_mpc: float | None = None
    localization: Localization | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)

    kind = "transient"


Message = GWAlert | TransientReport

_GW_FIELDS = {"schema", "type", "event_id", "revision", "state", "merger_time", "far_per_year",
              "p_astro", "source_probs", "localization"}
_TR_FIELDS = {"schema", "type", "transient_id", "class", "ra_deg", "dec_deg", "pos_err_deg", "time",
              "last_nondetection", "redshift", "redshift_err", "distance_mpc", "distance_err_mpc",
              "localization"}


class _Checker:
    """Field validation with errors that name codec, message id and field."""

    def __init__(self, fields: Mapping[str, Any], codec: str, id_field: str | None):
        self.f = fields
        self.codec = codec
        raw_id = fields.get(id_field) if id_field else None
        self.mid = raw_id if isinstance(raw_id, str) and raw_id else None

    def fail(self, name: str | None, problem: str):
        raise MessageError(self.codec, self.mid, name, problem)

    def string(self, name: str, *, required: bool = True) -> str | None:
        v = self.f.get(name)
        if v is None:
            if required:
                self.fail(name, "is required")
            return None
        if not isinstance(v, str) or not v.strip():
            self.fail(name, f"must be a non-empty string, got {_show(v)}")
        if len(v) > 256:
            self.fail(name, f"is {len(v)} characters long (limit 256)")
        return v

    def number(self, name: str, *, required: bool = False, lo: float | None = None,
               hi: float | None = None, lo_open: bool = False) -> float | None:
        v = self.f.get(name)
        if v is None:
            if required:
                self.fail(name, "is required")
            return None
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            self.fail(name, f"must be a number, got {_show(v)}")
        try:
            v = float(v)
        except OverflowError:  # an integer literal beyond the float range
            self.fail(name, f"must be a number within the float range, got an integer of {v.bit_length()} bits")
        if not math.isfinite(v):
            self.fail(name, f"must be finite, got {v!r}")
        if lo is not None and (v <= lo if lo_open else v < lo):
            self.fail(name, f"must be {'>' if lo_open else '>='} {lo!r} (got {v!r})")
        if hi is not None and v > hi:
            self.fail(name, f"must be <= {hi!r} (got {v!r})")
        return v

    def time(self, name: str, *, required: bool) -> tuple[float | None, str | None]:
        v = self.f.get(name)
        if v is None:
            if required:
                self.fail(name, "is required (ISO-8601 UTC)")
            return None, None
        if not isinstance(v, str):
            self.fail(name, f"must be an ISO-8601 UTC string, got {_show(v)}")
        try:
            return iso_to_gps(v), v
        except ValueError as exc:
            self.fail(name, str(exc))

    def localization(self, base_dir: str | None, *, required: bool) -> Localization | None:
        v = self.f.get("localization")
        if v is None:
            if required:
                self.fail("localization", "is required unless the state is withdrawn")
            return None
        if isinstance(v, str):
            v = {"url": v} if v.startswith(("http://", "https://")) else {"path": v}
        if not isinstance(v, Mapping):
            self.fail("localization", f"must be an object with path, url or fits_base64, got {_show(v)}")
        given = [k for k in ("path", "url", "fits_base64") if v.get(k) is not None]
        unknown = sorted(set(v) - {"path", "url", "fits_base64"})
        if unknown:
            self.fail("localization", f"has unknown keys {unknown}")
        if len(given) != 1:
            self.fail("localization", f"needs exactly one of path, url, fits_base64 (got {given or 'none'})")
        val = v[given[0]]
        if not isinstance(val, str) or not val:
            self.fail(f"localization.{given[0]}", f"must be a non-empty string, got {_show(val)}")
        if given[0] == "url" and not val.startswith("https://"):
            self.fail("localization.url", f"must be an https:// URL, got {val[:80]!r}")
        return Localization(**{given[0]: val}, base_dir=base_dir)


def _show(v: Any) -> str:
    text = repr(v)
    return f"{type(v).__name__} {text[:60]}{'…' if len(text) > 60 else ''}"


def message_from_fields(fields: Any, *, codec: str = "native", base_dir: str | None = None) -> Message:
    """Validate a mapping in the ``matcher/1`` schema and build the message.

    Parameters
    ----------
    fields : mapping
        Decoded JSON (or a codec's translation into our field names).
    codec : str
        Named in errors.
    base_dir : str, optional
        Folder that relative localization paths resolve against.

    Raises
    ------
    MessageError
    """
    if type(fields) is dict and fields.get("type") == "transient" and fields.get("schema") == SCHEMA:
        message = _fast_transient(fields, base_dir)
        if message is not None:
            return message
    return _checked_message(fields, codec, base_dir)


def _checked_message(fields: Any, codec: str, base_dir: str | None) -> Message:
    """:func:`message_from_fields` by the field checks alone: any input, every error.

    The reference that :func:`_fast_transient` must agree with.
    """
    if not isinstance(fields, Mapping):
        raise MessageError(codec, None, None, f"must be a JSON object, got {type(fields).__name__}")
    schema = fields.get("schema")
    if schema != SCHEMA:
        raise MessageError(codec, None, "schema", f"must be {SCHEMA!r}, got {schema!r}")
    kind = fields.get("type")
    if kind == "gw_alert":
        return _gw_alert(fields, codec, base_dir)
    if kind == "transient":
        return _transient(fields, codec, base_dir)
    raise MessageError(codec, None, "type", f"must be 'gw_alert' or 'transient', got {kind!r}")


def _gw_alert(f: Mapping[str, Any], codec: str, base_dir: str | None) -> GWAlert:
    c = _Checker(f, codec, "event_id")
    event_id = c.string("event_id")
    rev = f.get("revision")
    if isinstance(rev, bool) or not isinstance(rev, int) or not 0 <= rev <= MAX_REVISION:
        c.fail("revision", f"must be an integer from 0 to {MAX_REVISION}, got {_show(rev)}")
    state = f.get("state")
    if state not in GW_STATES:
        c.fail("state", f"must be one of {', '.join(GW_STATES)}, got {state!r}")
    t, t_iso = c.time("merger_time", required=True)
    far = c.number("far_per_year", lo=0.0)
    p_astro = c.number("p_astro", lo=0.0, hi=1.0)
    probs = f.get("source_probs")
    if probs is not None:
        if not isinstance(probs, Mapping):
            c.fail("source_probs", f"must be an object keyed by {', '.join(SOURCE_CLASSES)}, got {_show(probs)}")
        unknown = sorted(set(probs) - set(SOURCE_CLASSES))
        if unknown:
            c.fail("source_probs", f"has unknown classes {unknown} (known: {', '.join(SOURCE_CLASSES)})")
        sub = _Checker(probs, codec, None)
        sub.mid = c.mid
        clean = {}
        for k in SOURCE_CLASSES:
            val = sub.number(k, lo=0.0, hi=1.0)
            if val is not None:
                clean[k] = val
        total = sum(clean.values())
        if clean and total > 1.0 + 1e-3:
            c.fail("source_probs", f"sum to {total:.6g}, more than 1")
        probs = clean
    loc = c.localization(base_dir, required=state != "withdrawn")
    extra = {k: v for k, v in f.items() if k not in _GW_FIELDS}
    return GWAlert(event_id, rev, state, t, t_iso, far, p_astro, probs, loc, extra)


def _transient(f: Mapping[str, Any], codec: str, base_dir: str | None) -> TransientReport:
    c = _Checker(f, codec, "transient_id")
    tid = c.string("transient_id")
    klass = c.string("class")
    ra = c.number("ra_deg", required=True, lo=0.0, hi=360.0)
    dec = c.number("dec_deg", required=True, lo=-90.0, hi=90.0)
    err = c.number("pos_err_deg", lo=0.0, hi=90.0)
    t, t_iso = c.time("time", required=True)
    lnd, _ = c.time("last_nondetection", required=False)
    if lnd is not None and lnd > t:
        c.fail("last_nondetection", f"({f.get('last_nondetection')}) is after time ({t_iso})")
    z = c.number("redshift", lo=0.0, hi=20.0)
    z_err = c.number("redshift_err", lo=0.0, lo_open=True)
    d = c.number("distance_mpc", lo=0.0, lo_open=True)
    d_err = c.number("distance_err_mpc", lo=0.0, lo_open=True)
    if z_err is not None and z is None:
        c.fail("redshift_err", "is given without redshift")
    if d_err is not None and d is None:
        c.fail("distance_err_mpc", "is given without distance_mpc")
    loc = c.localization(base_dir, required=False)
    extra = {k: v for k, v in f.items() if k not in _TR_FIELDS}
    return TransientReport(tid, klass, ra, dec, t, t_iso, err, lnd, z, z_err, d, d_err, loc, extra)


def _fast_transient(f: dict, base_dir: str | None) -> TransientReport | None:
    """:func:`_transient` of a plain dict in the usual shape, or None when anything is unusual.

    The usual shape: ids and times are plain strings, numbers are floats (or ints) inside
    their ranges, no ``localization``. Every check of :func:`_transient` is made here too,
    only without building an error: whatever fails, is missing where required, or is not of
    the usual type makes this return None, and the caller runs :func:`_checked_message`,
    which then gives the same message or the error with its exact text. (About half the
    cost of the checker, which builds an object and makes a call per field.) The tests hold
    both paths to the same results on a varied set of inputs.
    """
    tid = f.get("transient_id")
    klass = f.get("class")
    if (type(tid) is not str or type(klass) is not str or len(tid) > 256 or len(klass) > 256
            or not tid.strip() or not klass.strip()):
        return None
    ra = _fast_in(f.get("ra_deg"), 0.0, 360.0)
    dec = _fast_in(f.get("dec_deg"), -90.0, 90.0)
    err = f.get("pos_err_deg")
    if err is not None:
        err = _fast_in(err, 0.0, 90.0)
    if ra is _UNUSUAL or dec is _UNUSUAL or err is _UNUSUAL:
        return None
    t_iso = f.get("time")
    if type(t_iso) is not str:
        return None
    try:
        t = iso_to_gps(t_iso)
    except ValueError:
        return None
    lnd = f.get("last_nondetection")
    if lnd is not None:
        if type(lnd) is not str:
            return None
        try:
            lnd = iso_to_gps(lnd)
        except ValueError:
            return None
        if lnd > t:
            return None
    z = f.get("redshift")
    if z is not None:
        z = _fast_in(z, 0.0, 20.0)
        if z is _UNUSUAL:
            return None
    z_err, d, d_err = f.get("redshift_err"), f.get("distance_mpc"), f.get("distance_err_mpc")
    if z_err is not None or d is not None or d_err is not None:
        z_err, d, d_err = _fast_positive(z_err), _fast_positive(d), _fast_positive(d_err)
        if (z_err is not None and (z_err is _UNUSUAL or z is None) or d is _UNUSUAL
                or d_err is not None and (d_err is _UNUSUAL or d is None)):
            return None
    if f.get("localization") is not None:
        return None
    extra = {k: v for k, v in f.items() if k not in _TR_FIELDS}
    # TransientReport(tid, klass, ...) without the generated __init__ (14 fields).
    return build_frozen(TransientReport, {
        "transient_id": tid, "klass": klass, "ra_deg": ra, "dec_deg": dec, "time": t, "time_iso": t_iso,
        "pos_err_deg": err, "last_nondetection": lnd, "redshift": z, "redshift_err": z_err, "distance_mpc": d,
        "distance_err_mpc": d_err, "localization": None, "extra": extra})


_UNUSUAL = object()


def _fast_in(v, lo: float, hi: float):
    """A float (or int) in ``[lo, hi]`` as a float; anything else (None, bool, NaN, out of range) ``_UNUSUAL``."""
    if type(v) is float:
        return v if lo <= v <= hi else _UNUSUAL
    if type(v) is int and lo <= v <= hi:
        return float(v)
    return _UNUSUAL


def _fast_positive(v):
    """A finite float > 0 as itself, None as None, anything else (ints too) as ``_UNUSUAL``."""
    if v is None:
        return None
    if type(v) is float and 0.0 < v < math.inf:
        return v
    return _UNUSUAL
