"""Security against a real broker: SSL, SASL_SSL with PLAIN and with SCRAM-SHA-256, secrets never shown.

A second test broker (the same Apache Kafka as the session's) gets two more listeners
on 127.0.0.1: SSL, and SASL_SSL with the PLAIN and SCRAM-SHA-256 mechanisms. Its TLS
key is a self-signed certificate made here with the JDK's keytool (subject alternative
name IP:127.0.0.1, so hostname checking works); the PLAIN user is declared in the
listener's JAAS configuration and the SCRAM user is written into the cluster
metadata when the storage is formatted (``StorageTool format --add-scram``), both as
Kafka's documentation describes. The source and sink connect with our ``connection``
options and a password from a secret; a wrong password fails with an error that names
the broker and never contains a password.
"""

from __future__ import annotations

import logging
import shutil
import subprocess

import pytest

from kafka_broker import KafkaBroker, _free_port, unique_topic
from kafka_helpers import drain, produce, read_topic
from matcher.config import config_from_mapping
from matcher.streams.kafka_common import KafkaTransportError
from matcher.streams.sinks import Publisher, SinkError
from matcher.store import OutboxRow

pytestmark = [pytest.mark.kafka, pytest.mark.slow]

STORE_PASS = "keystore-pass-7"
PLAIN_PASSWORD = "plain-pass-never-shown-31"
SCRAM_PASSWORD = "scram-pass-never-shown-59"


class SecureBroker(KafkaBroker):
    """The test broker with SSL and SASL_SSL listeners besides its PLAINTEXT one."""

    def __init__(self, keystore, **kw):
        super().__init__(**kw)
        self.keystore = keystore
        self.ssl_port = self.sasl_port = None

    def _pick_ports_and_format(self):
        self.ssl_port = _free_port(set())
        self.sasl_port = _free_port({self.ssl_port})
        super()._pick_ports_and_format()

    def server_properties(self):
        p = super().server_properties()
        p["listeners"] += f",SSL://127.0.0.1:{self.ssl_port},SASL_SSL://127.0.0.1:{self.sasl_port}"
        p["advertised.listeners"] += f",SSL://127.0.0.1:{self.ssl_port},SASL_SSL://127.0.0.1:{self.sasl_port}"
        p["listener.security.protocol.map"] += ",SSL:SSL,SASL_SSL:SASL_SSL"
        p.update({
            "ssl.keystore.location": str(self.keystore), "ssl.keystore.type": "PKCS12",
            "ssl.keystore.password": STORE_PASS, "ssl.key.password": STORE_PASS,
            "sasl.enabled.mechanisms": "PLAIN,SCRAM-SHA-256",
            "listener.name.sasl_ssl.plain.sasl.jaas.config":
                f'org.apache.kafka.common.security.plain.PlainLoginModule required user_matcher="{PLAIN_PASSWORD}";',
            "listener.name.sasl_ssl.scram-sha-256.sasl.jaas.config":
                "org.apache.kafka.common.security.scram.ScramLoginModule required;",
        })
        return p

    def _java_command(self, main, *args):
        if main == "kafka.tools.StorageTool":
            args = (*args, "--add-scram", f"SCRAM-SHA-256=[name=scram-user,password={SCRAM_PASSWORD}]")
        return super()._java_command(main, *args)


@pytest.fixture(scope="module")
def secure(tmp_path_factory):
    keytool = shutil.which("keytool")
    if keytool is None:
        pytest.fail("keytool (the JDK's) is not on PATH; the Kafka test broker needs a JDK anyway")
    folder = tmp_path_factory.mktemp("tls")
    ks, ca = folder / "broker.p12", folder / "ca.pem"
    for cmd in ([keytool, "-genkeypair", "-alias", "broker", "-keyalg", "RSA", "-keysize", "2048", "-validity", "2",
                 "-keystore", str(ks), "-storetype", "PKCS12", "-storepass", STORE_PASS, "-keypass", STORE_PASS,
                 "-dname", "CN=127.0.0.1", "-ext", "SAN=IP:127.0.0.1"],
                [keytool, "-exportcert", "-alias", "broker", "-keystore", str(ks), "-storepass", STORE_PASS,
                 "-rfc", "-file", str(ca)]):
        done = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
        assert done.returncode == 0, done.stderr
    broker = SecureBroker(ks)
    try:
        broker.start()
        # Ready means a client gets through TLS and SASL (the JVM's first handshakes are slow).
        from kafka import KafkaConsumer

        probe = KafkaConsumer(bootstrap_servers=f"127.0.0.1:{broker.sasl_port}", security_protocol="SASL_SSL",
                              sasl_mechanism="PLAIN", sasl_plain_username="matcher",
                              sasl_plain_password=PLAIN_PASSWORD, ssl_cafile=str(ca), bootstrap_timeout_ms=60000)
        probe.close()
        yield broker, ca, folder
    finally:
        broker.close()


