"""The configuration: one frozen, typed object read from YAML and validated.

Every error is a :class:`~matcher.errors.ConfigError` naming the key path
(``sources.survey.codec.fields.ra_deg.unit``) and the problem; unknown keys are
errors too (with a "did you mean"). Relative paths resolve against the folder
of the configuration file; the store path resolves against ``state_dir``.

Sections::

    state_dir: state                 # relative to the config file; default ./state (current folder)
    store: {path: matcher.sqlite}    # or just a path; relative to state_dir
    sources:                         # by name; kind inbox | archive (kafka later)
      NAME: {kind: inbox, path: inbox, codec: native, pattern: "*.json"}
      NAME: {kind: archive, path: alerts.jsonl, speed: null}
      NAME: {kind: inbox, path: foreign, codec: {name: mapped, fields: {...}}}
    sinks:                           # by name; kind jsonl | sqlite (kafka later)
      NAME: {kind: jsonl, path: out/matches.jsonl}
      NAME: {kind: sqlite, path: out/results.sqlite}
    limits: {message_max_bytes, localization_max_bytes, url_allow_list,
             url_connect_timeout_s, url_total_timeout_s, local_roots}
    service: {batch_size, poll_timeout_s, decode_process}
    secrets:                         # values never appear in errors, logs or repr
      NAME: {env: VARIABLE}          # or {file: PATH}, a file only its owner can read
    classes: {...}                   # counterpart classes (matcher.coincidence.parse_classes)
    catalog: {...}                   # galaxy catalogue settings, kept as given for matcher.catalog
    reports: {...}                   # per-event report writers, kept as given for matcher.service
    tuning: {...}                    # offline window tuning, kept as given for matcher.tune

The ``classes`` section is parsed by :func:`matcher.coincidence.parse_classes` when
the configuration is loaded (so a bad class fails early); without one,
:meth:`Config.classes` returns the packaged defaults.
"""

from __future__ import annotations

import os
import stat
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Mapping

from matcher.errors import ConfigError
from matcher.keycheck import (
    ParseContext,
    read_yaml_file,
    check_keys,
    get_bool,
    get_int,
    get_number,
    get_path,
    get_str,
    get_str_list,
)
from matcher.streams.codecs import DEFAULT_MAX_MESSAGE_BYTES, Codec, make_codec
from matcher.streams.localization import DEFAULT_LOCALIZATION_MAX_BYTES, LocalizationLimits
from matcher.streams.sinks import Sink, build_sink, sink_kind
from matcher.streams.sources import Source, build_source, source_kind

__all__ = [
    "Config",
    "SourceConfig",
    "SinkConfig",
    "CodecSpec",
    "Limits",
    "ServiceSettings",
    "SecretRef",
    "load_config",
    "config_from_mapping",
    "freeze",
]

_TOP_KEYS = ("state_dir", "store", "sources", "sinks", "limits", "service", "secrets", "classes", "catalog",
             "reports", "tuning")


def freeze(value: Any) -> Any:
    """A read-only deep copy: mappings become ``MappingProxyType``, lists become tuples."""
    if isinstance(value, Mapping):
        return MappingProxyType({k: freeze(v) for k, v in value.items()})
    if isinstance(value, (list, tuple)):
        return tuple(freeze(v) for v in value)
    return value


def thaw(value: Any) -> Any:
    """Plain dicts and lists again (for parsers that expect them)."""
    if isinstance(value, Mapping):
        return {k: thaw(v) for k, v in value.items()}
    if isinstance(value, tuple):
        return [thaw(v) for v in value]
    return value


@dataclass(frozen=True, repr=False)
class SecretRef:
    """Where a secret is: an environment variable or a file only its owner can read.

    The value is read only by :meth:`reveal`, never stored in the configuration, and
    never shown by ``repr``/``str`` or in an error message.
    """

    name: str
    env: str | None = None
    file: Path | None = None

    def __repr__(self) -> str:
        where = f"env {self.env}" if self.env else f"file {self.file}"
        return f"SecretRef({self.name!r}, {where}, value hidden)"

    __str__ = __repr__

    def check(self) -> None:
        """Raise ``ConfigError`` if the secret is not available (unset variable, unsafe or missing file)."""
        kp = f"secrets.{self.name}"
        if self.env is not None:
            if os.environ.get(self.env) in (None, ""):
                raise ConfigError(f"{kp}.env", f"environment variable {self.env} is not set")
            return
        try:
            st = os.stat(self.file)
        except OSError as exc:
            raise ConfigError(f"{kp}.file", f"cannot read {self.file}: {exc.strerror or exc}") from None
        if not stat.S_ISREG(st.st_mode):
            raise ConfigError(f"{kp}.file", f"{self.file} is not a regular file")
        if st.st_mode & 0o077:
            raise ConfigError(f"{kp}.file", f"{self.file} has mode {stat.S_IMODE(st.st_mode):04o}: group or others "
                                            f"can access it; run chmod 600 {self.file}")
        if hasattr(os, "getuid") and st.st_uid != os.getuid():
            raise ConfigError(f"{kp}.file", f"{self.file} belongs to uid {st.st_uid}, not to this user")

    def reveal(self) -> str:
        """The secret's value (a file's content without its trailing newline)."""
        self.check()
        if self.env is not None:
            return os.environ[self.env]
        with open(self.file, encoding="utf-8") as fh:
            return fh.read().rstrip("\r\n")


