"""The configuration: defaults, sources/sinks/codecs by kind, errors naming the key path, secrets."""

from __future__ import annotations

import dataclasses
import os
from pathlib import Path

import pytest

from matcher.config import config_from_mapping, load_config
from matcher.errors import ConfigError
from matcher.streams.sources import ArchiveSource, InboxSource

ROOT = Path(__file__).resolve().parent.parent


def write(tmp_path, text) -> Path:
    p = tmp_path / "matcher.yaml"
    p.write_text(text)
    return p


def error(raw, tmp_path=Path(".")) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        config_from_mapping(raw, base_dir=tmp_path)
    return info.value


def test_defaults(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    c = load_config(None)
    assert c.state_dir == tmp_path / "state" and c.store_path == tmp_path / "state" / "matcher.sqlite"
    assert dict(c.sources) == {} and dict(c.sinks) == {} and c.limits.url_allow_list == ()
    assert c.service.batch_size == 500
    assert "optical" in c.classes()  # the packaged default classes


def test_the_repository_default_file_loads(monkeypatch, tmp_path):
    monkeypatch.chdir(tmp_path)
    c = load_config(ROOT / "config" / "default.yaml")
    assert c.classes_raw is not None and set(c.classes()) == set(c.classes_raw)


def test_a_full_file(tmp_path):
    p = write(tmp_path, """
state_dir: var
store: {path: db/matcher.sqlite}
sources:
  drop: {kind: inbox, path: inbox, pattern: "*.xml", codec: {name: voevent, error_containment: 0.9}}
  replay: {kind: archive, path: alerts.jsonl, speed: 60}
  survey:
    kind: inbox
    path: survey
    codec:
      name: mapped
      fields:
        type: {const: transient}
        class: {const: optical}
        transient_id: objectId
        ra_deg: candidate.ra
        dec_deg: candidate.dec
        time: {path: candidate.jd, unit: jd}
sinks:
  matches: {kind: jsonl, path: out/matches.jsonl}
  table: {kind: sqlite, path: out/results.sqlite, table: results}
limits:
  localization_max_bytes: 2000000
  url_allow_list: ["https://maps.example.org/alerts/"]
  local_roots: [maps]
service: {batch_size: 100, poll_timeout_s: 0.5}
catalog: {path: galaxies.fits, columns: {ra_deg: RA}}
""")
    c = load_config(p)
    assert c.path == p.resolve() and c.state_dir == tmp_path / "var"
    assert c.store_path == tmp_path / "var" / "db" / "matcher.sqlite"
    assert c.sources["replay"].options.speed == 60.0
    assert c.sources["drop"].codec.name == "voevent" and c.codec("drop").error_containment == 0.9
    assert c.codec("survey").name == "mapped"
    assert c.sinks["table"].options.table == "results"
    assert c.limits.local_roots == (tmp_path / "maps",)
    assert c.limits.localization().max_bytes == 2_000_000
    assert c.catalog_raw["columns"]["ra_deg"] == "RA"
    with pytest.raises(TypeError):
        c.catalog_raw["path"] = "other"  # frozen all the way down
    with pytest.raises(dataclasses.FrozenInstanceError):
        c.state_dir = tmp_path
    with c.source("drop") as src:
        assert isinstance(src, InboxSource) and src.pattern == "*.xml"
    (tmp_path / "alerts.jsonl").write_text("")
    with c.source("replay") as src:
        assert isinstance(src, ArchiveSource) and src.speed == 60.0
    sink = c.sink("matches")
    assert sink.path == tmp_path / "out" / "matches.jsonl"


@pytest.mark.parametrize("raw, path, words", [
    ({"sorces": {}}, "sorces", "did you mean 'sources'"),
    ({"sources": {"a": {"path": "x"}}}, "sources.a.kind", "is required"),
    ({"sources": {"a": {"kind": "ftp", "path": "x"}}}, "sources.a.kind", "unknown source kind 'ftp'"),
    ({"sources": {"a": {"kind": "inbox"}}}, "sources.a.path", "is required"),
    ({"sources": {"a": {"kind": "archive", "path": "x", "speed": 0}}}, "sources.a.speed", "must be > 0"),
    ({"sources": {"a": {"kind": "archive", "path": "x", "sped": 2}}}, "sources.a.sped", "did you mean 'speed'"),
    ({"sources": {"a": {"kind": "inbox", "path": "x", "codec": "yaml"}}}, "sources.a.codec", "unknown codec"),
    ({"sources": {"a": {"kind": "inbox", "path": "x", "codec": {"name": "mapped", "fields": {
        "ra_deg": {"path": "r", "unit": "grad"}}}}}}, "sources.a.codec.fields.ra_deg.unit", "unknown angle unit"),
    ({"sources": {"a b": {"kind": "inbox", "path": "x"}}}, "sources", "names must be"),
    ({"sinks": {"m": {"kind": "jsonl"}}}, "sinks.m.path", "is required"),
    ({"sinks": {"m": {"kind": "carrier-pigeon", "topic": "t"}}}, "sinks.m.kind", "unknown sink kind"),
    ({"sinks": {"m": {"kind": "sqlite", "path": "x", "table": "drop table"}}}, "sinks.m.table", "identifier"),
    ({"sinks": {"m": {"kind": "jsonl", "path": "x", "kinds": []}}}, "sinks.m.kinds", "at least one"),
    ({"limits": {"url_allow_list": ["http://maps.example.org/"]}}, "limits.url_allow_list[0]", "https URL prefix"),
    ({"limits": {"url_allow_list": "https://maps.example.org/"}}, "limits.url_allow_list", "list of strings"),
    ({"limits": {"message_max_bytes": 10}}, "limits.message_max_bytes", ">= 1024"),
    ({"limits": {"url_total_timeout_s": float("nan")}}, "limits.url_total_timeout_s", "finite number"),
    ({"service": {"batch_size": 0}}, "service.batch_size", ">= 1"),
    ({"service": {"batch_size": 2.5}}, "service.batch_size", "integer"),
    ({"store": {"file": "x"}}, "store.file", "unknown key (known: path)"),
    # The classes section is validated by matcher.coincidence.parse_classes, with its own key paths.
    ({"classes": {"optical": {"window_s": [5, 1]}}}, "classes.optical.rate_per_deg2_per_day", "is required"),
    ({"catalog": ["x"]}, "catalog", "must be a mapping"),
    (["not", "a", "mapping"], "(top level)", "must be a mapping"),
])
def test_errors_name_the_key_path(raw, path, words):
    err = error(raw)
    assert err.path.startswith(path) and words in err.problem, (err.path, err.problem)


def test_yaml_errors(tmp_path):
    p = write(tmp_path, "sources: [\n  - oops\n  bad: :\n")
    with pytest.raises(ConfigError, match="not valid YAML at line"):
        load_config(p)
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "missing.yaml")
    # safe_load: no Python objects from YAML tags.
    p = write(tmp_path, "state_dir: !!python/object/apply:os.getcwd []\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(p)


def test_secret_from_the_environment_is_never_shown(monkeypatch):
    monkeypatch.setenv("MATCHER_TEST_SECRET", "hunter2-value")
    c = config_from_mapping({"secrets": {"kafka_password": {"env": "MATCHER_TEST_SECRET"}}})
    assert c.secret("kafka_password") == "hunter2-value"
    for text in (repr(c), str(c.secrets), repr(c.secrets["kafka_password"])):
        assert "hunter2" not in text
    monkeypatch.delenv("MATCHER_TEST_SECRET")
    with pytest.raises(ConfigError, match="MATCHER_TEST_SECRET is not set") as info:
        c.secret("kafka_password")
    assert "hunter2" not in str(info.value)
    with pytest.raises(ConfigError, match="secrets.nope: is not defined"):
        c.secret("nope")


def test_secret_file_must_be_private(tmp_path):
    f = tmp_path / "pw"
    f.write_text("s3cret-file-value\n")
    os.chmod(f, 0o644)
    c = config_from_mapping({"secrets": {"pw": {"file": "pw"}}}, base_dir=tmp_path)
    with pytest.raises(ConfigError, match="mode 0644.*chmod 600") as info:
        c.secret("pw")
    assert "s3cret" not in str(info.value)
    os.chmod(f, 0o600)
    assert c.secret("pw") == "s3cret-file-value"
    assert error({"secrets": {"pw": {"env": "A", "file": "b"}}}).path == "secrets.pw"
    assert error({"secrets": {"pw": {"value": "inline"}}}).path == "secrets.pw.value"


def test_secret_references_from_options(tmp_path):
    from matcher.keycheck import ParseContext

    c = config_from_mapping({"secrets": {"pw": {"env": "X"}}})
    ctx = ParseContext(tmp_path, c.secrets)
    assert ctx.secret("pw", "sources.k.password").env == "X"
    with pytest.raises(ConfigError, match=r"sources\.k\.password: refers to secret 'pwd'"):
        ctx.secret("pwd", "sources.k.password")


def test_tuning_section_is_accepted_and_validated(tmp_path):
    # One configuration file serves the service and `matcher tune` (a past gap: the service
    # rejected the tuning: section).
    from matcher.config import config_from_mapping
    from matcher.errors import ConfigError

    cfg = config_from_mapping({"tuning": {}}, base_dir=tmp_path)
    assert cfg.tuning_raw == {}
    with pytest.raises(ConfigError, match="tuning"):
        config_from_mapping({"tuning": 5}, base_dir=tmp_path)
