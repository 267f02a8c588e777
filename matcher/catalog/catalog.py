"""Galaxy catalogues in memory: validation of the columns into a :class:`Catalog`.

Pure: :func:`catalog_from_table` takes an in-memory table (an astropy
``Table`` or any mapping of column name → 1-D array); reading files is
:mod:`matcher.catalog.tableio`'s job.

Every row is either accepted or rejected with a reason, and the
:class:`LoadReport` counts the rejections by reason with example row numbers
(rows are counted from 0, as astropy numbers them). Nothing is dropped
silently. Rules, in the order they are applied (a row is counted under the
first rule it breaks):

* a column that is mapped but holds no numbers (text that is not a number)
  rejects the rows where it does not parse;
* ``ra_deg`` must be finite in [0, 360] (360 is folded to 0), ``dec_deg``
  finite in [-90, 90];
* a given ``distance_mpc`` must be finite and > 0 and its error (if given)
  ≥ 0; a missing error counts as 0 (an exact distance; the report counts
  those rows);
* a row without a distance uses its ``redshift`` (0 < z ≤ 10) with
  ``redshift_err`` ≥ 0: the Planck18 luminosity distance and the error
  ``dD_L/dz σ_z`` (with a peculiar-velocity term, see
  :mod:`matcher.catalog.cosmology`); a row with neither is rejected;
* ``weight`` must be finite and ≥ 0 when the column exists; without the
  column every galaxy weighs 1;
* ``mag`` may be missing (unknown) but not non-numeric; ``radius_arcsec``
  may be missing but not negative;
* a repeated ``id`` rejects the later rows.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from matcher.catalog.columns import COLUMN_KEYS, ColumnMap
from matcher.cosmology import DistanceTable, planck18_table
from matcher.errors import CatalogError

#: Catalogue redshifts beyond this are rejected as implausible for a host galaxy.
CATALOG_Z_MAX = 10.0

__all__ = ["Catalog", "LoadReport", "catalog_from_table", "DEFAULT_PECULIAR_VELOCITY_KMS", "REJECTION_REASONS"]

#: Peculiar-velocity dispersion added to redshift errors (km/s). A typical
#: line-of-sight galaxy velocity dispersion (from memory); 0 disables it.
DEFAULT_PECULIAR_VELOCITY_KMS = 300.0

#: Rejection reasons, in the order the rules are applied.
REJECTION_REASONS = {
    "not_numeric": "a mapped numeric column holds text that is not a number",
    "bad_id": "id missing",
    "bad_position": "ra_deg/dec_deg missing, not finite or out of range",
    "bad_distance": "distance_mpc not finite and positive, or distance_err_mpc negative",
    "bad_redshift": "no distance, and redshift outside (0, 10] or redshift_err negative",
    "no_distance": "neither distance_mpc nor redshift given",
    "bad_weight": "weight missing, not finite or negative",
    "bad_radius": "radius_arcsec negative or not finite",
    "duplicate_id": "id repeats an earlier accepted row",
}
_EXAMPLES = 5
_MISSING_TEXT = {"", "nan", "null", "none", "--", "n/a", "na", "-"}


def _readonly(a):
    if a is None:
        return None
    a = np.asarray(a)
    a.flags.writeable = False  # always allowed (a memory map opened "r" already is)
    return a


@dataclass(frozen=True, eq=False)
class Catalog:
    """Validated galaxies as columns (all arrays of equal length, read-only).

    Attributes
    ----------
    galaxy_id : ndarray of int64 or str
    ra_deg, dec_deg : ndarray of float64, deg
    distance_mpc, distance_err_mpc : ndarray of float64, Mpc
        Luminosity distance and its 1σ error (0 = exact).
    weight : ndarray of float64
        Host-prior weight (luminosity or stellar-mass proxy; 1 when the
        catalogue has none).
    mag : ndarray of float64 or None
        Apparent magnitude (NaN where unknown).
    radius_arcsec : ndarray of float64 or None, arcsec
        Half-light radius (NaN where unknown).
    row : ndarray of int64
        The galaxy's row in the source table (from 0).
    from_redshift : ndarray of bool
        Whether the distance was computed from the redshift.
    """

    galaxy_id: np.ndarray
    ra_deg: np.ndarray
    dec_deg: np.ndarray
    distance_mpc: np.ndarray
    distance_err_mpc: np.ndarray
    weight: np.ndarray
    row: np.ndarray
    from_redshift: np.ndarray
    mag: np.ndarray | None = None
    radius_arcsec: np.ndarray | None = None

    #: Names of the array fields, in storage order (optional ones last).
    ARRAYS = ("galaxy_id", "ra_deg", "dec_deg", "distance_mpc", "distance_err_mpc", "weight", "row",
              "from_redshift", "mag", "radius_arcsec")

    def __len__(self) -> int:
        return int(self.ra_deg.shape[0])

    def arrays(self) -> dict[str, np.ndarray]:
        """The non-None array fields by name."""
        return {k: getattr(self, k) for k in self.ARRAYS if getattr(self, k) is not None}

    def take(self, order: np.ndarray) -> "Catalog":
        """A new catalogue with the rows at ``order`` (an index array)."""
        return Catalog(**{k: _readonly(np.asarray(v)[order]) for k, v in self.arrays().items()})


@dataclass(frozen=True)
class LoadReport:
    """What happened to every row of a catalogue.

    Attributes
    ----------
    source : str
    n_rows, n_accepted : int
    rejected : mapping of reason → count
        Keys from :data:`REJECTION_REASONS`; only reasons that occurred.
    examples : mapping of reason → list of int
        The first few rejected row numbers (from 0) for each reason.
    notes : mapping
        Counts and choices worth knowing: ``from_redshift``,
        ``distance_without_error``, ``weight`` (``"column"`` or ``"uniform"``),
        ``id`` (``"column"`` or ``"row number"``), ``peculiar_velocity_kms``.
    """

    source: str
    n_rows: int
    n_accepted: int
    rejected: Mapping[str, int] = field(default_factory=dict)
    examples: Mapping[str, list] = field(default_factory=dict)
    notes: Mapping[str, object] = field(default_factory=dict)

    @property
    def n_rejected(self) -> int:
        return self.n_rows - self.n_accepted

    def to_dict(self) -> dict:
        return {
            "source": self.source,
            "n_rows": self.n_rows,
            "n_accepted": self.n_accepted,
            "n_rejected": self.n_rejected,
            "rejected": dict(self.rejected),
            "examples": {k: list(v) for k, v in self.examples.items()},
            "notes": dict(self.notes),
        }

    @classmethod
    def from_dict(cls, d: Mapping) -> "LoadReport":
        return cls(str(d["source"]), int(d["n_rows"]), int(d["n_accepted"]), dict(d.get("rejected", {})),
                   {k: list(v) for k, v in d.get("examples", {}).items()}, dict(d.get("notes", {})))

    def lines(self) -> list[str]:
        """A human summary, one line per fact."""
        out = [f"{self.source}: {self.n_rows} rows, {self.n_accepted} accepted, {self.n_rejected} rejected"]
        for reason, count in self.rejected.items():
            rows = ", ".join(str(r) for r in self.examples.get(reason, []))
            more = ", ..." if count > len(self.examples.get(reason, [])) else ""
            out.append(f"  rejected {count}: {REJECTION_REASONS.get(reason, reason)} (rows {rows}{more})")
        n = self.notes
        if n.get("from_redshift"):
            out.append(f"  {n['from_redshift']} distances from redshift (Planck18, "
                       f"peculiar velocity {n.get('peculiar_velocity_kms', 0):g} km/s)")
        if n.get("distance_without_error"):
            out.append(f"  {n['distance_without_error']} distances without an error (taken as exact)")
        if n.get("weight") == "uniform":
            out.append("  no weight column: every galaxy weighs 1")
        if n.get("id") == "row number":
            out.append("  no id column: galaxies are named by their row number")
        return out


# --------------------------------------------------------------------------- parsing
def _column(table, name: str):
    names = list(table.colnames) if hasattr(table, "colnames") else list(table.keys())
    return table[name] if name in names else None


def _colnames(table) -> list[str]:
    return list(table.colnames) if hasattr(table, "colnames") else list(table.keys())


def _mask_of(col, n: int) -> np.ndarray:
    mask = getattr(col, "mask", None)
    if mask is None or mask is np.ma.nomask:
        return np.zeros(n, dtype=bool)
    return np.asarray(mask, dtype=bool).reshape(n)


def _parse_numeric(col, n: int, label: str, source: str):
    """(values with NaN where missing, mask of rows whose text is not a number)."""
    arr = np.asarray(getattr(col, "data", col))
    if arr.ndim != 1:
        raise CatalogError(f"{source}: column {label!r} has shape {arr.shape}; expected one value per row")
    if arr.shape[0] != n:
        raise CatalogError(f"{source}: column {label!r} has {arr.shape[0]} values for {n} rows")
    missing = _mask_of(col, n)
    bad = np.zeros(n, dtype=bool)
    kind = arr.dtype.kind
    if kind in "iuf":
        values = arr.astype(np.float64, copy=False)  # no copy of float64 columns: catalogues are large
    elif kind == "b":
        raise CatalogError(f"{source}: column {label!r} holds true/false values, expected numbers")
    elif kind in "USO":
        text = np.char.strip(np.asarray(arr, dtype=str))
        uniq, inverse = np.unique(text, return_inverse=True)
        parsed = np.empty(uniq.size)
        unparsable = np.zeros(uniq.size, dtype=bool)
        for i, s in enumerate(uniq):
            if s.lower() in _MISSING_TEXT:
                parsed[i] = np.nan
                continue
            try:
                parsed[i] = float(s)
            except ValueError:
                parsed[i] = np.nan
                unparsable[i] = True
        values = parsed[inverse.reshape(n)]
        bad = unparsable[inverse.reshape(n)]
    else:
        raise CatalogError(f"{source}: column {label!r} has unsupported type {arr.dtype}")
    if missing.any():
        values = np.where(missing, np.nan, values)
        bad &= ~missing
    return values, bad


def _parse_id(col, n: int, label: str, source: str):
    arr = np.asarray(getattr(col, "data", col))
    if arr.ndim != 1:
        raise CatalogError(f"{source}: column {label!r} has shape {arr.shape}; expected one value per row")
    missing = _mask_of(col, n)
    kind = arr.dtype.kind
    if kind in "iu":
        return arr.astype(np.int64), missing
    if kind == "f":
        finite = np.isfinite(arr)
        if np.all(arr[finite & ~missing] == np.round(arr[finite & ~missing])):
            return np.where(finite, arr, 0).astype(np.int64), missing | ~finite
    text = np.char.strip(np.asarray(arr, dtype=str))
    return text, missing | (text == "")


def catalog_from_table(
    table,
    columns: ColumnMap | Mapping[str, str] | None = None,
    *,
    source: str = "<table>",
    peculiar_velocity_kms: float = DEFAULT_PECULIAR_VELOCITY_KMS,
    distances: DistanceTable | None = None,
) -> tuple[Catalog, LoadReport]:
    """Validate a table of galaxies into a :class:`Catalog` and a :class:`LoadReport`.

    Parameters
    ----------
    table : astropy.table.Table or mapping of str → 1-D array
    columns : ColumnMap or mapping, optional
        Our column names → the table's (see :mod:`matcher.catalog.columns`).
    source : str
        Named in errors and in the report.
    peculiar_velocity_kms : float, km/s
        Added in quadrature to redshift errors for redshift-only galaxies.
    distances : DistanceTable, optional
        Defaults to Planck18.

    Raises
    ------
    CatalogError
        No rows, a mapped column missing, no position or distance columns, a
        column of the wrong shape or type, or no row surviving validation.
    """
    colmap = columns if isinstance(columns, ColumnMap) else ColumnMap.from_mapping(columns)
    names = _colnames(table)
    n = len(table[names[0]]) if names else 0
    if not names or n == 0:
        raise CatalogError(f"{source}: the catalogue has no rows")
    present = {}
    for key in COLUMN_KEYS:
        name = colmap.name(key)
        col = _column(table, name)
        if col is None and colmap.explicit(key):
            raise CatalogError(
                f"{source}: mapped column {name!r} (for {key}) is not in the catalogue; "
                f"its columns are: {', '.join(names[:40])}{' ...' if len(names) > 40 else ''}"
            )
        if col is not None:
            present[key] = col
    for key in ("ra_deg", "dec_deg"):
        if key not in present:
            raise CatalogError(
                f"{source}: no {key} column (looked for {colmap.name(key)!r}); map it, for example "
                f"--column {key}=RAJ2000; columns are: {', '.join(names[:40])}"
            )
    if "distance_mpc" not in present and "redshift" not in present:
        raise CatalogError(
            f"{source}: neither a distance column ({colmap.name('distance_mpc')!r}) nor a redshift column "
            f"({colmap.name('redshift')!r}); map one of them"
        )
    if peculiar_velocity_kms < 0 or not np.isfinite(peculiar_velocity_kms):
        raise CatalogError(f"{source}: peculiar_velocity_kms={peculiar_velocity_kms!r} must be finite and >= 0")

    reasons: dict[str, np.ndarray] = {r: np.zeros(n, dtype=bool) for r in REJECTION_REASONS}
    vals: dict[str, np.ndarray] = {}
    for key in ("ra_deg", "dec_deg", "distance_mpc", "distance_err_mpc", "redshift", "redshift_err", "weight",
                "mag", "radius_arcsec"):
        if key in present:
            v, bad = _parse_numeric(present[key], n, colmap.name(key), source)
            vals[key] = v
            reasons["not_numeric"] |= bad
    notes: dict[str, object] = {"peculiar_velocity_kms": float(peculiar_velocity_kms)}

    if "id" in present:
        gid, id_missing = _parse_id(present["id"], n, colmap.name("id"), source)
        reasons["bad_id"] |= id_missing
        notes["id"] = "column"
    else:
        gid = np.arange(n, dtype=np.int64)
        notes["id"] = "row number"

    ra, dec = vals["ra_deg"], vals["dec_deg"]
    with np.errstate(invalid="ignore"):
        reasons["bad_position"] |= ~(np.isfinite(ra) & (ra >= 0) & (ra <= 360))
        reasons["bad_position"] |= ~(np.isfinite(dec) & (dec >= -90) & (dec <= 90))
    if np.any(ra == 360.0):
        ra = np.where(ra == 360.0, 0.0, ra)

    dist = vals.get("distance_mpc", np.full(n, np.nan))
    derr = vals.get("distance_err_mpc", np.full(n, np.nan))
    has_d = ~np.isnan(dist)
    with np.errstate(invalid="ignore"):
        reasons["bad_distance"] |= has_d & ~(np.isfinite(dist) & (dist > 0))
        reasons["bad_distance"] |= has_d & (derr < 0) | has_d & np.isinf(derr)
    no_err = has_d & np.isnan(derr)
    derr = np.where(np.isnan(derr), 0.0, derr)

    z = vals.get("redshift", np.full(n, np.nan))
    zerr = vals.get("redshift_err", np.full(n, np.nan))
    use_z = ~has_d & ~np.isnan(z)
    with np.errstate(invalid="ignore"):
        reasons["bad_redshift"] |= use_z & ~(np.isfinite(z) & (z > 0) & (z <= CATALOG_Z_MAX))
        reasons["bad_redshift"] |= use_z & ((zerr < 0) | np.isinf(zerr))
    reasons["no_distance"] |= ~has_d & np.isnan(z)
    need_z = np.flatnonzero(use_z & ~reasons["bad_redshift"])
    if need_z.size:
        table_z = distances or planck18_table()
        dz, dzerr = table_z.distance_from_redshift(z[need_z], zerr[need_z], peculiar_velocity_kms=peculiar_velocity_kms)
        dist = dist.copy() if "distance_mpc" in vals else dist
        dist[need_z] = dz
        derr[need_z] = dzerr

    if "weight" in present:
        w = vals["weight"]
        with np.errstate(invalid="ignore"):
            reasons["bad_weight"] |= ~(np.isfinite(w) & (w >= 0))
        notes["weight"] = "column"
    else:
        w = np.ones(n)
        notes["weight"] = "uniform"
    if "radius_arcsec" in present:
        rad = vals["radius_arcsec"]
        with np.errstate(invalid="ignore"):
            reasons["bad_radius"] |= (rad < 0) | np.isinf(rad)

    # Count each row once, under the first rule it breaks.
    rejected_any = np.zeros(n, dtype=bool)
    first: dict[str, np.ndarray] = {}
    for r in REJECTION_REASONS:
        if r == "duplicate_id":
            continue
        first[r] = reasons[r] & ~rejected_any
        rejected_any |= reasons[r]
    ok_rows = np.flatnonzero(~rejected_any)
    if ok_rows.size:
        _, first_pos = np.unique(gid[ok_rows], return_index=True)
        keep = np.zeros(ok_rows.size, dtype=bool)
        keep[first_pos] = True
        dup_rows = ok_rows[~keep]
        first["duplicate_id"] = np.zeros(n, dtype=bool)
        first["duplicate_id"][dup_rows] = True
        ok_rows = ok_rows[keep]
    counts = {r: int(m.sum()) for r, m in first.items() if m.any()}
    examples = {r: np.flatnonzero(first[r])[:_EXAMPLES].tolist() for r in counts}
    notes["from_redshift"] = int(np.sum(use_z[ok_rows]))
    notes["distance_without_error"] = int(np.sum(no_err[ok_rows]))
    report = LoadReport(source, n, int(ok_rows.size), counts, examples, notes)
    if ok_rows.size == 0:
        detail = "; ".join(f"{c} {REJECTION_REASONS[r]}" for r, c in counts.items())
        raise CatalogError(f"{source}: no usable galaxies among {n} rows ({detail})")
    everyone = ok_rows.size == n

    def pick(a):
        # Catalogues are large: when every row is accepted, arrays we computed are used as they are;
        # only views of the caller's table are copied (the caller may change the table later).
        if not everyone:
            return _readonly(a[ok_rows])
        return _readonly(a if a.flags.owndata else np.array(a, copy=True))

    cat = Catalog(
        galaxy_id=pick(gid),
        ra_deg=pick(ra),
        dec_deg=pick(dec),
        distance_mpc=pick(dist),
        distance_err_mpc=pick(derr),
        weight=pick(w),
        row=_readonly(ok_rows.astype(np.int64)),
        from_redshift=pick(use_z),
        mag=pick(vals["mag"]) if "mag" in vals else None,
        radius_arcsec=pick(vals["radius_arcsec"]) if "radius_arcsec" in vals else None,
    )
    return cat, report
