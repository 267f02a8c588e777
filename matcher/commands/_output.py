"""Shared output helpers for commands: JSON for programs, rich tables for people."""

from __future__ import annotations

import json
import math
import sys
from typing import Any

import numpy as np

__all__ = ["print_json", "to_jsonable", "console"]


def to_jsonable(value: Any) -> Any:
    """Convert numpy scalars/arrays and non-finite floats to plain JSON values.

    Non-finite floats become ``None`` (JSON has no NaN or Infinity).
    """
    if isinstance(value, dict):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [to_jsonable(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def print_json(value: Any, stream=None) -> None:
    stream = stream or sys.stdout
    json.dump(to_jsonable(value), stream, indent=2, allow_nan=False)
    stream.write("\n")


def console():
    from rich.console import Console

    return Console()
