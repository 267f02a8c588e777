"""Tuning settings: the ``tuning:`` section of a configuration, validated, and the window grid.

:func:`matcher.coincidence.parse_classes` rejects unknown class fields, so the
keys that only tuning needs (a delay model, a window grid, ...) live in a
section of their own, beside ``classes:``::

    classes:
      optical: {window_s: [0, 259200], ...}        # as always
    tuning:
      injections: 1000              # per alert and class (the command line overrides)
      slides: 100                   # time slides per alert (the command line overrides)
      target_false_per_event: 0.01  # false matches per GW event to hold (the command line overrides)
      bootstrap: 200                # bootstrap resamples of the alerts
      fap_grid: {min: 1.0e-5, max: 0.5, per_decade: 8}
      classes:
        optical:
          delay_model: {uniform_s: [0, 86400]}          # onset minus merger time (s)
          # or a table: {table: {edges_s: [0, 3600, 86400], weights: [0.7, 0.3]}}
          windows_s: [[0, 43200], [0, 86400]]           # optional: the grid to scan
          footprint_order: 4                            # optional: HEALPix order of the footprint cells
          outage_gap_s: 86400                           # optional: a longer silence is an outage
          distance_fraction: 0.1                        # optional: injections with a measured distance
          distance_rel_err: 0.15                        # optional: their relative 1-sigma error
          pos_err_deg: 0.0003                           # optional: injected 1-sigma position error

Every key is optional. Without a delay model a class's injections are uniform
over its configured window (an assumption, said in the output). Errors are
:class:`~matcher.errors.ConfigError` naming the key path.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

from matcher.coincidence.classes import CounterpartClass
from matcher.errors import ConfigError
from matcher.keycheck import check_keys, get_int, get_number, sub

__all__ = [
    "DelayModel",
    "ClassTuning",
    "TuningSettings",
    "parse_tuning",
    "window_grid",
    "configured_window",
    "fap_thresholds",
    "DEFAULT_INJECTIONS",
    "DEFAULT_SLIDES",
    "DEFAULT_TARGET_FALSE_PER_EVENT",
    "DEFAULT_BOOTSTRAP",
    "GRID_FRACTIONS",
]

#: Defaults (assumptions, chosen here; every one can be set in the config or on the command line).
DEFAULT_INJECTIONS = 1000
DEFAULT_SLIDES = 100
DEFAULT_TARGET_FALSE_PER_EVENT = 0.01
DEFAULT_BOOTSTRAP = 200
#: Window ends scanned by default: ``hi = lo + f × (H - lo)`` for these ``f`` (see :func:`window_grid`).
GRID_FRACTIONS = (0.25, 0.5, 0.75, 1.0, 1.5, 2.0)

_TOP = ("injections", "slides", "target_false_per_event", "bootstrap", "fap_grid", "classes")
_CLASS_KEYS = ("delay_model", "windows_s", "footprint_order", "outage_gap_s", "distance_fraction",
               "distance_rel_err", "pos_err_deg")


@dataclass(frozen=True)
class DelayModel:
    """Onset delay after the merger (s): a histogram, uniform inside each bin.

    ``{uniform_s: [lo, hi]}`` is a one-bin histogram.

    Attributes
    ----------
    edges_s : tuple of float, s
        Increasing bin edges.
    weights : tuple of float
        Probability of each bin (normalized, sums to 1).
    source : str
        ``"uniform_s"``, ``"table"`` or ``"configured window"`` (the default).
    """

    edges_s: tuple[float, ...]
    weights: tuple[float, ...]
    source: str = "uniform_s"

    @classmethod
    def uniform(cls, lo: float, hi: float, source: str = "uniform_s") -> "DelayModel":
        return cls((float(lo), float(hi)), (1.0,), source)

    @property
    def support_s(self) -> tuple[float, float]:
        """Smallest and largest possible delay (s), over bins of non-zero weight."""
        w = np.asarray(self.weights)
        e = np.asarray(self.edges_s)
        nz = np.flatnonzero(w > 0)
        return float(e[nz[0]]), float(e[nz[-1] + 1])

    def sample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` delays (s): a bin by weight, then uniform inside it."""
        e = np.asarray(self.edges_s)
        k = rng.choice(len(self.weights), size=n, p=np.asarray(self.weights))
        return e[k] + rng.uniform(size=n) * (e[k + 1] - e[k])

    def fraction_in(self, lo: float, hi: float) -> float:
        """Probability that the delay lies in ``[lo, hi]``."""
        e = np.asarray(self.edges_s)
        ov = np.clip(np.minimum(e[1:], hi) - np.maximum(e[:-1], lo), 0.0, None)
        return float(np.sum(np.asarray(self.weights) * ov / np.diff(e)))

    def describe(self) -> str:
        if len(self.weights) == 1:
            return f"uniform in [{self.edges_s[0]:g}, {self.edges_s[1]:g}] s ({self.source})"
        return f"table of {len(self.weights)} bins over [{self.edges_s[0]:g}, {self.edges_s[-1]:g}] s"


