"""Offline tuning of coincidence windows on an archive: background, time slides, injections, a recommendation.

``matcher tune`` (:mod:`matcher.commands.tune`) reads an archive
(:func:`read_archive`), prepares each class from the archive's own reports
(:func:`prepare`: footprint, live time, measured rate, cadence, slide offsets,
window grid), runs every alert (:func:`run_all`: injections and time slides
scored by the real engine for every window), scans the windows
(:func:`summarize`) and writes the products (:func:`write_outputs`).
"""

from matcher.tune.archive_io import ArchiveContents, read_archive
from matcher.tune.configfile import load_tuning_config
from matcher.tune.outputs import recommended_yaml, summary, tuning_table, write_outputs
from matcher.tune.run import TunePlan, TuneResult, prepare, run_alert, run_all, summarize
from matcher.tune.settings import ClassTuning, DelayModel, TuningSettings, parse_tuning, window_grid

__all__ = [
    "ArchiveContents",
    "read_archive",
    "load_tuning_config",
    "TuningSettings",
    "ClassTuning",
    "DelayModel",
    "parse_tuning",
    "window_grid",
    "TunePlan",
    "TuneResult",
    "prepare",
    "run_alert",
    "run_all",
    "summarize",
    "summary",
    "tuning_table",
    "recommended_yaml",
    "write_outputs",
]
