"""Kafka options in the configuration: the deployment example, security, secrets, errors by key path.

No broker is needed here; the options are checked as parsed, and the kafka-python
keyword arguments as they would be handed to a client.
"""

from __future__ import annotations

import dataclasses
import os
from pathlib import Path

import pytest

from matcher.config import config_from_mapping, load_config
from matcher.errors import ConfigError
from matcher.streams.kafka_common import KafkaTransportError, client_config, scrub, transport_errors
from matcher.streams.sinks import KafkaSink
from matcher.streams.sources import KafkaSource

ROOT = Path(__file__).resolve().parent.parent
SECRET = "pa55-w0rd-that-must-never-show"


def conf(source=None, sink=None, secrets=None, base_dir=Path(".")):
    raw = {"secrets": secrets or {}}
    if source is not None:
        raw["sources"] = {"k": {"kind": "kafka", **source}}
    if sink is not None:
        raw["sinks"] = {"out": {"kind": "kafka", **sink}}
    return config_from_mapping(raw, base_dir=base_dir)


def plain(**extra):
    return {"connection": {"bootstrap_servers": ["127.0.0.1:19092"]}, "topics": {"alerts": ["gw"]}, **extra}


def sasl(**security):
    sec = {"protocol": "SASL_SSL", "sasl_mechanism": "SCRAM-SHA-512", "username": "matcher",
           "password_secret": "kpw", **security}
    return {"bootstrap_servers": "broker-1.example.org:9093,broker-2.example.org:9093", "security": sec}


def test_the_deployment_example_loads(monkeypatch):
    monkeypatch.setenv("MATCHER_KAFKA_PASSWORD", SECRET)
    c = load_config(ROOT / "config" / "kafka.yaml")
    src, sink = c.sources["kafka"].options, c.sinks["results"].options
    assert c.sources["kafka"].kind == "kafka" and c.sinks["results"].kind == "kafka"
    assert src.alert_topics == ("gw.alerts",) and len(src.report_topics) == 3 and src.group_id == "matcher-prod"
    # The YAML anchor gives the sink the very same connection as the source.
    assert sink.connection == src.connection and sink.topic == "matcher.results"
    assert src.connection.security.protocol == "SASL_SSL"
    assert src.connection.security.sasl_mechanism == "SCRAM-SHA-512"
    assert isinstance(c.source("kafka"), KafkaSource) and isinstance(c.sink("results"), KafkaSink)
    # The password is read only when a client is made (here without the example's CA file,
    # which exists only on a deployed machine), and never shown.
    conn = dataclasses.replace(src.connection, security=dataclasses.replace(src.connection.security, ca_file=None))
    kw = client_config(conn)
    assert kw["sasl_plain_password"] == SECRET
    for text in (repr(c), str(c.sources), repr(c.source("kafka")), repr(c.sink("results")), repr(kw), str(kw)):
        assert SECRET not in text


def test_defaults_of_a_plain_source_and_sink():
    c = conf(plain(), {"connection": {"bootstrap_servers": ["127.0.0.1:19092"]}, "topic": "results"})
    o = c.sources["k"].options
    assert o.connection.security.protocol == "PLAINTEXT" and o.group_id is None and o.report_topics == ()
    # kafka-python's defaults (a 45 s session, 1 MiB per partition fetch) unless configured.
    assert (o.session_timeout_ms, o.max_partition_fetch_bytes, o.stop_at_end) == (45000, 1048576, False)
    kw = client_config(o.connection)
    assert kw["security_protocol"] == "PLAINTEXT" and "sasl_plain_password" not in kw and "ssl_cafile" not in kw
    s = c.sinks["out"].options
    assert s.kinds == ("match",) and s.compression == "none" and s.delivery_timeout_ms == 120000


