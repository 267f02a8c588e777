"""Turn engine objects into the plain data the sky plot takes.

Pure functions (no files): transient reports with or without their scores
become :class:`~matcher.report.skyplot.Candidate` objects; a host ranking
becomes :class:`~matcher.report.skyplot.Host` objects. The command line uses
them now; the service and the per-event report (which read scores and host
lists from the store) give them the same objects.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from matcher.errors import InputError
from matcher.report.skyplot import Candidate, Host

__all__ = ["candidates_from_reports", "hosts_from_ranking"]


def _nan(v):
    return np.nan if v is None else float(v)


def candidates_from_reports(reports: Sequence, scores=None) -> list[Candidate]:
    """Candidates from transient reports, ranked and labelled by ``P_assoc`` when scores are given.

    Parameters
    ----------
    reports : sequence of TransientReport
    scores : ScoreTable, optional
        :func:`matcher.coincidence.score_reports` of these reports (rows aligned
        with ``reports``). Ranks follow :meth:`ScoreTable.ranking` over every
        row (reports outside their class window last, with ``P_assoc`` 0), and
        the distance is the one the scoring used.

    Without scores each report's distance comes from its own distance or
    redshift (Planck18, as in :func:`matcher.coincidence.measured_distances`);
    ranks are left for the plot to fill in by credible level.
    """
    from matcher.coincidence import measured_distances

    reports = list(reports)
    n = len(reports)
    if scores is not None and len(scores) != n:
        raise InputError(f"scores have {len(scores)} rows for {n} reports")
    d, s, _ = measured_distances(
        np.array([_nan(r.redshift) for r in reports]), np.array([_nan(r.redshift_err) for r in reports]),
        np.array([_nan(r.distance_mpc) for r in reports]), np.array([_nan(r.distance_err_mpc) for r in reports]),
    ) if n else (np.zeros(0), np.zeros(0), None)
    rank = [None] * n
    p = [None] * n
    if scores is not None:
        for k, i in enumerate(scores.ranking(include_out_of_window=True)):
            rank[int(i)] = k + 1
        p = [float(v) for v in scores.p_assoc]
        used = np.isfinite(scores.distance_mpc)
        d = np.where(used, scores.distance_mpc, d)
        s = np.where(used, scores.distance_err_mpc, s)
    out = []
    for i, r in enumerate(reports):
        if scores is not None and str(scores.transient_id[i]) != r.transient_id:
            raise InputError(f"scores row {i} is {scores.transient_id[i]}, report is {r.transient_id}")
        out.append(Candidate.from_report(r, p_assoc=p[i], rank=rank[i],
                                         distance_mpc=None if not np.isfinite(d[i]) else float(d[i]),
                                         distance_err_mpc=None if not np.isfinite(s[i]) else float(s[i])))
    return out


def hosts_from_ranking(ranking, top: int = 10) -> list[Host]:
    """The ``top`` galaxies of a :class:`matcher.catalog.HostRanking` (best first) as hosts."""
    n = min(int(top), len(ranking))
    return [
        Host(str(ranking.galaxy_id[i]), float(ranking.ra_deg[i]), float(ranking.dec_deg[i]),
             p_host=float(ranking.prob[i]), rank=i + 1,
             distance_mpc=float(ranking.distance_mpc[i]) if np.isfinite(ranking.distance_mpc[i]) else None,
             distance_err_mpc=(float(ranking.distance_err_mpc[i])
                               if np.isfinite(ranking.distance_err_mpc[i]) and ranking.distance_err_mpc[i] > 0
                               else None))
        for i in range(n)
    ]
