"""Counterpart classes: the per-class model parameters, read from configuration.

A class (optical transient, gamma-ray trigger, neutrino, ...) is data, not
code: its time window, background rate, efficiency, whether it needs a
neutron star, the depth of its background distance distribution, its default
position error, and whether its onset time is sharp (a trigger) or bracketed
(last non-detection .. first detection). :func:`parse_classes` validates a
mapping (from YAML) and names the key path of anything wrong;
:func:`load_classes_file` is the only function here that reads a file.

Units: seconds, degrees, Mpc; rates per deg² per day in the configuration,
per steradian per second inside the engine (:attr:`CounterpartClass.rate_per_sr_per_s`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from matcher.errors import ConfigError

__all__ = [
    "CounterpartClass",
    "parse_classes",
    "load_classes_file",
    "BACKGROUND_DISTANCE_MODELS",
    "DEG2_PER_SR",
    "SECONDS_PER_DAY",
    "SECONDS_PER_YEAR",
]

DEG2_PER_SR = (180.0 / math.pi) ** 2
SECONDS_PER_DAY = 86400.0
#: Julian year (IAU), used for every "per year" figure.
SECONDS_PER_YEAR = 365.25 * SECONDS_PER_DAY

#: Background distance distributions understood by the engine. ``uniform_volume``:
#: unrelated reports are spread uniformly in Euclidean volume out to ``reach_mpc``,
#: ``p_bg(r) = 3 r² / R³`` for ``0 <= r <= R``.
BACKGROUND_DISTANCE_MODELS = ("uniform_volume",)

_FIELDS = {
    "window_s", "rate_per_deg2_per_day", "efficiency", "needs_neutron_star", "reach_mpc",
    "pos_err_deg", "sharp_time", "cadence_s", "background_distance", "description",
}
_REQUIRED = ("window_s", "rate_per_deg2_per_day", "efficiency", "needs_neutron_star", "reach_mpc",
             "pos_err_deg", "sharp_time")


@dataclass(frozen=True)
class CounterpartClass:
    """One counterpart class.

    Attributes
    ----------
    name : str
    window_lo_s, window_hi_s : float, s
        Onset minus merger time allowed under association: ``δ ~ U[lo, hi]``.
    rate_per_deg2_per_day : float, deg**-2 day**-1
        Density of unrelated reports of this class.
    efficiency : float
        Probability that a real counterpart of this class is produced and reported.
    needs_neutron_star : bool
        If True the prior includes the probability that the binary has a neutron star.
    reach_mpc : float, Mpc
        Depth of the background distance distribution.
    pos_err_deg : float, deg
        Default 1σ position error when a report gives none (0: a point).
    sharp_time : bool
        True for trigger-like reports (the time is the onset); False for
        bracketed onsets (between the last non-detection and the first detection).
    cadence_s : float or None, s
        Default bracket length when a bracketed report has no last non-detection.
    background_distance : str
        One of :data:`BACKGROUND_DISTANCE_MODELS`.
    description : str
    """

    name: str
    window_lo_s: float
    window_hi_s: float
    rate_per_deg2_per_day: float
    efficiency: float
    needs_neutron_star: bool
    reach_mpc: float
    pos_err_deg: float
    sharp_time: bool
    cadence_s: float | None = None
    background_distance: str = "uniform_volume"
    description: str = ""

    @property
    def window_s(self) -> tuple[float, float]:
        return (self.window_lo_s, self.window_hi_s)

    @property
    def window_length_s(self) -> float:
        return self.window_hi_s - self.window_lo_s

    @property
    def rate_per_sr_per_s(self) -> float:
        """Background rate density ``r_k`` (sr**-1 s**-1)."""
        return self.rate_per_deg2_per_day * DEG2_PER_SR / SECONDS_PER_DAY

    @property
    def all_sky_rate_per_s(self) -> float:
        """All-sky rate of unrelated reports (s**-1)."""
        return self.rate_per_sr_per_s * 4.0 * math.pi


def _number(value: Any, path: str, *, lo: float | None = None, hi: float | None = None,
            lo_open: bool = False, hi_open: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ConfigError(path, f"must be a number, got {type(value).__name__} {value!r}")
    v = float(value)
    if not math.isfinite(v):
        raise ConfigError(path, f"must be finite, got {v!r}")
    if lo is not None and (v <= lo if lo_open else v < lo):
        raise ConfigError(path, f"must be {'>' if lo_open else '>='} {lo:g}, got {v!r}")
    if hi is not None and (v >= hi if hi_open else v > hi):
        raise ConfigError(path, f"must be {'<' if hi_open else '<='} {hi:g}, got {v!r}")
    return v


def _bool(value: Any, path: str) -> bool:
    if not isinstance(value, bool):
        raise ConfigError(path, f"must be true or false, got {type(value).__name__} {value!r}")
    return value


def _one_class(name: str, spec: Any, path: str) -> CounterpartClass:
    if not isinstance(spec, Mapping):
        raise ConfigError(path, f"must be a mapping of class fields, got {type(spec).__name__}")
    unknown = sorted(set(map(str, spec)) - _FIELDS)
    if unknown:
        raise ConfigError(path, f"unknown field(s) {unknown}; known: {sorted(_FIELDS)}")
    for key in _REQUIRED:
        if key not in spec or spec[key] is None:
            raise ConfigError(f"{path}.{key}", "is required")
    win = spec["window_s"]
    if not isinstance(win, (list, tuple)) or len(win) != 2:
        raise ConfigError(f"{path}.window_s", f"must be a list [lo, hi] of two numbers (s), got {win!r}")
    lo = _number(win[0], f"{path}.window_s[0]")
    hi = _number(win[1], f"{path}.window_s[1]")
    if not hi > lo:
        raise ConfigError(f"{path}.window_s", f"needs lo < hi, got [{lo:g}, {hi:g}]")
    rate = _number(spec["rate_per_deg2_per_day"], f"{path}.rate_per_deg2_per_day", lo=0.0, lo_open=True)
    eff = _number(spec["efficiency"], f"{path}.efficiency", lo=0.0, hi=1.0)
    needs_ns = _bool(spec["needs_neutron_star"], f"{path}.needs_neutron_star")
    reach = _number(spec["reach_mpc"], f"{path}.reach_mpc", lo=0.0, lo_open=True)
    pos_err = _number(spec["pos_err_deg"], f"{path}.pos_err_deg", lo=0.0, hi=90.0)
    sharp = _bool(spec["sharp_time"], f"{path}.sharp_time")
    cadence = spec.get("cadence_s")
    if cadence is None:
        if not sharp:
            raise ConfigError(f"{path}.cadence_s",
                              "is required for a bracketed class (sharp_time: false): it is the default "
                              "bracket when a report has no last non-detection")
    else:
        cadence = _number(cadence, f"{path}.cadence_s", lo=0.0, lo_open=True)
    bg = spec.get("background_distance", "uniform_volume")
    if bg not in BACKGROUND_DISTANCE_MODELS:
        raise ConfigError(f"{path}.background_distance",
                          f"must be one of {', '.join(BACKGROUND_DISTANCE_MODELS)}, got {bg!r}")
    desc = spec.get("description", "")
    if not isinstance(desc, str):
        raise ConfigError(f"{path}.description", f"must be a string, got {type(desc).__name__}")
    return CounterpartClass(name, lo, hi, rate, eff, needs_ns, reach, pos_err, sharp, cadence, bg, desc)


def parse_classes(mapping: Any, path: str = "classes") -> dict[str, CounterpartClass]:
    """Validate a mapping ``{class name: fields}`` into :class:`CounterpartClass` objects.

    Parameters
    ----------
    mapping : mapping
        Typically the ``classes:`` section of a YAML configuration.
    path : str
        Key path used in error messages.

    Raises
    ------
    ConfigError
        Naming the key path (``classes.optical.window_s[1]``) and the constraint.
    """
    if not isinstance(mapping, Mapping):
        raise ConfigError(path, f"must be a mapping from class name to its fields, got {type(mapping).__name__}")
    if not mapping:
        raise ConfigError(path, "defines no counterpart class")
    out: dict[str, CounterpartClass] = {}
    for name, spec in mapping.items():
        if not isinstance(name, str) or not name.strip():
            raise ConfigError(f"{path}", f"class names must be non-empty strings, got {name!r}")
        out[name] = _one_class(name, spec, f"{path}.{name}")
    return out


def load_classes_file(path) -> dict[str, CounterpartClass]:
    """Read a YAML file and parse its top-level ``classes:`` section.

    Raises
    ------
    ConfigError
        When the file cannot be read or parsed, lacks ``classes:``, or a class is invalid.
    """
    from matcher.keycheck import read_yaml_file

    p = Path(path)
    doc = read_yaml_file(p)
    if not isinstance(doc, Mapping) or "classes" not in doc:
        raise ConfigError(f"{p}: classes", "is missing (the file needs a top-level 'classes:' mapping)")
    return parse_classes(doc["classes"], path=f"{p}: classes")
