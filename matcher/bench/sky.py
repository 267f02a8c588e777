"""``matcher bench sky``: map reading, credible regions and position lookup.

Figures (medians of repeats, one run):

* read a ~100k-pixel multi-order map with distance layers from FITS bytes and
  compute its 50%/90% areas — beside astropy's plain ``Table.read`` of the same
  bytes (the floor any FITS reader pays);
* density at 1,000,000 positions — beside the straightforward way: flatten the
  map to its finest order, then ``healpy.ang2pix`` and index. The ratio is
  printed both with the flattening (what the straightforward way costs per map)
  and without it (the per-query part alone).
"""

from __future__ import annotations

import io

import numpy as np

from matcher.bench._timing import median_time, print_row

__all__ = ["register", "run"]


def register(sub) -> None:
    p = sub.add_parser("sky", help="map reading, credible regions and 1M-position lookup")
    p.add_argument("--positions", type=int, default=1_000_000, help="positions to look up (default 1,000,000)")
    p.add_argument("--repeat", type=int, default=5, help="repeats per figure (median reported)")
    p.set_defaults(func=run)


def run(args) -> int:
    import healpy as hp
    from astropy.table import Table

    from matcher.sky import Blob, kappa_for_area, moc_fits_bytes, skymap_from_bytes, synthetic_skymap
    from matcher.sky.coords import radec_to_thetaphi

    print("matcher bench sky")
    comps = [Blob(150.0, -30.0, kappa_for_area(40.0)), Blob(175.0, -20.0, kappa_for_area(400.0), weight=0.6)]
    m = synthetic_skymap(comps, distance=(180.0, 50.0), max_order=11, pixel_prob=2.6e-5)
    data = moc_fits_bytes(m)
    print_row("map pixels / finest order / FITS bytes", f"{m.npix:,} / {m.max_order} / {len(data):,}")

    def read_and_regions():
        mm = skymap_from_bytes(data)
        mm.credible_areas([0.5, 0.9])
        return mm

    def plain_read():
        Table.read(io.BytesIO(data), format="fits")

    t_read = median_time(read_and_regions, args.repeat)
    t_plain = median_time(plain_read, args.repeat)
    print_row("read + 50%/90% credible areas (target < 0.2 s)", f"{t_read:.4f} s")
    print_row("baseline: astropy Table.read of the same bytes", f"{t_plain:.4f} s")
    print_row("ratio read+regions / plain read", f"{t_read / t_plain:.2f}")

    rng = np.random.default_rng(1)
    n = args.positions
    ra = rng.uniform(0, 360, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    mm = read_and_regions()
    mm.density(ra[:10], dec[:10])  # build the lookup table once, as a service would
    t_ours = median_time(lambda: mm.density(ra, dec), args.repeat)

    nside = 1 << mm.max_order
    flat_holder = {}

    def flatten():
        flat_holder["flat"] = np.repeat(mm.probdensity, 4 ** (mm.max_order - mm.order))

    def naive_query():
        theta, phi = radec_to_thetaphi(ra, dec)
        return flat_holder["flat"][hp.ang2pix(nside, theta, phi, nest=True)]

    t_flat = median_time(flatten, max(1, args.repeat // 2))
    t_naive = median_time(naive_query, args.repeat)
    same = np.array_equal(naive_query(), mm.density(ra, dec))
    print_row(f"lookup of {n:,} positions (ours)", f"{t_ours:.4f} s  ({n / t_ours / 1e6:.1f} M/s)")
    print_row(f"baseline: flatten to order {mm.max_order} ({12 * nside * nside:,} pixels)", f"{t_flat:.4f} s")
    print_row("baseline: healpy.ang2pix + index on the flat map", f"{t_naive:.4f} s")
    print_row("results identical to the baseline", "yes" if same else "NO")
    print_row("ratio baseline (flatten + ang2pix) / ours (target >= 5)", f"{(t_flat + t_naive) / t_ours:.1f}x")
    print_row("ratio baseline (ang2pix only, map already flat) / ours", f"{t_naive / t_ours:.2f}x")
    return 0 if same else 1