def config(secure, protocol, mechanism=None, user=None, secret_env=None, topic="t"):
    broker, ca, folder = secure
    port = broker.ssl_port if protocol == "SSL" else broker.sasl_port
    security = {"protocol": protocol, "ca_file": str(ca)}
    if protocol == "SASL_SSL":
        security.update(sasl_mechanism=mechanism, username=user, password_secret="kpw")
    conn = {"bootstrap_servers": [f"127.0.0.1:{port}"], "client_id": "test-secure",
            "connect_timeout_ms": 10000 if secret_env is None else 8000, "security": security}
    return config_from_mapping({
        "state_dir": str(folder / "state"), "secrets": {"kpw": {"env": secret_env or "KPW"}},
        "sources": {"k": {"kind": "kafka", "connection": conn, "topics": {"alerts": [topic]}}},
        "sinks": {"out": {"kind": "kafka", "connection": conn, "topic": topic}}}, base_dir=folder)


@pytest.mark.parametrize("protocol, mechanism, user, password", [
    ("SSL", None, None, None),
    ("SASL_SSL", "PLAIN", "matcher", PLAIN_PASSWORD),
    ("SASL_SSL", "SCRAM-SHA-256", "scram-user", SCRAM_PASSWORD),
])
def test_source_and_sink_over_a_secured_listener(secure, tmp_path, monkeypatch, caplog, protocol, mechanism, user,
                                                 password):
    broker = secure[0]
    monkeypatch.setenv("KPW", password or "unused")
    topic = unique_topic("secure")
    broker.create_topics({topic: 1})
    cfg = config(secure, protocol, mechanism, user, topic=topic)
    caplog.set_level(logging.DEBUG, logger="matcher")
    # The sink publishes two outbox rows over the secured listener...
    from matcher.store import Store

    with Store(tmp_path / "s.sqlite") as st:
        sink = cfg.sink("out")
        pub = Publisher(st, sink)
        try:
            sink.write([OutboxRow(1, "match", "EV/1/A", '{"a":1}'), OutboxRow(2, "match", "EV/1/B", '{"b":2}')])
            sink.flush()
        finally:
            pub.close()
    # ... and the source reads them back over it.
    src = cfg.source("k")
    try:
        src.resume({})
        items = drain(src, 2, timeout=30)
    finally:
        src.close()
    assert [i.data for i in items] == [b'{"a":1}', b'{"b":2}']
    # The plaintext listener of the same broker sees the same records (they are real).
    assert [r.value for r in read_topic(broker.bootstrap, topic, 2)] == [b'{"a":1}', b'{"b":2}']
    if password:
        assert password not in caplog.text and password not in repr(cfg) and password not in repr(src)


def test_a_wrong_password_is_a_clear_error_without_the_password(secure, monkeypatch):
    wrong = "wrong-pass-never-shown-83"
    monkeypatch.setenv("BADPW", wrong)
    topic = unique_topic("secure")
    secure[0].create_topics({topic: 1})
    cfg = config(secure, "SASL_SSL", "PLAIN", "matcher", secret_env="BADPW", topic=topic)
    src = cfg.source("k")
    with pytest.raises(KafkaTransportError) as info:
        src.resume({})
    src.close()
    text = str(info.value)
    assert text.startswith("kafka source k (127.0.0.1:") and wrong not in text and PLAIN_PASSWORD not in text
    # kafka-python only says it could not bootstrap; the broker's reason comes from its log. Some
    # refused attempts end in a bare disconnect, and on a loaded machine every attempt within the
    # timeout may do so (seen in CI): then the error must still name the bootstrap, never a secret.
    assert _refusal_or_bootstrap(text), text
    with pytest.raises(SinkError) as info:
        cfg.sink("out").open(0)
    assert wrong not in str(info.value) and str(info.value).startswith("sink out (kafka topic")
    assert PLAIN_PASSWORD not in str(info.value)
    assert _refusal_or_bootstrap(str(info.value)), str(info.value)


def _refusal_or_bootstrap(text: str) -> bool:
    refused = ("the broker refused the connection: [Error 58] SaslAuthenticationFailedError" in text
               and "Invalid username or password" in text and "is a broker running" not in text)
    return refused or "Unable to bootstrap from ['127.0.0.1:" in text
