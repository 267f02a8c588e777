"""Host galaxies: catalogue loading, the HEALPix index, 3D host ranking, hosts of a transient.

Typical use in a service (load the index once, rank per GW revision, look up
hosts per transient)::

    from matcher.catalog import open_galaxy_index, rank_hosts, hosts_for_report

    index = open_galaxy_index("galaxies.fits")        # or the index directory; memory-mapped
    ranking = rank_hosts(skymap, index)                # per GW revision (SkyMap with distance layers)
    ranking.to_dict(20)                                # {"p_outside_catalog": ..., "galaxies": [...]}
    hosts = hosts_for_report(index, report, skymap=skymap, ranking=ranking)
    hosts.host_distance()                              # (distance_mpc, distance_err_mpc) or None

Modules: :mod:`.columns` (column map), :mod:`.cosmology` (Planck18 tables),
:mod:`.catalog` (validation), :mod:`.index` (sorting and slices),
:mod:`.ranking` (``P(host = i)``), :mod:`.completeness` (``p_outside_catalog``),
:mod:`.chance` (chance coincidence), :mod:`.association` (hosts of a
transient), :mod:`.synthetic` (invented catalogues) — all pure — and the I/O
edge: :mod:`.tableio` (reading catalogue files) and :mod:`.indexio`
(index directories).
"""

from matcher.catalog.association import (
    DEFAULT_MAX_OFFSET_KPC,
    DEFAULT_MAX_P_CC,
    HostCandidate,
    TransientHosts,
    hosts_for_report,
    hosts_for_transient,
)
from matcher.catalog.catalog import (
    DEFAULT_PECULIAR_VELOCITY_KMS,
    REJECTION_REASONS,
    Catalog,
    LoadReport,
    catalog_from_table,
)
from matcher.catalog.chance import chance_coincidence, effective_radius_arcsec, number_density_berger
from matcher.catalog.columns import COLUMN_KEYS, ColumnMap
from matcher.catalog.completeness import (
    Completeness,
    SchechterCompleteness,
    TabulatedCompleteness,
    completeness_from_dict,
    p_outside_catalog,
)
from matcher.cosmology import DistanceTable, planck18_table
from matcher.catalog.index import INDEX_ORDER, GalaxyIndex, IndexHeader, build_index, fine_pixels
from matcher.catalog.indexio import (
    StaleIndexError,
    default_index_path,
    index_catalog_file,
    is_index,
    load_index,
    open_galaxy_index,
    write_index,
)
from matcher.catalog.ranking import DEFAULT_FRACTION, HostRanking, host_weight, rank_hosts
from matcher.catalog.synthetic import synthetic_catalog
from matcher.catalog.tableio import read_catalog, read_completeness_table, read_table

__all__ = [
    # loading
    "ColumnMap",
    "COLUMN_KEYS",
    "Catalog",
    "LoadReport",
    "REJECTION_REASONS",
    "DEFAULT_PECULIAR_VELOCITY_KMS",
    "catalog_from_table",
    "read_catalog",
    "read_table",
    "DistanceTable",
    "planck18_table",
    # index
    "INDEX_ORDER",
    "GalaxyIndex",
    "IndexHeader",
    "build_index",
    "fine_pixels",
    "index_catalog_file",
    "write_index",
    "load_index",
    "open_galaxy_index",
    "default_index_path",
    "is_index",
    "StaleIndexError",
    # ranking
    "DEFAULT_FRACTION",
    "HostRanking",
    "host_weight",
    "rank_hosts",
    "Completeness",
    "SchechterCompleteness",
    "TabulatedCompleteness",
    "completeness_from_dict",
    "p_outside_catalog",
    "read_completeness_table",
    # transients
    "HostCandidate",
    "TransientHosts",
    "hosts_for_transient",
    "hosts_for_report",
    "DEFAULT_MAX_OFFSET_KPC",
    "DEFAULT_MAX_P_CC",
    "chance_coincidence",
    "effective_radius_arcsec",
    "number_density_berger",
    # invented data
    "synthetic_catalog",
]
