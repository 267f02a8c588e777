"""Reading the configuration for tuning: its ``classes:`` and ``tuning:`` sections (I/O edge).

Other sections of the file (sources, sinks, store, ...) belong to the service
and are ignored here. Without a ``classes:`` section the packaged default
classes are used; without ``tuning:`` every tuning default applies.
"""

from __future__ import annotations

from pathlib import Path
from typing import Mapping

from matcher.coincidence import default_classes, parse_classes
from matcher.coincidence.classes import CounterpartClass
from matcher.errors import ConfigError
from matcher.tune.settings import TuningSettings, parse_tuning

__all__ = ["load_tuning_config"]


def load_tuning_config(path=None) -> tuple[dict[str, CounterpartClass], TuningSettings]:
    """``(classes, tuning settings)`` from a YAML file, or the packaged defaults when ``path`` is None.

    Raises
    ------
    ConfigError
        Unreadable file, invalid YAML, or an invalid ``classes``/``tuning`` value (naming the key path).
    """
    if path is None:
        classes = default_classes()
        return classes, parse_tuning(None, classes)
    from matcher.keycheck import read_yaml_file

    p = Path(path)
    doc = read_yaml_file(p)
    if doc is None:
        doc = {}
    if not isinstance(doc, Mapping):
        raise ConfigError(str(p), f"must be a mapping of sections, got {type(doc).__name__}")
    classes = (parse_classes(doc["classes"], path=f"{p}: classes") if doc.get("classes") is not None
               else default_classes())
    return classes, parse_tuning(doc.get("tuning"), classes, path=f"{p}: tuning")
