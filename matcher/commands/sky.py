"""``matcher sky summary|at``: look at a localization map.

JSON keys are a contract other tools rely on:

* ``summary``: ``source``, ``pixels``, ``max_order``, ``area_deg2`` (keyed by
  level as a string, e.g. ``"0.9"``), ``distance_mpc`` ``{mean, std}`` when
  the map has distance layers, ``meta``.
* ``at``: ``ra_deg``, ``dec_deg``, ``density_per_sr``, ``credible_level``,
  ``searched_area_deg2``; with an error radius also ``err_deg`` and
  ``overlap_per_sr``; with distance layers ``distance_mpc`` ``{mean, std}``
  along the line of sight. Several positions (``--positions FILE``) give a
  JSON array of such objects.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np

from matcher.commands._output import console, print_json
from matcher.errors import InputError

__all__ = ["register", "parse_levels", "read_positions"]


def register(sub) -> None:
    parser = sub.add_parser("sky", help="inspect a HEALPix localization map (FITS, flat or multi-order)")
    sky_sub = parser.add_subparsers(dest="sky_command", metavar="ACTION")
    sky_sub.required = True

    p = sky_sub.add_parser("summary", help="credible areas, pixel count and distance of a map")
    p.add_argument("map", help="localization FITS file (optionally gzip-compressed)")
    p.add_argument("--levels", default="0.5,0.9", help="comma-separated credible levels (default: 0.5,0.9)")
    p.add_argument("--json", action="store_true", help="print JSON for programs")
    p.set_defaults(func=_summary)

    p = sky_sub.add_parser("at", help="density, credible level and searched area at positions")
    p.add_argument("map", help="localization FITS file (optionally gzip-compressed)")
    p.add_argument("--ra", type=float, help="right ascension, degrees")
    p.add_argument("--dec", type=float, help="declination, degrees")
    p.add_argument("--err-deg", type=float, default=None, help="1-sigma circular position error, degrees")
    p.add_argument(
        "--positions",
        help="file of positions: CSV with columns ra_deg,dec_deg[,err_deg] or JSON Lines with those keys",
    )
    p.add_argument("--json", action="store_true", help="print JSON for programs")
    p.set_defaults(func=_at)


def parse_levels(text: str) -> list[float]:
    """Parse ``"0.5,0.9"`` into floats in (0, 1]."""
    out = []
    for part in text.split(","):
        part = part.strip()
        if not part:
            continue
        try:
            v = float(part)
        except ValueError:
            raise InputError(f"--levels: {part!r} is not a number") from None
        if not 0.0 < v <= 1.0:
            raise InputError(f"--levels: {v} is outside (0, 1]")
        out.append(v)
    if not out:
        raise InputError("--levels: give at least one level, e.g. 0.5,0.9")
    return out


def _level_key(v: float) -> str:
    return repr(float(v))


def _summary(args) -> int:
    from matcher.sky import read_skymap

    levels = parse_levels(args.levels)
    m = read_skymap(args.map)
    areas = m.credible_areas(levels)
    out = {
        "source": str(args.map),
        "pixels": m.npix,
        "max_order": m.max_order,
        "area_deg2": {_level_key(lv): float(a) for lv, a in zip(levels, areas)},
        "meta": {k: v for k, v in m.meta.items()},
    }
    if m.has_distance:
        mean, std = m.distance_marginal()
        out["distance_mpc"] = {"mean": mean, "std": std}
    if args.json:
        print_json(out)
        return 0
    from rich.table import Table

    t = Table(title=f"Localization {args.map}", show_header=True, header_style="bold")
    t.add_column("quantity")
    t.add_column("value", justify="right")
    t.add_row("pixels", f"{m.npix:,}")
    t.add_row("finest order (NSIDE)", f"{m.max_order} ({1 << m.max_order})")
    for k, a in out["area_deg2"].items():
        t.add_row(f"{float(k):.0%} credible area", f"{a:,.1f} deg²")
    if "distance_mpc" in out:
        d = out["distance_mpc"]
        t.add_row("distance (sky-marginal)", f"{d['mean']:,.1f} ± {d['std']:,.1f} Mpc")
    for k, v in out["meta"].items():
        t.add_row(k, str(v))
    console().print(t)
    return 0


def read_positions(path: str):
    """Read positions from CSV (header ra_deg,dec_deg[,err_deg]) or JSON Lines."""
    p = Path(path)
    try:
        text = p.read_text()
    except OSError as exc:
        raise InputError(f"{path}: cannot read positions: {exc.strerror or exc}") from None
    rows = []
    stripped = text.lstrip()
    if stripped.startswith("{"):
        for n, line in enumerate(text.splitlines(), 1):
            if not line.strip():
                continue
            try:
                rows.append(json.loads(line))
            except json.JSONDecodeError as exc:
                raise InputError(f"{path}:{n}: not JSON: {exc.msg}") from None
    else:
        reader = csv.DictReader(text.splitlines())
        if not reader.fieldnames or not {"ra_deg", "dec_deg"} <= set(reader.fieldnames):
            raise InputError(f"{path}: CSV needs a header with ra_deg,dec_deg[,err_deg] (found {reader.fieldnames})")
        rows = list(reader)
    ra, dec, err = [], [], []
    for n, r in enumerate(rows, 1):
        try:
            ra.append(float(r["ra_deg"]))
            dec.append(float(r["dec_deg"]))
            e = r.get("err_deg")
            err.append(float(e) if e not in (None, "") else 0.0)
        except (KeyError, TypeError, ValueError):
            raise InputError(f"{path}: row {n} needs numeric ra_deg and dec_deg (err_deg optional)") from None
    if not ra:
        raise InputError(f"{path}: no positions")
    return np.array(ra), np.array(dec), np.array(err)


def _at(args) -> int:
    from matcher.sky import read_skymap
    from matcher.sky.coords import check_radec

    if args.positions:
        if args.ra is not None or args.dec is not None:
            raise InputError("give either --ra/--dec or --positions, not both")
        ra, dec, err = read_positions(args.positions)
        with_err = bool(np.any(err > 0)) or args.err_deg is not None
        if args.err_deg is not None:
            err = np.where(err > 0, err, args.err_deg)
        single = False
    else:
        if args.ra is None or args.dec is None:
            raise InputError("give --ra and --dec (degrees), or --positions FILE")
        ra, dec = np.array([args.ra]), np.array([args.dec])
        err = np.array([args.err_deg or 0.0])
        with_err = args.err_deg is not None
        single = True
    check_radec(ra, dec)
    if args.err_deg is not None and not (np.isfinite(args.err_deg) and 0 <= args.err_deg <= 90):
        raise InputError(f"--err-deg={args.err_deg} must be between 0 and 90 degrees")
    m = read_skymap(args.map)
    dens, level, area = m.searched(ra, dec)
    rows = []
    overlap = m.overlap_gaussian(ra, dec, err) if with_err else None
    if m.has_distance:
        dmean, dstd = m.distance_along(ra, dec)
    for i in range(ra.size):
        row = {
            "ra_deg": float(ra[i]),
            "dec_deg": float(dec[i]),
            "density_per_sr": float(dens[i]),
            "credible_level": float(level[i]),
            "searched_area_deg2": float(area[i]),
        }
        if with_err:
            row["err_deg"] = float(err[i])
            row["overlap_per_sr"] = float(overlap[i])
        if m.has_distance:
            row["distance_mpc"] = {"mean": float(dmean[i]), "std": float(dstd[i])}
        rows.append(row)
    if args.json:
        print_json(rows[0] if single else rows)
        return 0
    from rich.table import Table

    if single:
        r = rows[0]
        t = Table(title=f"Position on {args.map}", header_style="bold")
        t.add_column("quantity")
        t.add_column("value", justify="right")
        t.add_row("RA, Dec (deg)", f"{r['ra_deg']:.5f}, {r['dec_deg']:.5f}")
        t.add_row("density", f"{r['density_per_sr']:.5g} sr⁻¹")
        t.add_row("credible level (searched probability)", f"{r['credible_level']:.5f}")
        t.add_row("searched area", f"{r['searched_area_deg2']:,.3f} deg²")
        if with_err:
            t.add_row(f"overlap with σ = {r['err_deg']:g}° error", f"{r['overlap_per_sr']:.5g} sr⁻¹")
        if m.has_distance:
            d = r["distance_mpc"]
            t.add_row("distance along the line of sight",
                      "—" if not np.isfinite(d["mean"]) else f"{d['mean']:.1f} ± {d['std']:.1f} Mpc")
        console().print(t)
        return 0
    t = Table(title=f"Positions on {args.map}", header_style="bold")
    for col in ("RA", "Dec", "ρ (sr⁻¹)", "level", "area (deg²)"):
        t.add_column(col, justify="right")
    if with_err:
        t.add_column("σ (deg)", justify="right")
        t.add_column("overlap (sr⁻¹)", justify="right")
    if m.has_distance:
        t.add_column("D (Mpc)", justify="right")
    for r in rows:
        cells = [f"{r['ra_deg']:.3f}", f"{r['dec_deg']:.3f}", f"{r['density_per_sr']:.3g}",
                 f"{r['credible_level']:.3f}", f"{r['searched_area_deg2']:,.1f}"]
        if with_err:
            cells += [f"{r['err_deg']:.3g}", f"{r['overlap_per_sr']:.3g}"]
        if m.has_distance:
            d = r["distance_mpc"]
            cells.append("—" if not np.isfinite(d["mean"]) else f"{d['mean']:.0f}±{d['std']:.0f}")
        t.add_row(*cells)
    console().print(t)
    return 0
