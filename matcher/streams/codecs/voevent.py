"""The VOEvent codec: IVOA VOEvent 2.0 XML position/time/error notices as transient reports.

VOEvent 2.0 is the IVOA Recommendation of 2011 (REC-VOEvent-2.0-20110711; the identifier is from
memory). What is read:

- the root ``VOEvent`` element in the namespace ``http://www.ivoa.net/xml/VOEvent/v2.0``,
  its ``ivorn`` (the event's identifier) and ``role`` (``observation``, ``prediction``,
  ``utility``, ``test``; only the roles in ``accept_roles`` are accepted, by default
  ``observation``: test and utility notices are refused with a reason saying so);
- ``WhereWhen/ObsDataLocation/ObservationLocation/AstroCoords``: its ``coord_system_id``
  (``TIMESCALE-FRAME-REFPOS`` as in ``UTC-FK5-GEO``), ``Time/TimeInstant/ISOTime``, and
  ``Position2D`` (``unit``, ``Value2/C1`` right ascension, ``Value2/C2`` declination,
  ``Error2Radius``);
- ``Param`` elements anywhere under ``What`` (also inside ``Group``), by name, for the
  class and the id (and optionally redshift, distance, last non-detection).

Time scales UTC, TT, TAI and GPS are converted (TT = TAI + 32.184 s, GPS = TAI - 19 s);
frames ICRS and FK5 (J2000) are taken as the same (they differ by tens of milliarcseconds,
far below any position error in these notices; common practice); reference positions
GEO and TOPO are taken as the same (light travel across the Earth is under 22 ms);
barycentric times (BARY) and other frames are refused.

Safety: the XML is read with the standard library's expat parser, and any document
type declaration or entity declaration is refused before it can expand (the
"billion laughs" and external-entity attacks need one). Size is checked first.
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
import xml.parsers.expat as expat
from datetime import datetime
from typing import Any, Mapping

from matcher.errors import ConfigError, MessageError
from matcher.streams.codecs.base import DEFAULT_MAX_MESSAGE_BYTES, register_codec
from matcher.streams.codecs.jsonbytes import check_size
from matcher.streams.codecs.units import ANGLE_UNITS, DISTANCE_UNITS, gps_to_iso_us
from matcher.streams.messages import SCHEMA, Message, message_from_fields
from matcher.streams.raw import RawItem
from matcher.timeconv import iso_to_gps

__all__ = ["VOEventCodec", "VOEVENT_NS", "ROLES", "parse_xml_safely", "sigma_from_containment"]

VOEVENT_NS = "http://www.ivoa.net/xml/VOEvent/v2.0"
ROLES = ("observation", "prediction", "utility", "test")
# Seconds to subtract from a continuous-scale reading since 1980-01-06T00:00:00 to get GPS s.
_SCALE_OFFSET_S = {"GPS": 0.0, "TAI": 19.0, "TT": 51.184}
_FRAMES = ("ICRS", "FK5")
_REFPOS = ("GEO", "TOPO")
_PARAM_FIELDS = ("transient_id", "class", "redshift", "redshift_err", "distance_mpc", "distance_err_mpc",
                 "last_nondetection")
_NUMERIC_PARAMS = ("redshift", "redshift_err", "distance_mpc", "distance_err_mpc")
_GPS_EPOCH = datetime(1980, 1, 6)


class _Refused(Exception):
    pass


def _refuse_dtd(*_args):
    raise _Refused("has a document type declaration (DTDs and entities are refused: entity-expansion risk)")


def _refuse_entity(*_args):
    raise _Refused("declares an entity (refused: entity-expansion risk)")


def parse_xml_safely(data: bytes) -> tuple[str, ET.Element]:
    """Parse XML bytes into an element tree with local names, refusing DTDs and entities.

    Returns
    -------
    namespace : str
        The root element's namespace URI ('' if none).
    root : xml.etree.ElementTree.Element
        Tags and attribute names have their namespaces removed.

    Raises
    ------
    ValueError
        Malformed XML, or a DTD or entity declaration.
    """
    builder = ET.TreeBuilder()
    root_ns: list[str] = []
    parser = expat.ParserCreate(namespace_separator=" ")
    parser.SetParamEntityParsing(expat.XML_PARAM_ENTITY_PARSING_NEVER)
    parser.StartDoctypeDeclHandler = _refuse_dtd
    parser.EntityDeclHandler = _refuse_entity
    parser.UnparsedEntityDeclHandler = _refuse_entity
    parser.ExternalEntityRefHandler = _refuse_entity

    def start(name, attrs):
        ns, _, local = name.rpartition(" ")
        if not root_ns:
            root_ns.append(ns)
        builder.start(local, {k.rpartition(" ")[2]: v for k, v in attrs.items()})

    parser.StartElementHandler = start
    parser.EndElementHandler = lambda name: builder.end(name.rpartition(" ")[2])
    parser.CharacterDataHandler = builder.data
    parser.buffer_text = True
    try:
        parser.Parse(data, True)
    except _Refused as exc:
        raise ValueError(str(exc)) from None
    except expat.ExpatError as exc:
        raise ValueError(f"is not well-formed XML: {expat.ErrorString(exc.code)} at line {exc.lineno} "
                         f"column {exc.offset + 1}") from None
    return (root_ns[0] if root_ns else ""), builder.close()


def sigma_from_containment(radius: float, containment: float) -> float:
    """1σ radius of a circular 2-D Gaussian whose ``containment`` fraction lies within ``radius``.

    For a circular Gaussian, r²/σ² follows a χ² law with 2 degrees of freedom, so
    ``P(< r) = 1 - exp(-r²/(2σ²))`` and ``σ = r / sqrt(-2 ln(1 - p))``.
    """
    return radius / math.sqrt(-2.0 * math.log1p(-containment))


def _child(el: ET.Element | None, *names: str) -> ET.Element | None:
    for name in names:
        if el is None:
            return None
        el = el.find(name)
    return el


def _text(el: ET.Element | None) -> str | None:
    if el is None or el.text is None:
        return None
    t = el.text.strip()
    return t or None


class VOEventCodec:
    """Decode VOEvent 2.0 notices into transient reports (see the module docstring).

    Parameters
    ----------
    accept_roles : sequence of str
        Roles accepted; others are refused with a reason. Default ``("observation",)``.
    params : mapping
        Our field → ``Param`` name. Defaults: ``transient_id`` ← ``id``, ``class`` ← ``class``.
        Also allowed: ``redshift``, ``redshift_err``, ``distance_mpc``, ``distance_err_mpc``
        (a ``unit`` attribute of Mpc, Gpc, kpc or pc is honoured) and ``last_nondetection``
        (ISO-8601 UTC).
    constants : mapping
        Fixed values for the same fields (e.g. ``{class: grb}`` for a monitor's own stream);
        a Param, when present, wins.
    error_containment : float or None
        ``None``: ``Error2Radius`` is the 1σ radius. A fraction p in (0, 1): it is the radius
        containing p of a circular Gaussian (converted with :func:`sigma_from_containment`).
    id_from_ivorn : bool
        Use the ``ivorn`` as the transient id when the id Param is absent (default True).
    max_bytes : int, bytes
    """

    name = "voevent"

    def __init__(self, *, accept_roles=("observation",), params: Mapping[str, str] | None = None,
                 constants: Mapping[str, Any] | None = None, error_containment: float | None = None,
                 id_from_ivorn: bool = True, max_bytes: int = DEFAULT_MAX_MESSAGE_BYTES):
        self.accept_roles = tuple(accept_roles)
        self.params = {"transient_id": "id", "class": "class", **dict(params or {})}
        self.constants = dict(constants or {})
        self.error_containment = error_containment
        self.id_from_ivorn = bool(id_from_ivorn)
        self.max_bytes = int(max_bytes)

    def _fail(self, mid, field, problem):
        raise MessageError(self.name, mid, field, problem)

    def decode(self, item: RawItem) -> Message:
        check_size(item, self.name, self.max_bytes)
        try:
            ns, root = parse_xml_safely(item.data)
        except ValueError as exc:
            self._fail(None, None, str(exc))
        if root.tag != "VOEvent":
            self._fail(None, None, f"root element is <{root.tag}>, not <VOEvent>")
        if ns != VOEVENT_NS:
            self._fail(None, None, f"root namespace is {ns!r}, not VOEvent 2.0 ({VOEVENT_NS})")
        ivorn = root.get("ivorn")
        if not ivorn:
            self._fail(None, "ivorn", "is required on <VOEvent>")
        role = root.get("role")
        params = self._params(root)
        mid = params.get(self.params["transient_id"]) or (ivorn if self.id_from_ivorn else None)
        if role not in ROLES:
            self._fail(mid, "role", f"must be one of {', '.join(ROLES)}, got {role!r}")
        if role not in self.accept_roles:
            self._fail(mid, "role", f"is {role!r}; this source accepts {', '.join(self.accept_roles)} "
                                    "(codec option accept_roles)")
        coords = _child(root, "WhereWhen", "ObsDataLocation", "ObservationLocation", "AstroCoords")
        if coords is None:
            self._fail(mid, "WhereWhen", "has no ObsDataLocation/ObservationLocation/AstroCoords")
        scale = self._coord_system(coords, mid)
        t_gps = self._time(coords, scale, mid)
        ra, dec, err = self._position(coords, mid)

        fields: dict[str, Any] = {"schema": SCHEMA, "type": "transient"}
        for target in _PARAM_FIELDS:
            if target in self.constants:
                fields[target] = self.constants[target]
        for target, pname in self.params.items():
            if pname in params:
                fields[target] = self._param_value(target, params[pname], params.get(f"{pname}\x00unit"), mid)
        if "transient_id" not in fields:
            if not self.id_from_ivorn:
                self._fail(mid, "transient_id", f"no Param named {self.params['transient_id']!r} (and id_from_ivorn is off)")
            fields["transient_id"] = ivorn
        if "class" not in fields:
            self._fail(mid, "class", f"no Param named {self.params['class']!r} and no constant class in the codec options")
        fields.update(ra_deg=ra, dec_deg=dec, time=gps_to_iso_us(t_gps), voevent_ivorn=ivorn, voevent_role=role)
        if err is not None:
            fields["pos_err_deg"] = err
        return message_from_fields(fields, codec=self.name, base_dir=item.base_dir)

    @staticmethod
    def _params(root: ET.Element) -> dict[str, str]:
        out: dict[str, str] = {}
        what = root.find("What")
        if what is None:
            return out
        for p in what.iter("Param"):
            name = p.get("name")
            if not name or name in out:
                continue  # the first Param of a name wins, as a reader scanning the document would take it
            value = p.get("value")
            if value is None:
                value = _text(p.find("Value"))
            if value is not None:
                out[name] = value.strip()
                if p.get("unit"):
                    out[f"{name}\x00unit"] = p.get("unit")
        return out

    def _param_value(self, target: str, value: str, unit: str | None, mid):
        if target in _NUMERIC_PARAMS:
            try:
                v = float(value)
            except ValueError:
                self._fail(mid, target, f"Param value {value[:40]!r} is not a number")
            if target.startswith("distance") and unit:
                if unit not in DISTANCE_UNITS:
                    self._fail(mid, target, f"Param unit {unit!r} is not a distance unit ({', '.join(DISTANCE_UNITS)})")
                v *= DISTANCE_UNITS[unit]
            return v
        return value

    def _coord_system(self, coords: ET.Element, mid) -> str:
        csid = coords.get("coord_system_id")
        if not csid:
            self._fail(mid, "AstroCoords", "has no coord_system_id (e.g. UTC-FK5-GEO)")
        parts = csid.split("-")
        if len(parts) != 3:
            self._fail(mid, "coord_system_id", f"{csid!r} is not TIMESCALE-FRAME-REFPOS")
        scale, frame, refpos = (p.upper() for p in parts)
        if scale != "UTC" and scale not in _SCALE_OFFSET_S:
            self._fail(mid, "coord_system_id", f"time scale {scale} in {csid!r} is not supported (UTC, TT, TAI, GPS)")
        if frame not in _FRAMES:
            self._fail(mid, "coord_system_id", f"frame {frame} in {csid!r} is not supported (ICRS, FK5)")
        if refpos not in _REFPOS:
            self._fail(mid, "coord_system_id", f"reference position {refpos} in {csid!r} is not supported "
                                               "(GEO, TOPO; barycentric times need a correction this codec does not make)")
        return scale

    def _time(self, coords: ET.Element, scale: str, mid) -> float:
        iso = _text(_child(coords, "Time", "TimeInstant", "ISOTime"))
        if iso is None:
            self._fail(mid, "ISOTime", "is required (AstroCoords/Time/TimeInstant/ISOTime)")
        try:
            if scale == "UTC":
                return iso_to_gps(iso)
            text = iso[:-1] if iso.endswith(("Z", "z")) else iso
            dt = datetime.fromisoformat(text)
            if dt.tzinfo is not None:
                self._fail(mid, "ISOTime", f"{iso!r} has a UTC offset, but the time scale is {scale}")
            return (dt - _GPS_EPOCH).total_seconds() - _SCALE_OFFSET_S[scale]
        except MessageError:
            raise
        except ValueError:
            self._fail(mid, "ISOTime", f"{iso!r} is not an ISO-8601 date-time")

    def _position(self, coords: ET.Element, mid):
        pos = coords.find("Position2D")
        if pos is None:
            self._fail(mid, "Position2D", "is required (AstroCoords/Position2D)")
        unit = pos.get("unit", "deg")
        if unit not in ANGLE_UNITS:
            self._fail(mid, "Position2D", f"unit {unit!r} is not an angle unit ({', '.join(ANGLE_UNITS)})")
        scale = ANGLE_UNITS[unit]
        out = []
        for tag, label in (("C1", "C1 (right ascension)"), ("C2", "C2 (declination)")):
            text = _text(_child(pos, "Value2", tag))
            if text is None:
                self._fail(mid, "Position2D", f"Value2/{label} is required")
            out.append(self._float(text, label, mid) * scale)
        err_text = _text(pos.find("Error2Radius"))
        err = None
        if err_text is not None:
            err = self._float(err_text, "Error2Radius", mid) * scale
            if err < 0:
                self._fail(mid, "Error2Radius", f"must be >= 0, got {err_text}")
            if self.error_containment is not None:
                err = sigma_from_containment(err, self.error_containment)
        return out[0], out[1], err

    def _float(self, text: str, label: str, mid) -> float:
        try:
            v = float(text)
        except ValueError:
            self._fail(mid, label, f"{text[:40]!r} is not a number")
        if not math.isfinite(v):
            self._fail(mid, label, f"must be finite, got {text!r}")
        return v


def _factory(options: Mapping[str, Any], *, keypath: str, max_bytes: int) -> VOEventCodec:
    known = {"name", "accept_roles", "params", "constants", "error_containment", "id_from_ivorn"}
    unknown = sorted(set(options) - known)
    if unknown:
        raise ConfigError(f"{keypath}.{unknown[0]}", f"unknown key for the voevent codec (known: {', '.join(sorted(known - {'name'}))})")
    roles = options.get("accept_roles", ["observation"])
    if isinstance(roles, str):
        roles = [roles]
    if not isinstance(roles, (list, tuple)) or not roles or any(r not in ROLES for r in roles):
        raise ConfigError(f"{keypath}.accept_roles", f"must be a non-empty list of {', '.join(ROLES)}, got {roles!r}")
    for key in ("params", "constants"):
        val = options.get(key, {})
        if not isinstance(val, Mapping):
            raise ConfigError(f"{keypath}.{key}", f"must be a mapping from our field names, got {type(val).__name__}")
        bad = sorted(set(val) - set(_PARAM_FIELDS))
        if bad:
            raise ConfigError(f"{keypath}.{key}.{bad[0]}", f"is not a field this codec can take from a Param "
                                                          f"(known: {', '.join(_PARAM_FIELDS)})")
        if key == "params" and any(not isinstance(v, str) or not v for v in val.values()):
            raise ConfigError(f"{keypath}.params", "values must be Param names (non-empty strings)")
    cont = options.get("error_containment")
    if cont is not None and (isinstance(cont, bool) or not isinstance(cont, (int, float)) or not 0 < cont < 1):
        raise ConfigError(f"{keypath}.error_containment", f"must be a fraction in (0, 1) or null, got {cont!r}")
    ivorn = options.get("id_from_ivorn", True)
    if not isinstance(ivorn, bool):
        raise ConfigError(f"{keypath}.id_from_ivorn", f"must be true or false, got {ivorn!r}")
    return VOEventCodec(accept_roles=tuple(roles), params=options.get("params"), constants=options.get("constants"),
                        error_containment=None if cont is None else float(cont), id_from_ivorn=ivorn,
                        max_bytes=max_bytes)


register_codec("voevent", _factory)
