"""Options of the ``html`` report writer (``reports.NAME`` in the configuration).

The service runs every writer named under ``reports:`` after each batch that gave an
event a new revision (or withdrew it); see :mod:`matcher.service`. The ``html`` kind
writes the per-event report folder::

    reports:
      html:
        kind: html
        out: reports            # folder of the per-event folders; relative to the config file
        max_candidates: 100     # candidate rows in the page and in candidates.ecsv (best first)
        top_hosts: 20           # host galaxies in the page, hosts.ecsv and hosts.vot (0: none)
        plots: current          # current: the sky plot of the revision shown; all: one per revision with a map
        dpi: 100                # sky plot resolution (100: 1100 × 850 px)
        refresh_s: 60           # also rewrite a report when the event's results change, at most this often
                                # (s; 0: after every such batch; null: only on new revisions)

Imports nothing heavy, so that reading a configuration does not pull in matplotlib.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from matcher.errors import ConfigError
from matcher.keycheck import check_keys, get_int, get_number, get_path, get_str

__all__ = ["ReportSettings", "parse_report_settings", "REPORT_PLOTS", "DEFAULT_OUT"]

#: Which revisions get a sky plot.
REPORT_PLOTS = ("current", "all")
#: Default folder of the per-event report folders (relative to the configuration file).
DEFAULT_OUT = "reports"

_KEYS = ("out", "max_candidates", "top_hosts", "plots", "dpi", "refresh_s")


@dataclass(frozen=True)
class ReportSettings:
    """One ``html`` writer's options (see the module docstring).

    Attributes
    ----------
    out : Path or None
        Folder of the per-event folders (None: not set; the command line gives ``--out`` itself).
    max_candidates : int
    top_hosts : int
    plots : str
        ``current`` or ``all``.
    dpi : float
    refresh_s : float or None, s
        The service rewrites an event's report when its results change between revisions,
        at most once per ``refresh_s`` (and once more when it stops); None: only on new revisions.
    """

    out: Path | None = None
    max_candidates: int = 100
    top_hosts: int = 20
    plots: str = "current"
    dpi: float = 100.0
    refresh_s: float | None = 60.0


def parse_report_settings(raw: Any, base_dir, keypath: str = "reports.html") -> ReportSettings:
    """Validate one writer's options (without its ``kind``).

    Parameters
    ----------
    raw : mapping or None
    base_dir : Path
        A relative ``out`` resolves against it (the configuration file's folder).
    keypath : str
        For error messages, e.g. ``reports.html``.

    Raises
    ------
    ConfigError
        Naming the key path, e.g. ``config reports.html.plots: must be one of current, all, got 'every'``.
    """
    raw = check_keys(raw, _KEYS, keypath)
    max_candidates = get_int(raw, "max_candidates", keypath, 100, lo=1)
    top_hosts = get_int(raw, "top_hosts", keypath, 20, lo=0)
    if max_candidates > 100_000:
        raise ConfigError(f"{keypath}.max_candidates",
                          f"must be <= 100000 (a page a browser can open), got {max_candidates}")
    if top_hosts > 10_000:
        raise ConfigError(f"{keypath}.top_hosts", f"must be <= 10000, got {top_hosts}")
    return ReportSettings(
        out=get_path(raw, "out", keypath, Path(base_dir), DEFAULT_OUT),
        max_candidates=max_candidates,
        top_hosts=top_hosts,
        plots=get_str(raw, "plots", keypath, "current", choices=REPORT_PLOTS),
        dpi=get_number(raw, "dpi", keypath, 100.0, lo=20.0, hi=600.0),
        refresh_s=get_number(raw, "refresh_s", keypath, 60.0, lo=0.0) if raw.get("refresh_s", 60.0) is not None
        else None,
    )