@dataclass(frozen=True)
class ClassTuning:
    """Per-class tuning keys (``tuning.classes.NAME``); ``None`` means "derive it" (see the module)."""

    delay: DelayModel | None = None
    windows_s: tuple[tuple[float, float], ...] | None = None
    footprint_order: int | None = None
    outage_gap_s: float | None = None
    distance_fraction: float | None = None
    distance_rel_err: float | None = None
    pos_err_deg: float | None = None

    def delay_for(self, klass: CounterpartClass) -> DelayModel:
        """The delay model, or uniform over the class's configured window."""
        if self.delay is not None:
            return self.delay
        return DelayModel.uniform(klass.window_lo_s, klass.window_hi_s, source="configured window")


@dataclass(frozen=True)
class TuningSettings:
    """The whole ``tuning:`` section (defaults where absent)."""

    classes: Mapping[str, ClassTuning] = field(default_factory=lambda: MappingProxyType({}))
    injections: int = DEFAULT_INJECTIONS
    slides: int = DEFAULT_SLIDES
    target_false_per_event: float = DEFAULT_TARGET_FALSE_PER_EVENT
    bootstrap: int = DEFAULT_BOOTSTRAP
    fap_min: float = 1e-5
    fap_max: float = 0.5
    fap_per_decade: int = 8

    def for_class(self, name: str) -> ClassTuning:
        return self.classes.get(name, ClassTuning())


def _pair(v: Any, path: str) -> tuple[float, float]:
    if not isinstance(v, (list, tuple)) or len(v) != 2:
        raise ConfigError(path, f"must be a list [lo, hi] of two numbers (s), got {v!r}")
    lo = get_number({"v": v[0]}, "v", f"{path}[0]")
    hi = get_number({"v": v[1]}, "v", f"{path}[1]")
    if lo is None or hi is None:
        raise ConfigError(path, f"must be a list [lo, hi] of two numbers (s), got {v!r}")
    if not hi > lo:
        raise ConfigError(path, f"needs lo < hi, got [{lo:g}, {hi:g}]")
    return lo, hi


def _numbers(v: Any, path: str) -> list[float]:
    if not isinstance(v, (list, tuple)) or not v:
        raise ConfigError(path, f"must be a non-empty list of numbers, got {v!r}")
    out = []
    for i, x in enumerate(v):
        y = get_number({"v": x}, "v", f"{path}[{i}]")
        if y is None:
            raise ConfigError(f"{path}[{i}]", "must be a number, got null")
        out.append(y)
    return out


def _delay(raw: Any, path: str) -> DelayModel:
    raw = check_keys(raw, ("uniform_s", "table"), path)
    if ("uniform_s" in raw) == ("table" in raw):
        raise ConfigError(path, "needs exactly one of uniform_s: [lo, hi] or table: {edges_s: [...], weights: [...]}")
    if "uniform_s" in raw:
        lo, hi = _pair(raw["uniform_s"], sub(path, "uniform_s"))
        return DelayModel.uniform(lo, hi)
    tp = sub(path, "table")
    table = check_keys(raw["table"], ("edges_s", "weights"), tp, required=("edges_s", "weights"))
    edges = _numbers(table["edges_s"], sub(tp, "edges_s"))
    weights = _numbers(table["weights"], sub(tp, "weights"))
    if len(edges) != len(weights) + 1:
        raise ConfigError(tp, f"needs one more edge than weights (a weight per bin), got {len(edges)} edges "
                              f"and {len(weights)} weights")
    if any(b <= a for a, b in zip(edges, edges[1:])):
        raise ConfigError(sub(tp, "edges_s"), f"must increase strictly, got {edges}")
    if any(w < 0 for w in weights) or not sum(weights) > 0:
        raise ConfigError(sub(tp, "weights"), f"must be >= 0 with a positive sum, got {weights}")
    total = float(sum(weights))
    return DelayModel(tuple(edges), tuple(w / total for w in weights), "table")


def _class_tuning(raw: Any, path: str) -> ClassTuning:
    raw = check_keys(raw, _CLASS_KEYS, path)
    delay = _delay(raw["delay_model"], sub(path, "delay_model")) if raw.get("delay_model") is not None else None
    windows = None
    if raw.get("windows_s") is not None:
        wp = sub(path, "windows_s")
        v = raw["windows_s"]
        if not isinstance(v, (list, tuple)) or not v:
            raise ConfigError(wp, f"must be a non-empty list of [lo, hi] pairs (s), got {v!r}")
        windows = tuple(_pair(w, f"{wp}[{i}]") for i, w in enumerate(v))
    order = get_int(raw, "footprint_order", path, None, lo=0)
    if order is not None and order > 8:
        raise ConfigError(sub(path, "footprint_order"), f"must be <= 8 (cells of 0.05 deg²), got {order}")
    return ClassTuning(
        delay=delay,
        windows_s=windows,
        footprint_order=order,
        outage_gap_s=get_number(raw, "outage_gap_s", path, None, lo=0.0, lo_open=True),
        distance_fraction=get_number(raw, "distance_fraction", path, None, lo=0.0, hi=1.0),
        distance_rel_err=get_number(raw, "distance_rel_err", path, None, lo=0.0, lo_open=True, hi=1.0),
        pos_err_deg=get_number(raw, "pos_err_deg", path, None, lo=0.0, hi=90.0),
    )


