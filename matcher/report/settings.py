"""The ``reports:`` section of the configuration: when and where per-event reports are written.

::

    reports:
      enabled: true            # default true when the section is present; no section: no reports
      out_dir: reports         # relative to state_dir; one folder per event inside it
      when: revision           # revision: every new revision (and withdrawal); results: also when results change
      max_candidates: 100      # candidate rows in the page and in candidates.ecsv (best first)
      top_hosts: 20            # host galaxies in the page, hosts.ecsv and hosts.vot
      plots: current           # current: the sky plot of the revision shown; all: one per revision with a map
      dpi: 100                 # sky plot resolution (100: 1100 × 850 px)

Imports nothing heavy, so that loading a configuration does not pull in matplotlib.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from matcher.errors import ConfigError
from matcher.keycheck import check_keys, get_bool, get_int, get_number, get_path, get_str

__all__ = ["ReportSettings", "parse_report_settings", "REPORT_WHEN", "REPORT_PLOTS"]

#: When the service writes an event's report.
REPORT_WHEN = ("revision", "results")
#: Which revisions get a sky plot.
REPORT_PLOTS = ("current", "all")

_KEYS = ("enabled", "out_dir", "when", "max_candidates", "top_hosts", "plots", "dpi")


@dataclass(frozen=True)
class ReportSettings:
    """``reports``: see the module docstring.

    Attributes
    ----------
    enabled : bool
        Whether the service writes reports.
    out_dir : Path or None
        Folder of the per-event folders (None: ``STATE_DIR/reports``).
    when : str
        ``revision`` or ``results``.
    max_candidates : int
    top_hosts : int
    plots : str
        ``current`` or ``all``.
    dpi : float
    """

    enabled: bool = False
    out_dir: Path | None = None
    when: str = "revision"
    max_candidates: int = 100
    top_hosts: int = 20
    plots: str = "current"
    dpi: float = 100.0

    def resolved_out_dir(self, state_dir) -> Path:
        """:attr:`out_dir`, or ``STATE_DIR/reports`` when it is not set."""
        return self.out_dir if self.out_dir is not None else Path(state_dir) / "reports"


def parse_report_settings(raw: Any, state_dir, keypath: str = "reports") -> ReportSettings:
    """Validate the ``reports`` mapping (``None``: the section is absent, reports off).

    Parameters
    ----------
    raw : mapping or None
    state_dir : Path
        Relative ``out_dir`` resolves against it.
    keypath : str

    Raises
    ------
    ConfigError
        Naming the key path, e.g. ``config reports.when: must be one of revision, results, got 'always'``.
    """
    if raw is None:
        return ReportSettings()
    raw = check_keys(raw, _KEYS, keypath)
    max_candidates = get_int(raw, "max_candidates", keypath, 100, lo=1)
    top_hosts = get_int(raw, "top_hosts", keypath, 20, lo=0)
    if max_candidates > 100_000:
        raise ConfigError(f"{keypath}.max_candidates", f"must be <= 100000 (a page a browser can open), got "
                                                       f"{max_candidates}")
    if top_hosts > 10_000:
        raise ConfigError(f"{keypath}.top_hosts", f"must be <= 10000, got {top_hosts}")
    return ReportSettings(
        enabled=get_bool(raw, "enabled", keypath, True),
        out_dir=get_path(raw, "out_dir", keypath, Path(state_dir)),
        when=get_str(raw, "when", keypath, "revision", choices=REPORT_WHEN),
        max_candidates=max_candidates,
        top_hosts=top_hosts,
        plots=get_str(raw, "plots", keypath, "current", choices=REPORT_PLOTS),
        dpi=get_number(raw, "dpi", keypath, 100.0, lo=20.0, hi=600.0),
    )
