"""The mapping from our galaxy-catalogue column names to a file's column names.

Our names (the defaults, used when a file already follows them):

==================  ===========================================================
``id``              galaxy identifier (integer or text); row number if absent
``ra_deg``          right ascension, deg (ICRS)
``dec_deg``         declination, deg
``distance_mpc``    luminosity distance, Mpc
``distance_err_mpc``  1σ luminosity-distance error, Mpc
``redshift``        redshift, used for a distance where ``distance_mpc`` is missing
``redshift_err``    1σ redshift error
``weight``          host-prior weight: a luminosity or stellar-mass proxy (≥ 0)
``mag``             apparent magnitude (for the chance-coincidence probability)
``radius_arcsec``   half-light radius, arcsec (for the chance-coincidence probability)
==================  ===========================================================

``ra_deg`` and ``dec_deg`` are required, and at least one of ``distance_mpc``
and ``redshift``; the others are optional. A column the user maps explicitly
must exist in the file.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

from matcher.errors import ConfigError

__all__ = ["ColumnMap", "COLUMN_KEYS", "REQUIRED_KEYS"]

#: Our column names, in the order they are documented.
COLUMN_KEYS = (
    "id",
    "ra_deg",
    "dec_deg",
    "distance_mpc",
    "distance_err_mpc",
    "redshift",
    "redshift_err",
    "weight",
    "mag",
    "radius_arcsec",
)
#: Columns a catalogue must have (besides a distance or a redshift).
REQUIRED_KEYS = ("ra_deg", "dec_deg")


@dataclass(frozen=True)
class ColumnMap:
    """Our column name → the file's column name, for the columns the user mapped.

    Unmapped keys default to their own name; :meth:`name` gives the file
    column for a key and :meth:`explicit` tells whether the user named it
    (an explicitly mapped column must exist).

    Examples
    --------
    >>> ColumnMap.from_mapping({"ra_deg": "RAJ2000", "dec_deg": "DEJ2000"}).name("ra_deg")
    'RAJ2000'
    """

    mapping: Mapping[str, str] = field(default_factory=dict)

    @classmethod
    def from_mapping(cls, mapping: Mapping[str, str] | None, *, path: str = "catalog.columns") -> "ColumnMap":
        """Validate a user mapping (from the configuration or the command line).

        Raises
        ------
        ConfigError
            An unknown key, a non-string or empty name, or two keys mapped to one column.
        """
        mapping = dict(mapping or {})
        for key, value in mapping.items():
            if key not in COLUMN_KEYS:
                raise ConfigError(f"{path}.{key}", f"unknown column key; known keys: {', '.join(COLUMN_KEYS)}")
            if not isinstance(value, str) or not value.strip():
                raise ConfigError(f"{path}.{key}", f"must be a non-empty column name, got {value!r}")
        names = [v for v in mapping.values()]
        dupes = sorted({v for v in names if names.count(v) > 1})
        if dupes:
            keys = [k for k, v in mapping.items() if v in dupes]
            raise ConfigError(path, f"keys {', '.join(keys)} are all mapped to column {dupes[0]!r}")
        return cls({k: v.strip() for k, v in mapping.items()})

    @classmethod
    def from_pairs(cls, pairs, *, path: str = "--column") -> "ColumnMap":
        """Build from ``KEY=NAME`` strings (the command line's ``--column`` options)."""
        mapping = {}
        for text in pairs or ():
            key, sep, value = str(text).partition("=")
            if not sep:
                raise ConfigError(path, f"{text!r} is not KEY=NAME (for example ra_deg=RAJ2000)")
            mapping[key.strip()] = value
        return cls.from_mapping(mapping, path=path)

    def name(self, key: str) -> str:
        """The file's column name for our ``key``."""
        return self.mapping.get(key, key)

    def explicit(self, key: str) -> bool:
        """Whether the user mapped ``key`` (then the column must exist)."""
        return key in self.mapping

    def to_dict(self) -> dict[str, str]:
        """The full mapping, every key included (for the index header)."""
        return {k: self.name(k) for k in COLUMN_KEYS}