def parse_tuning(raw: Any, classes: Mapping[str, CounterpartClass], path: str = "tuning") -> TuningSettings:
    """Validate the ``tuning:`` section against the configured ``classes``.

    Parameters
    ----------
    raw : mapping or None
        The section as read by ``yaml.safe_load`` (``None``: every default).
    classes : mapping of str to CounterpartClass
        Class names under ``tuning.classes`` must be among them.
    path : str
        Key path for error messages.

    Raises
    ------
    ConfigError
    """
    raw = check_keys(raw, _TOP, path)
    grid = check_keys(raw.get("fap_grid"), ("min", "max", "per_decade"), sub(path, "fap_grid"))
    gp = sub(path, "fap_grid")
    fmin = get_number(grid, "min", gp, 1e-5, lo=0.0, lo_open=True, hi=1.0)
    fmax = get_number(grid, "max", gp, 0.5, lo=0.0, lo_open=True, hi=1.0)
    if fmax >= 1.0:
        raise ConfigError(sub(gp, "max"), "must be < 1 (FAP 1 counts every report in the window)")
    if not fmax > fmin:
        raise ConfigError(gp, f"needs min < max, got min={fmin:g}, max={fmax:g}")
    per_decade = get_int(grid, "per_decade", gp, 8, lo=1)
    per_class_raw = raw.get("classes")
    cp = sub(path, "classes")
    if per_class_raw is None:
        per_class_raw = {}
    if not isinstance(per_class_raw, Mapping):
        raise ConfigError(cp, f"must be a mapping from class name to its tuning keys, got {type(per_class_raw).__name__}")
    per_class = {}
    for name, spec in per_class_raw.items():
        if name not in classes:
            raise ConfigError(f"{cp}.{name}", f"no class {name!r} in classes (configured: {', '.join(sorted(classes))})")
        per_class[name] = _class_tuning(spec, f"{cp}.{name}")
    target = get_number(raw, "target_false_per_event", path, DEFAULT_TARGET_FALSE_PER_EVENT, lo=0.0, lo_open=True)
    return TuningSettings(
        classes=MappingProxyType(per_class),
        injections=get_int(raw, "injections", path, DEFAULT_INJECTIONS, lo=1),
        slides=get_int(raw, "slides", path, DEFAULT_SLIDES, lo=1),
        target_false_per_event=target,
        bootstrap=get_int(raw, "bootstrap", path, DEFAULT_BOOTSTRAP, lo=1),
        fap_min=fmin,
        fap_max=fmax,
        fap_per_decade=per_decade,
    )


def fap_thresholds(settings: TuningSettings) -> np.ndarray:
    """FAP thresholds scanned: ``per_decade`` log-spaced values per decade from ``fap_min`` to ``fap_max``."""
    n = int(math.ceil(math.log10(settings.fap_max / settings.fap_min) * settings.fap_per_decade - 1e-9)) + 1
    return np.geomspace(settings.fap_min, settings.fap_max, max(n, 2))


def _tidy(x: float) -> float:
    """Round a grid edge to 12 significant figures: sums like ``lo + f (H - lo)`` then compare exactly
    (a configured window keeps its value; no real window needs more digits)."""
    return float(f"{x:.12g}")


def configured_window(klass: CounterpartClass) -> tuple[float, float]:
    """The class's configured window as it appears in :func:`window_grid`."""
    return _tidy(klass.window_lo_s), _tidy(klass.window_hi_s)


def window_grid(klass: CounterpartClass, tuning: ClassTuning) -> tuple[tuple[float, float], ...]:
    """The ``[lo, hi]`` windows (s) scanned for a class, sorted by (lo, hi), without duplicates.

    An explicit ``windows_s`` is used as given (plus the configured window). Otherwise:
    starts ``lo`` ∈ {configured lo, lowest delay}; for each, ends
    ``hi = lo + f (H - lo)`` for ``f`` in :data:`GRID_FRACTIONS` with ``H`` the larger of the
    configured end and the largest delay; plus the configured window and ``[lowest, largest delay]``.
    The configured window is always in the grid (the reference for the model check).
    """
    conf = configured_window(klass)
    if tuning.windows_s is not None:
        grid = {(_tidy(lo), _tidy(hi)) for lo, hi in tuning.windows_s}
        grid.add(conf)
        return tuple(sorted(grid))
    d_lo, d_hi = tuning.delay_for(klass).support_s
    top = max(klass.window_hi_s, d_hi)
    grid = {conf, (_tidy(d_lo), _tidy(d_hi))}
    for lo in sorted({klass.window_lo_s, d_lo}):
        if not top > lo:
            continue
        for f in GRID_FRACTIONS:
            grid.add((_tidy(lo), _tidy(lo + f * (top - lo))))
    return tuple(sorted(w for w in grid if w[1] > w[0]))
