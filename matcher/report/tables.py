"""The report's machine-readable tables: candidates and hosts as astropy tables, ECSV and VOTable bytes.

Pure: tables are built from an :class:`~matcher.report.model.EventReport`
and rendered to bytes in memory; the caller writes the files. Columns carry
their units; missing numbers are NaN, a missing best host is a masked cell. Floats
are written at full precision (ECSV writes ``repr``; VOTable cells are
float64), so a table read back with astropy equals the values the report
shows in its ``data-value`` attributes.
"""

from __future__ import annotations

import io

import astropy.units as u
import numpy as np
from astropy.table import MaskedColumn, Table

from matcher.report.model import EventReport

__all__ = ["candidates_table", "hosts_table", "ecsv_bytes", "votable_bytes", "CANDIDATE_COLUMNS", "HOST_COLUMNS"]

# Field → (column name, unit, description). The column names are the output contract.
CANDIDATE_COLUMNS = {
    "rank": ("rank", None, "1 = best: odds descending, then FAP ascending, then transient id"),
    "transient_id": ("transient_id", None, "the report's id"),
    "klass": ("class", None, "counterpart class"),
    "status": ("status", None, "current, superseded or withdrawn"),
    "p_assoc": ("p_assoc", None, "association probability O/(1 + sum of O over the class)"),
    "fap": ("fap", None, "false-association probability"),
    "odds": ("odds", None, "posterior odds pi/(1-pi) I T D / r"),
    "prior": ("prior", None, "pi: prior probability of a reported counterpart of the class"),
    "sky_per_sr": ("sky_per_sr", u.sr ** -1, "I: sky overlap"),
    "time_per_s": ("time_per_s", u.s ** -1, "T: time term"),
    "distance_factor": ("distance_factor", None, "D: distance Bayes factor"),
    "rate_per_sr_per_s": ("rate_per_sr_per_s", u.sr ** -1 * u.s ** -1, "r: background rate of the class"),
    "dt_s": ("dt_s", u.s, "report time minus merger time"),
    "searched_area_deg2": ("searched_area_deg2", u.deg ** 2, "area of the GW map denser than at the report"),
    "credible_level": ("credible_level", None, "GW probability denser than at the report"),
    "joint_far_per_year": ("joint_far_per_year", u.yr ** -1, "joint false-alarm rate (sharp triggers)"),
    "ra_deg": ("ra_deg", u.deg, "right ascension (ICRS)"),
    "dec_deg": ("dec_deg", u.deg, "declination (ICRS)"),
    "pos_err_deg": ("pos_err_deg", u.deg, "1-sigma position error"),
    "distance_mpc": ("distance_mpc", u.Mpc, "luminosity distance used"),
    "distance_err_mpc": ("distance_err_mpc", u.Mpc, "its 1-sigma error"),
    "best_host_id": ("best_host_id", None, "most probable host galaxy of the report"),
    "best_host_prob": ("best_host_prob", None, "its probability"),
    "p_assoc_published": ("p_assoc_published", None, "p_assoc as the service published it (rounded)"),
    "rank_published": ("rank_published", None, "rank as the service published it (0: not published)"),
    "revision": ("revision", None, "GW revision scored"),
    "key": ("key", None, "the result's deterministic key"),
}
HOST_COLUMNS = {
    "rank": ("rank", None, "1 = most probable host"),
    "galaxy_id": ("galaxy_id", None, "catalogue id"),
    "ra_deg": ("ra_deg", u.deg, "right ascension (ICRS)"),
    "dec_deg": ("dec_deg", u.deg, "declination (ICRS)"),
    "distance_mpc": ("distance_mpc", u.Mpc, "luminosity distance"),
    "distance_err_mpc": ("distance_err_mpc", u.Mpc, "its 1-sigma error"),
    "p_host": ("p_host", None, "probability that the galaxy is the host"),
    "cum_prob": ("cum_prob", None, "running sum of p_host"),
}

_INT_FIELDS = {"rank", "revision", "rank_published"}
_STR_FIELDS = {"transient_id", "klass", "status", "best_host_id", "key", "galaxy_id"}


def _column(rows, name: str):
    values = [getattr(r, name) for r in rows]
    if name in _INT_FIELDS:
        return np.array(values, dtype=np.int64)
    if name in _STR_FIELDS:
        return np.array(values, dtype=str) if values else np.zeros(0, dtype="U1")
    return np.array(values, dtype=np.float64)


def _table(rows, columns, meta) -> Table:
    t = Table(meta=meta)
    for name, (col, unit, desc) in columns.items():
        values = _column(rows, name)
        if name in _STR_FIELDS and values.size and (values == "").any():
            # A missing string (no best host) is a masked cell: ECSV and VOTable read it back masked.
            t[col] = MaskedColumn(values, mask=values == "")
        else:
            t[col] = values
        if unit is not None:
            t[col].unit = unit
        t[col].description = desc
    return t


def _meta(report: EventReport) -> dict:
    cur = report.current
    return {
        "event_id": report.event_id,
        "revision": int(report.revision),
        "current_revision": int(cur.revision),
        "event_state": cur.state,
        "generated_at": report.generated_at_iso,
        "matcher_version": report.version,
        "classes_from": report.config_source,
        "caution": "A decision aid: it does not replace the vetting of the collaboration that issued the alert.",
    }


def candidates_table(report: EventReport) -> Table:
    """The ranked candidates (every row of ``report.candidates``) with units and provenance in ``meta``."""
    meta = _meta(report)
    meta["n_candidates_total"] = int(report.n_candidates_total)
    return _table(report.candidates, CANDIDATE_COLUMNS, meta)


def hosts_table(report: EventReport) -> Table:
    """The ranked host galaxies with units; ``meta`` holds ``p_outside_catalog`` (NaN: not assessed)."""
    meta = _meta(report)
    meta["p_outside_catalog"] = float(report.p_outside_catalog)
    meta["host_note"] = report.host_note
    return _table(report.hosts, HOST_COLUMNS, meta)


def ecsv_bytes(table: Table) -> bytes:
    """The table as ECSV text (UTF-8 bytes)."""
    buf = io.StringIO()
    table.write(buf, format="ascii.ecsv")
    return buf.getvalue().encode("utf-8")


def votable_bytes(table: Table, *, resource_name: str = "hosts") -> bytes:
    """The table as a VOTable (TABLEDATA serialization, float64 cells).

    Table ``meta`` values that a VOTable cannot carry as a float (NaN) are written as text.
    """
    from astropy.io.votable import from_table

    t = table.copy(copy_data=False)
    t.meta = {k: (repr(v) if isinstance(v, float) else v) for k, v in table.meta.items()}
    vot = from_table(t, table_id=resource_name)
    for name, value in t.meta.items():
        vot.resources[0].infos.append(_info(name, value))
    buf = io.BytesIO()
    vot.to_xml(buf, tabledata_format="tabledata")
    return buf.getvalue()


def _info(name: str, value):
    from astropy.io.votable.tree import Info

    return Info(name=name, value=str(value))