@dataclass(frozen=True)
class CodecSpec:
    """A source's codec: its registry name and options (built and validated when loaded)."""

    name: str
    options: Mapping[str, Any] = field(default_factory=lambda: MappingProxyType({}))
    keypath: str = "codec"

    def build(self, max_bytes: int = DEFAULT_MAX_MESSAGE_BYTES) -> Codec:
        return make_codec(self.name, thaw(self.options), keypath=self.keypath, max_bytes=max_bytes)


@dataclass(frozen=True)
class SourceConfig:
    """``sources.NAME``: its kind, codec and the kind's own validated options."""

    name: str
    kind: str
    codec: CodecSpec
    options: Any


@dataclass(frozen=True)
class SinkConfig:
    """``sinks.NAME``: its kind and the kind's own validated options."""

    name: str
    kind: str
    options: Any


@dataclass(frozen=True)
class Limits:
    """``limits``: sizes (bytes) and timeouts (s) that protect the service from its input.

    Attributes
    ----------
    message_max_bytes : int, bytes
    localization_max_bytes : int, bytes
    url_allow_list : tuple of str
        https URL prefixes localizations may be fetched from (empty: none).
    url_connect_timeout_s, url_total_timeout_s : float, s
    local_roots : tuple of Path
        Folders, besides a message's own, that localization paths may point into.
    """

    message_max_bytes: int = DEFAULT_MAX_MESSAGE_BYTES
    localization_max_bytes: int = DEFAULT_LOCALIZATION_MAX_BYTES
    url_allow_list: tuple[str, ...] = ()
    url_connect_timeout_s: float = 10.0
    url_total_timeout_s: float = 60.0
    local_roots: tuple[Path, ...] = ()

    def localization(self) -> LocalizationLimits:
        return LocalizationLimits(self.localization_max_bytes, self.url_allow_list, self.url_connect_timeout_s,
                                  self.url_total_timeout_s, tuple(str(p) for p in self.local_roots))


@dataclass(frozen=True)
class ServiceSettings:
    """``service``: ``batch_size`` (items per transaction), ``poll_timeout_s`` (s) and
    ``decode_process`` (decode large batches on a child process: :mod:`matcher.streams.decode_ahead`)."""

    batch_size: int = 500
    poll_timeout_s: float = 1.0
    decode_process: bool = True


@dataclass(frozen=True)
class Config:
    """The whole configuration (see the module docstring). Build it with :func:`load_config`."""

    path: Path | None
    state_dir: Path
    store_path: Path
    sources: Mapping[str, SourceConfig]
    sinks: Mapping[str, SinkConfig]
    limits: Limits
    service: ServiceSettings
    secrets: Mapping[str, SecretRef]
    classes_raw: Mapping[str, Any] | None
    catalog_raw: Mapping[str, Any] | None
    _classes: Any = field(default=None, repr=False, compare=False)
    reports_raw: Mapping[str, Any] | None = None
    tuning_raw: Mapping[str, Any] | None = None

    def classes(self):
        """The counterpart classes: this file's ``classes`` section, or the packaged defaults."""
        if self._classes is not None:
            return self._classes
        from matcher.coincidence import parse_classes
        from matcher.coincidence.defaults import default_classes

        parsed = default_classes() if self.classes_raw is None else parse_classes(thaw(self.classes_raw), "classes")
        object.__setattr__(self, "_classes", MappingProxyType(dict(parsed)))
        return self._classes

    def secret(self, name: str) -> str:
        """The value of secret ``name`` (read now; never logged)."""
        if name not in self.secrets:
            raise ConfigError(f"secrets.{name}", "is not defined")
        return self.secrets[name].reveal()

    def codec(self, source: str) -> Codec:
        return self._source(source).codec.build(self.limits.message_max_bytes)

    def source(self, name: str) -> Source:
        """Build the source ``sources.NAME``."""
        sc = self._source(name)
        return build_source(sc.kind, sc.name, sc.options, max_bytes=self.limits.message_max_bytes)

    def sink(self, name: str) -> Sink:
        """Build the sink ``sinks.NAME``."""
        if name not in self.sinks:
            raise ConfigError(f"sinks.{name}", f"is not defined (defined: {', '.join(self.sinks) or 'none'})")
        sc = self.sinks[name]
        return build_sink(sc.kind, sc.name, sc.options)

    def _source(self, name: str) -> SourceConfig:
        if name not in self.sources:
            raise ConfigError(f"sources.{name}", f"is not defined (defined: {', '.join(self.sources) or 'none'})")
        return self.sources[name]


