"""The packaged default classes (``matcher/data/default.yaml``, a copy of ``config/default.yaml``)."""

from __future__ import annotations

from pathlib import Path

from matcher.coincidence.classes import CounterpartClass, load_classes_file

__all__ = ["default_config_path", "default_classes"]


def default_config_path() -> Path:
    """Path of the configuration shipped inside the package."""
    return Path(__file__).resolve().parent.parent / "data" / "default.yaml"


def default_classes() -> dict[str, CounterpartClass]:
    """The ``classes:`` of the packaged default configuration."""
    return load_classes_file(default_config_path())