@pytest.mark.parametrize("mechanism", ["PLAIN", "SCRAM-SHA-256", "SCRAM-SHA-512"])
def test_sasl_ssl_mechanisms(monkeypatch, tmp_path, mechanism):
    monkeypatch.setenv("KPW", SECRET)
    ca = tmp_path / "ca.pem"
    ca.write_text("-----BEGIN CERTIFICATE-----\n")
    c = conf({**plain(), "connection": sasl(sasl_mechanism=mechanism, ca_file="ca.pem")},
             secrets={"kpw": {"env": "KPW"}}, base_dir=tmp_path)
    kw = client_config(c.sources["k"].options.connection)
    assert kw["security_protocol"] == "SASL_SSL" and kw["sasl_mechanism"] == mechanism
    assert kw["sasl_plain_username"] == "matcher" and kw["sasl_plain_password"] == SECRET
    assert kw["ssl_cafile"] == str(ca) and kw["ssl_check_hostname"] is True
    assert kw["bootstrap_servers"] == ["broker-1.example.org:9093", "broker-2.example.org:9093"]
    assert SECRET not in repr(kw) and SECRET not in str(kw)


def test_ssl_client_certificate_with_a_key_password_from_a_private_file(tmp_path):
    for name in ("ca.pem", "client.pem", "client.key"):
        (tmp_path / name).write_text("x")
    pw = tmp_path / "key-password"
    pw.write_text(SECRET + "\n")
    os.chmod(pw, 0o600)
    c = conf({**plain(), "connection": {"bootstrap_servers": ["h:9093"], "security": {
        "protocol": "SSL", "ca_file": "ca.pem", "cert_file": "client.pem", "key_file": "client.key",
        "key_password_secret": "keypw", "check_hostname": False}}},
        secrets={"keypw": {"file": str(pw)}}, base_dir=tmp_path)
    kw = client_config(c.sources["k"].options.connection)
    assert kw["ssl_certfile"] == str(tmp_path / "client.pem") and kw["ssl_keyfile"] == str(tmp_path / "client.key")
    assert kw["ssl_password"] == SECRET and kw["ssl_check_hostname"] is False
    assert SECRET not in repr(kw)
    # A password file others can read is refused when the client is made, naming the fix.
    os.chmod(pw, 0o644)
    with pytest.raises(ConfigError, match="chmod 600") as info:
        client_config(c.sources["k"].options.connection)
    assert SECRET not in str(info.value)


def test_missing_certificate_file_is_named(tmp_path):
    c = conf({**plain(), "connection": {"bootstrap_servers": ["h:9093"],
                                        "security": {"protocol": "SSL", "ca_file": "nope.pem"}}}, base_dir=tmp_path)
    with pytest.raises(ConfigError, match=r"connection\.security\.ca_file: ca_file .*nope\.pem does not exist"):
        client_config(c.sources["k"].options.connection, "sources.k.connection")