def _name_ok(name: Any, keypath: str) -> str:
    if not isinstance(name, str) or not name or not all(c.isalnum() or c in "_-" for c in name):
        raise ConfigError(keypath, f"names must be letters, digits, '_' or '-', got {name!r}")
    return name


def _codec(raw: Any, keypath: str, max_bytes: int) -> CodecSpec:
    if raw is None:
        raw = "native"
    if isinstance(raw, str):
        spec = CodecSpec(raw, MappingProxyType({}), keypath)
    elif isinstance(raw, Mapping):
        name = raw.get("name")
        if not isinstance(name, str):
            raise ConfigError(f"{keypath}.name", f"is required: the codec's name, got {name!r}")
        spec = CodecSpec(name, freeze({k: v for k, v in raw.items() if k != "name"}), keypath)
    else:
        raise ConfigError(keypath, f"must be a codec name or a mapping with name, got {type(raw).__name__}")
    spec.build(max_bytes)  # validates the options now, with the key path
    return spec


def _limits(raw: Any, ctx: ParseContext) -> Limits:
    kp = "limits"
    raw = check_keys(raw, ("message_max_bytes", "localization_max_bytes", "url_allow_list", "url_connect_timeout_s",
                           "url_total_timeout_s", "local_roots"), kp)
    allow = get_str_list(raw, "url_allow_list", kp)
    import urllib.parse

    for i, entry in enumerate(allow):
        u = urllib.parse.urlsplit(entry)
        if u.scheme != "https" or not u.hostname or u.username or u.password or u.query or u.fragment:
            raise ConfigError(f"{kp}.url_allow_list[{i}]", f"must be an https URL prefix such as "
                                                          f"'https://maps.example.org/alerts/', got {entry!r}")
    roots = tuple(get_path({"p": r}, "p", f"{kp}.local_roots[{i}]", ctx.base_dir)
                  for i, r in enumerate(get_str_list(raw, "local_roots", kp)))
    return Limits(
        message_max_bytes=get_int(raw, "message_max_bytes", kp, DEFAULT_MAX_MESSAGE_BYTES, lo=1024),
        localization_max_bytes=get_int(raw, "localization_max_bytes", kp, DEFAULT_LOCALIZATION_MAX_BYTES, lo=1024),
        url_allow_list=allow,
        url_connect_timeout_s=get_number(raw, "url_connect_timeout_s", kp, 10.0, lo=0.0, lo_open=True),
        url_total_timeout_s=get_number(raw, "url_total_timeout_s", kp, 60.0, lo=0.0, lo_open=True),
        local_roots=roots,
    )


def _secrets(raw: Any, base_dir: Path) -> dict[str, SecretRef]:
    raw = check_keys(raw, [k for k in (raw or {}) if isinstance(k, str)], "secrets")
    out = {}
    for name, spec in raw.items():
        kp = f"secrets.{_name_ok(name, 'secrets')}"
        spec = check_keys(spec, ("env", "file"), kp)
        if ("env" in spec) == ("file" in spec):
            raise ConfigError(kp, "needs exactly one of env (a variable name) or file (a path readable only by you)")
        if "env" in spec:
            out[name] = SecretRef(name, env=get_str(spec, "env", kp))
        else:
            out[name] = SecretRef(name, file=get_path(spec, "file", kp, base_dir))
    return out


