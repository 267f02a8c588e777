"""Small validators for configuration mappings; every error names the key path.

Used by :mod:`matcher.config` and by the option parsers of sources, sinks and codecs.
"""

from __future__ import annotations

import difflib
import math
from pathlib import Path
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping

from matcher.errors import ConfigError

__all__ = ["read_yaml_file", "ParseContext", "check_keys", "get_str", "get_number", "get_int", "get_bool", "get_path", "get_str_list", "sub"]


@dataclass(frozen=True)
class ParseContext:
    """What an option parser may need besides its own mapping.

    Attributes
    ----------
    base_dir : Path
        Folder that relative paths resolve against (the configuration file's folder).
    secrets : mapping
        Secret name → :class:`matcher.config.SecretRef`, for options that refer to a secret by name.
    """

    base_dir: Path
    secrets: Mapping[str, Any] = field(default_factory=dict)

    def secret(self, name: Any, keypath: str):
        """The secret called ``name``; ``ConfigError`` at ``keypath`` if ``secrets`` does not define it."""
        if not isinstance(name, str) or name not in self.secrets:
            known = ", ".join(sorted(self.secrets)) or "none defined"
            raise ConfigError(keypath, f"refers to secret {name!r}, which secrets does not define ({known})")
        return self.secrets[name]


def sub(keypath: str, key: str) -> str:
    return f"{keypath}.{key}" if keypath else key


def check_keys(raw: Any, known: Iterable[str], keypath: str, *, required: Iterable[str] = ()) -> Mapping[str, Any]:
    """``raw`` must be a mapping with only ``known`` keys (and all ``required`` ones)."""
    if raw is None:
        raw = {}
    if not isinstance(raw, Mapping):
        raise ConfigError(keypath or "(top level)", f"must be a mapping, got {type(raw).__name__}")
    known = list(known)
    for key in raw:
        if not isinstance(key, str):
            raise ConfigError(keypath or "(top level)", f"keys must be strings, got {key!r}")
        if key not in known:
            close = difflib.get_close_matches(key, known, n=1)
            hint = f"; did you mean {close[0]!r}?" if close else f" (known: {', '.join(sorted(known))})"
            raise ConfigError(sub(keypath, key), f"unknown key{hint}")
    for key in required:
        if key not in raw:
            raise ConfigError(sub(keypath, key), "is required")
    return raw


def get_str(raw: Mapping, key: str, keypath: str, default: str | None = None, *,
            choices: Iterable[str] | None = None) -> str | None:
    v = raw.get(key, default)
    if v is None:
        return None
    if not isinstance(v, str) or not v.strip():
        raise ConfigError(sub(keypath, key), f"must be a non-empty string, got {v!r}")
    if choices is not None and v not in choices:
        raise ConfigError(sub(keypath, key), f"must be one of {', '.join(choices)}, got {v!r}")
    return v


def get_number(raw: Mapping, key: str, keypath: str, default: float | None = None, *,
               lo: float | None = None, hi: float | None = None, lo_open: bool = False) -> float | None:
    v = raw.get(key, default)
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
        raise ConfigError(sub(keypath, key), f"must be a finite number, got {v!r}")
    v = float(v)
    if lo is not None and (v <= lo if lo_open else v < lo):
        raise ConfigError(sub(keypath, key), f"must be {'>' if lo_open else '>='} {lo:g}, got {v:g}")
    if hi is not None and v > hi:
        raise ConfigError(sub(keypath, key), f"must be <= {hi:g}, got {v:g}")
    return v


def get_int(raw: Mapping, key: str, keypath: str, default: int | None = None, *, lo: int | None = None) -> int | None:
    v = raw.get(key, default)
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, int):
        raise ConfigError(sub(keypath, key), f"must be an integer, got {v!r}")
    if lo is not None and v < lo:
        raise ConfigError(sub(keypath, key), f"must be >= {lo}, got {v}")
    return v


def get_bool(raw: Mapping, key: str, keypath: str, default: bool) -> bool:
    v = raw.get(key, default)
    if not isinstance(v, bool):
        raise ConfigError(sub(keypath, key), f"must be true or false, got {v!r}")
    return v


def get_path(raw: Mapping, key: str, keypath: str, base_dir: Path, default: str | None = None) -> Path | None:
    """A path; relative ones resolve against ``base_dir`` (``~`` expanded)."""
    v = get_str(raw, key, keypath, default)
    if v is None:
        return None
    p = Path(v).expanduser()
    return p if p.is_absolute() else (Path(base_dir) / p)


def get_str_list(raw: Mapping, key: str, keypath: str, default=()) -> tuple[str, ...]:
    v = raw.get(key, list(default))
    if v is None:
        return ()
    if isinstance(v, str) or not isinstance(v, (list, tuple)):
        raise ConfigError(sub(keypath, key), f"must be a list of strings, got {type(v).__name__}")
    for i, s in enumerate(v):
        if not isinstance(s, str) or not s:
            raise ConfigError(f"{sub(keypath, key)}[{i}]", f"must be a non-empty string, got {s!r}")
    return tuple(v)


def read_yaml_file(path) -> Any:
    """The document of a YAML file (``yaml.safe_load``); errors name the file, and the line for bad YAML.

    Raises
    ------
    ConfigError
        The file cannot be read, is not UTF-8, or is not valid YAML.
    """
    import yaml

    p = Path(path).expanduser()
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(str(p), f"cannot read: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise ConfigError(str(p), "is not UTF-8 text") from None
    try:
        return yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1} column {mark.column + 1}" if mark is not None else ""
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise ConfigError(str(p), f"is not valid YAML{where}: {problem}") from None