@pytest.mark.parametrize("source, path, words", [
    ({"topics": {"alerts": ["gw"]}}, "sources.k.connection", "is required"),
    (plain(connection={"bootstrap_servers": []}), "sources.k.connection.bootstrap_servers", "non-empty list"),
    (plain(connection={"bootstrap_servers": ["broker"]}), "sources.k.connection.bootstrap_servers[0]", "host:port"),
    (plain(connection={"bootstrap_servers": ["h:99999"]}), "sources.k.connection.bootstrap_servers[0]", "1..65535"),
    (plain(connection={"bootstrap_servers": ["h:1"], "security": {"protocol": "SASL_PLAINTEXT"}}),
     "sources.k.connection.security.protocol", "only over TLS"),
    (plain(connection={"bootstrap_servers": ["h:1"], "security": {"protocol": "SASL_SSL"}}),
     "sources.k.connection.security.sasl_mechanism", "is required with SASL_SSL"),
    (plain(connection={"bootstrap_servers": ["h:1"], "security": {"protocol": "SASL_SSL", "sasl_mechanism": "GSSAPI"}}),
     "sources.k.connection.security.sasl_mechanism", "PLAIN, SCRAM-SHA-256, SCRAM-SHA-512"),
    (plain(connection={"bootstrap_servers": ["h:1"], "security": {
        "protocol": "SASL_SSL", "sasl_mechanism": "PLAIN", "username": "u"}}),
     "sources.k.connection.security.password_secret", "is required"),
    (plain(connection={"bootstrap_servers": ["h:1"], "security": {
        "protocol": "SASL_SSL", "sasl_mechanism": "PLAIN", "username": "u", "password_secret": "nope"}}),
     "sources.k.connection.security.password_secret", "which secrets does not define"),
    (plain(connection={"bootstrap_servers": ["h:1"], "security": {"username": "u"}}),
     "sources.k.connection.security.username", "no effect with protocol PLAINTEXT"),
    (plain(connection={"bootstrap_servers": ["h:1"], "security": {"protocol": "SSL", "username": "u"}}),
     "sources.k.connection.security.username", "is for SASL_SSL"),
    (plain(connection={"bootstrap_servers": ["h:1"], "secutiry": {}}), "sources.k.connection.secutiry",
     "did you mean 'security'"),
    (plain(topics={}), "sources.k.topics", "at least one topic"),
    (plain(topics={"alerts": ["gw"], "reports": ["gw"]}, group_id="g"), "sources.k.topics", "both alerts and reports"),
    (plain(topics={"alerts": ["bad topic"]}), "sources.k.topics.alerts[0]", "Kafka topic name"),
    (plain(topics={"alerts": ["gw"], "reports": ["tr"]}), "sources.k.group_id", "is required with report topics"),
    (plain(group_id="g"), "sources.k.group_id", "no use without report topics"),
    (plain(topics={"reports": ["tr"]}, group_id="g", heartbeat_interval_ms=50000),
     "sources.k.heartbeat_interval_ms", "below session_timeout_ms"),
    (plain(fetch_max_wait_ms=40000), "sources.k.fetch_max_wait_ms", "below connection.request_timeout_ms"),
    (plain(received_at="later"), "sources.k.received_at", "record, arrival, message"),
    (plain(group_instance_id="a"), "sources.k.group_instance_id", "needs group_id"),
])
def test_source_errors_name_the_key_path(source, path, words):
    with pytest.raises(ConfigError) as info:
        conf(source)
    assert info.value.path == path, str(info.value)
    assert words in str(info.value)


@pytest.mark.parametrize("sink, path, words", [
    ({"connection": {"bootstrap_servers": ["h:1"]}}, "sinks.out.topic", "is required"),
    ({"connection": {"bootstrap_servers": ["h:1"]}, "topic": "a/b"}, "sinks.out.topic", "Kafka topic name"),
    ({"connection": {"bootstrap_servers": ["h:1"]}, "topic": "t", "compression": "brotli"}, "sinks.out.compression",
     "none, gzip"),
    ({"connection": {"bootstrap_servers": ["h:1"]}, "topic": "t", "delivery_timeout_ms": 2000},
     "sinks.out.delivery_timeout_ms", "at least connection.request_timeout_ms"),
    ({"connection": {"bootstrap_servers": ["h:1"]}, "topic": "t", "kinds": []}, "sinks.out.kinds", "at least one"),
])
def test_sink_errors_name_the_key_path(sink, path, words):
    with pytest.raises(ConfigError) as info:
        conf(sink=sink)
    assert info.value.path == path, str(info.value)
    assert words in str(info.value)


def test_unset_password_variable_is_named_without_a_value(monkeypatch):
    monkeypatch.delenv("KPW", raising=False)
    c = conf({**plain(), "connection": sasl()}, secrets={"kpw": {"env": "KPW"}})
    with pytest.raises(ConfigError, match="environment variable KPW is not set"):
        client_config(c.sources["k"].options.connection)


def test_errors_from_the_client_are_scrubbed_of_secrets(monkeypatch):
    from kafka import errors as kerr

    monkeypatch.setenv("KPW", SECRET)
    conn = conf({**plain(), "connection": sasl()}, secrets={"kpw": {"env": "KPW"}}).sources["k"].options.connection
    assert scrub(f"auth failed for matcher:{SECRET}", conn) == "auth failed for matcher:***"
    # Whatever text a client error carries, the error we raise has no secret in it.
    with pytest.raises(KafkaTransportError) as info:
        with transport_errors("kafka source k: connecting", conn):
            raise kerr.KafkaConnectionError(f"tried password={SECRET}")
    text = str(info.value)
    assert SECRET not in text and "password=***" in text
    assert "broker-1.example.org:9093,broker-2.example.org:9093" in text and text.startswith("kafka source k:")