def config_from_mapping(raw: Any, *, base_dir=".", path: Path | None = None) -> Config:
    """Validate a configuration mapping (as from ``yaml.safe_load``).

    Parameters
    ----------
    raw : mapping or None
        ``None`` (an empty file) gives every default.
    base_dir : str or Path
        Folder relative paths resolve against.
    path : Path, optional
        The file it came from (kept in :attr:`Config.path`).

    Raises
    ------
    ConfigError
    """
    base_dir = Path(base_dir).resolve()
    raw = check_keys(raw, _TOP_KEYS, "")
    secrets = _secrets(raw.get("secrets"), base_dir)
    ctx = ParseContext(base_dir, MappingProxyType(secrets))
    # An explicit state_dir is relative to the config file; the default is ./state where the program runs,
    # so the packaged default configuration never writes inside the installed package.
    state_dir = get_path(raw, "state_dir", "", base_dir) or (Path.cwd() / "state")
    store_raw = raw.get("store", {})
    if isinstance(store_raw, str):
        store_raw = {"path": store_raw}
    store_raw = check_keys(store_raw, ("path",), "store")
    store_path = get_path(store_raw, "path", "store", state_dir, "matcher.sqlite")
    limits = _limits(raw.get("limits"), ctx)
    svc = check_keys(raw.get("service"), ("batch_size", "poll_timeout_s", "decode_process"), "service")
    service = ServiceSettings(get_int(svc, "batch_size", "service", 500, lo=1),
                              get_number(svc, "poll_timeout_s", "service", 1.0, lo=0.0),
                              get_bool(svc, "decode_process", "service", True))

    sources: dict[str, SourceConfig] = {}
    src_raw = check_keys(raw.get("sources"), [k for k in (raw.get("sources") or {}) if isinstance(k, str)], "sources")
    for name, spec in src_raw.items():
        kp = f"sources.{_name_ok(name, 'sources')}"
        if not isinstance(spec, Mapping):
            raise ConfigError(kp, f"must be a mapping with kind and the kind's options, got {type(spec).__name__}")
        kind_name = get_str(spec, "kind", kp)
        if kind_name is None:
            raise ConfigError(f"{kp}.kind", "is required (inbox, archive or kafka)")
        kind = source_kind(kind_name, f"{kp}.kind")
        codec = _codec(spec.get("codec"), f"{kp}.codec", limits.message_max_bytes)
        rest = {k: v for k, v in spec.items() if k not in ("kind", "codec")}
        sources[name] = SourceConfig(name, kind_name, codec, kind.parse_options(rest, kp, ctx))

    sinks: dict[str, SinkConfig] = {}
    sink_raw = check_keys(raw.get("sinks"), [k for k in (raw.get("sinks") or {}) if isinstance(k, str)], "sinks")
    for name, spec in sink_raw.items():
        kp = f"sinks.{_name_ok(name, 'sinks')}"
        if not isinstance(spec, Mapping):
            raise ConfigError(kp, f"must be a mapping with kind and the kind's options, got {type(spec).__name__}")
        kind_name = get_str(spec, "kind", kp)
        if kind_name is None:
            raise ConfigError(f"{kp}.kind", "is required (jsonl or sqlite)")
        kind = sink_kind(kind_name, f"{kp}.kind")
        rest = {k: v for k, v in spec.items() if k != "kind"}
        sinks[name] = SinkConfig(name, kind_name, kind.parse_options(rest, kp, ctx))

    classes_raw = raw.get("classes")
    parsed_classes = None
    if classes_raw is not None:
        from matcher.coincidence import parse_classes

        parsed_classes = MappingProxyType(dict(parse_classes(classes_raw, "classes")))
    catalog_raw = raw.get("catalog")
    if catalog_raw is not None and not isinstance(catalog_raw, Mapping):
        raise ConfigError("catalog", f"must be a mapping, got {type(catalog_raw).__name__}")
    reports_raw = raw.get("reports")
    if reports_raw is not None and not isinstance(reports_raw, Mapping):
        raise ConfigError("reports", f"must be a mapping, got {type(reports_raw).__name__}")
    tuning_raw = raw.get("tuning")
    if tuning_raw is not None:
        # Validated now (errors name the key path) against the classes it tunes; kept as given.
        from matcher.coincidence import default_classes
        from matcher.tune.settings import parse_tuning

        parse_tuning(tuning_raw, parsed_classes if parsed_classes is not None else default_classes())

    return Config(path, state_dir, store_path, MappingProxyType(sources), MappingProxyType(sinks), limits, service,
                  MappingProxyType(secrets), None if classes_raw is None else freeze(classes_raw),
                  None if catalog_raw is None else freeze(catalog_raw), parsed_classes,
                  None if reports_raw is None else freeze(reports_raw),
                  None if tuning_raw is None else freeze(tuning_raw))


def load_config(path=None) -> Config:
    """Read and validate a YAML configuration file (``yaml.safe_load``).

    Parameters
    ----------
    path : str or Path, optional
        ``None`` gives every default (relative paths against the current folder).

    Raises
    ------
    ConfigError
        Unreadable file, invalid YAML, or an invalid value (naming its key path).
    """
    if path is None:
        return config_from_mapping(None, base_dir=Path.cwd())
    p = Path(path).expanduser()
    raw = read_yaml_file(p)
    return config_from_mapping(raw, base_dir=p.resolve().parent, path=p.resolve())
