"""The coincidence engine: counterpart classes, odds, association probabilities, FAP, joint FAR.

Pure computation (no files, no sockets) except :func:`load_classes_file`.
The service calls :func:`score_reports` (one event revision, many reports),
:func:`association_probabilities` (re-normalize stored odds per class),
:func:`window_mask` / :func:`classes_in_window` / :func:`merger_time_range`
(decide what to score), with classes from :func:`parse_classes`.
"""

from matcher.coincidence.batch import ReportBatch
from matcher.coincidence.classes import CounterpartClass, load_classes_file, parse_classes
from matcher.coincidence.cosmology import luminosity_distance_mpc, redshift_at_distance
from matcher.coincidence.defaults import default_classes, default_config_path
from matcher.coincidence.distance_term import distance_factor, measured_distances
from matcher.coincidence.engine import (
    association_probabilities,
    classes_in_window,
    merger_time_range,
    score_reports,
    window_mask,
)
from matcher.coincidence.fap import false_association_probability, poisson_fap
from matcher.coincidence.joint_far import joint_far
from matcher.coincidence.odds import posterior_odds
from matcher.coincidence.prior import class_prior, event_probabilities
from matcher.coincidence.table import ScoreTable
from matcher.coincidence.time_term import time_term

__all__ = [
    "CounterpartClass",
    "parse_classes",
    "load_classes_file",
    "default_classes",
    "default_config_path",
    "ReportBatch",
    "ScoreTable",
    "score_reports",
    "association_probabilities",
    "window_mask",
    "classes_in_window",
    "merger_time_range",
    "posterior_odds",
    "time_term",
    "distance_factor",
    "measured_distances",
    "class_prior",
    "event_probabilities",
    "false_association_probability",
    "poisson_fap",
    "joint_far",
    "luminosity_distance_mpc",
    "redshift_at_distance",
]
