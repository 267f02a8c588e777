"""What the Kafka source and sink share: the connection, its security, and safe errors.

A source or sink of ``kind: kafka`` has a ``connection`` mapping::

    connection:
      bootstrap_servers: [broker-1.example.org:9093, broker-2.example.org:9093]
      client_id: matcher-a              # shows in broker logs and group listings
      request_timeout_ms: 30000
      connect_timeout_ms: 30000         # how long to wait for a first broker at start
      security:
        protocol: SASL_SSL              # PLAINTEXT (default) | SSL | SASL_SSL
        sasl_mechanism: SCRAM-SHA-512   # PLAIN | SCRAM-SHA-256 | SCRAM-SHA-512
        username: matcher
        password_secret: kafka_password # a name under the top-level ``secrets``
        ca_file: /etc/matcher/kafka-ca.pem
        cert_file: null                 # client certificate (SSL client authentication)
        key_file: null
        key_password_secret: null       # a name under ``secrets``, for an encrypted key
        check_hostname: true
        crl_file: null

Secrets are referenced by name and read only when a client is made
(:func:`client_config`); they are never kept in an option object, a ``repr``, a log
line or an error message: :func:`scrub` removes them from any text that leaves
this module (kafka-python's own exception texts included). Share one connection
between sections with a YAML anchor (``connection: &kafka {...}`` then
``connection: *kafka``).

kafka-python is imported only when a client is made, so loading a configuration
never needs it.
"""

from __future__ import annotations

import contextlib
import logging
import os
import re
import socket
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator, Mapping

from matcher.errors import ConfigError, InputError
from matcher.keycheck import ParseContext, check_keys, get_bool, get_int, get_path, get_str, sub

__all__ = [
    "SECURITY_PROTOCOLS",
    "SASL_MECHANISMS",
    "KafkaTransportError",
    "Security",
    "Connection",
    "parse_connection",
    "parse_topic",
    "client_config",
    "scrub",
    "transport_errors",
    "ClientProblems",
    "explain",
    "describe_connection",
    "wait_reachable",
    "close_failed_sockets",
    "LOG",
]

#: Security protocols a connection may use (SASL only over TLS: passwords never travel in the clear).
SECURITY_PROTOCOLS = ("PLAINTEXT", "SSL", "SASL_SSL")
#: SASL mechanisms with a username and password.
SASL_MECHANISMS = ("PLAIN", "SCRAM-SHA-256", "SCRAM-SHA-512")

#: The logger of the Kafka source and sink (never given payloads or secrets).
LOG = logging.getLogger("matcher.kafka")

# Kafka's own rule for topic names (legal characters, at most 249 of them; common practice).
_TOPIC_RE = re.compile(r"^[A-Za-z0-9._-]{1,249}$")
_HOSTPORT_RE = re.compile(r"^(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+):([0-9]{1,5})$")
_REDACTED = "***"


class KafkaTransportError(InputError):
    """A Kafka broker, topic or group cannot be used (unreachable, missing, refused).

    The message names the source or sink, the brokers and the problem; it never
    contains a secret.
    """


@dataclass(frozen=True)
class Security:
    """``connection.security``: how a client proves who it is and checks the brokers.

    Attributes
    ----------
    protocol : str
        ``PLAINTEXT``, ``SSL`` or ``SASL_SSL``.
    sasl_mechanism : str or None
        ``PLAIN``, ``SCRAM-SHA-256`` or ``SCRAM-SHA-512`` (``SASL_SSL`` only).
    username : str or None
    password : SecretRef or None
        Where the SASL password is (its ``repr`` hides the value).
    ca_file, cert_file, key_file, crl_file : Path or None
        PEM files: the brokers' certificate authority, a client certificate and key.
    key_password : SecretRef or None
        The password of an encrypted ``key_file``.
    check_hostname : bool
        Check that the broker's certificate names the host connected to.
    """

    protocol: str = "PLAINTEXT"
    sasl_mechanism: str | None = None
    username: str | None = None
    password: Any = None
    ca_file: Path | None = None
    cert_file: Path | None = None
    key_file: Path | None = None
    key_password: Any = None
    check_hostname: bool = True
    crl_file: Path | None = None

    def secret_refs(self) -> tuple:
        return tuple(s for s in (self.password, self.key_password) if s is not None)


@dataclass(frozen=True)
class Connection:
    """``connection``: where the brokers are and how to talk to them.

    Attributes
    ----------
    bootstrap_servers : tuple of str
        ``host:port`` entries.
    client_id : str
    security : Security
    request_timeout_ms : int, ms
    connect_timeout_ms : int, ms
        How long making a client waits for a first broker before it gives up.
    """

    bootstrap_servers: tuple[str, ...]
    client_id: str = "matcher"
    security: Security = Security()
    request_timeout_ms: int = 30000
    connect_timeout_ms: int = 30000

    @property
    def servers_text(self) -> str:
        return ",".join(self.bootstrap_servers)


def parse_topic(value: Any, keypath: str) -> str:
    """A Kafka topic name: letters, digits, ``.``, ``_``, ``-``; at most 249 characters."""
    if not isinstance(value, str) or not _TOPIC_RE.match(value) or value in (".", ".."):
        raise ConfigError(keypath, f"must be a Kafka topic name (letters, digits, '.', '_', '-'; at most 249), "
                                   f"got {value!r}")
    return value


def _servers(raw: Mapping, keypath: str) -> tuple[str, ...]:
    kp = sub(keypath, "bootstrap_servers")
    v = raw.get("bootstrap_servers")
    if isinstance(v, str):
        v = [s.strip() for s in v.split(",") if s.strip()]
    if not isinstance(v, (list, tuple)) or not v:
        raise ConfigError(kp, "must be a non-empty list of host:port entries (or one comma-separated string)")
    out = []
    for i, s in enumerate(v):
        m = _HOSTPORT_RE.match(s) if isinstance(s, str) else None
        if m is None or not 1 <= int(m.group(2)) <= 65535:
            raise ConfigError(f"{kp}[{i}]", f"must be host:port with a port in 1..65535, got {s!r}")
        out.append(s)
    return tuple(out)


def _security(raw: Any, keypath: str, ctx: ParseContext) -> Security:
    kp = keypath
    raw = check_keys(raw, ("protocol", "sasl_mechanism", "username", "password_secret", "ca_file", "cert_file",
                           "key_file", "key_password_secret", "check_hostname", "crl_file"), kp)
    protocol = get_str(raw, "protocol", kp, "PLAINTEXT")
    if protocol not in SECURITY_PROTOCOLS:
        hint = " (SASL is accepted only over TLS: use SASL_SSL)" if protocol == "SASL_PLAINTEXT" else ""
        raise ConfigError(sub(kp, "protocol"), f"must be one of {', '.join(SECURITY_PROTOCOLS)}, got {protocol!r}{hint}")
    mech = get_str(raw, "sasl_mechanism", kp)
    username = get_str(raw, "username", kp)
    pw_name = raw.get("password_secret")
    tls_keys = ("ca_file", "cert_file", "key_file", "key_password_secret", "crl_file")
    if protocol == "PLAINTEXT":
        extra = [k for k in ("sasl_mechanism", "username", "password_secret", *tls_keys) if raw.get(k) is not None]
        if extra:
            raise ConfigError(sub(kp, extra[0]), "has no effect with protocol PLAINTEXT (use SSL or SASL_SSL)")
    if protocol == "SASL_SSL":
        if mech is None:
            raise ConfigError(sub(kp, "sasl_mechanism"), f"is required with SASL_SSL: one of {', '.join(SASL_MECHANISMS)}")
        if mech not in SASL_MECHANISMS:
            raise ConfigError(sub(kp, "sasl_mechanism"), f"must be one of {', '.join(SASL_MECHANISMS)}, got {mech!r}")
        if username is None:
            raise ConfigError(sub(kp, "username"), "is required with SASL_SSL")
        if pw_name is None:
            raise ConfigError(sub(kp, "password_secret"), "is required with SASL_SSL: the name of a secret under "
                                                          "secrets (an environment variable or a private file)")
    elif protocol == "SSL":
        for k in ("sasl_mechanism", "username", "password_secret"):
            if raw.get(k) is not None:
                raise ConfigError(sub(kp, k), "is for SASL_SSL; with SSL the client is known by its certificate")
    password = ctx.secret(pw_name, sub(kp, "password_secret")) if pw_name is not None else None
    kpw_name = raw.get("key_password_secret")
    key_password = ctx.secret(kpw_name, sub(kp, "key_password_secret")) if kpw_name is not None else None
    files = {k: get_path(raw, k, kp, ctx.base_dir) for k in ("ca_file", "cert_file", "key_file", "crl_file")}
    if files["key_file"] is not None and files["cert_file"] is None:
        raise ConfigError(sub(kp, "cert_file"), "is required with key_file (a client certificate and its key)")
    if key_password is not None and files["key_file"] is None:
        raise ConfigError(sub(kp, "key_password_secret"), "needs key_file (the encrypted key it unlocks)")
    return Security(protocol, mech, username, password, files["ca_file"], files["cert_file"], files["key_file"],
                    key_password, get_bool(raw, "check_hostname", kp, True), files["crl_file"])


def parse_connection(raw: Any, keypath: str, ctx: ParseContext) -> Connection:
    """Validate a ``connection`` mapping (see the module docstring).

    Raises
    ------
    ConfigError
        Naming the key path, e.g. ``sources.gw.connection.security.sasl_mechanism``.
    """
    raw = check_keys(raw, ("bootstrap_servers", "client_id", "security", "request_timeout_ms",
                           "connect_timeout_ms"), keypath, required=("bootstrap_servers",))
    client_id = get_str(raw, "client_id", keypath, "matcher")
    return Connection(
        bootstrap_servers=_servers(raw, keypath),
        client_id=client_id,
        security=_security(raw.get("security"), sub(keypath, "security"), ctx),
        request_timeout_ms=get_int(raw, "request_timeout_ms", keypath, 30000, lo=1000),
        connect_timeout_ms=get_int(raw, "connect_timeout_ms", keypath, 30000, lo=100),
    )


class _Revealed(dict):
    """A kafka-python keyword dictionary holding secret values: its ``repr`` hides them."""

    _SECRET_KEYS = ("sasl_plain_password", "ssl_password")

    def __repr__(self) -> str:
        shown = {k: (_REDACTED if k in self._SECRET_KEYS and v is not None else v) for k, v in self.items()}
        return f"{type(self).__name__}({shown!r})"

    __str__ = __repr__


def _check_file(path: Path | None, what: str, keypath: str) -> str | None:
    if path is None:
        return None
    if not os.path.isfile(path):
        raise ConfigError(keypath, f"{what} {path} does not exist or is not a file")
    return str(path)


def close_failed_sockets() -> None:
    """Make kafka-python close the socket of a connection attempt that fails.

    kafka-python 3.0.12's ``KafkaNetSocket.sock_connect`` raises on a refused or timed-out
    connect without closing the socket it was given, so every reconnect attempt while a
    broker is down leaves a socket open until the garbage collector finds it. This wraps
    that one coroutine to close the socket on the way out of a failure; a version that
    closes it itself is unaffected (closing twice does nothing).
    """
    from kafka.net import inet

    cls = inet.KafkaNetSocket
    original = cls.sock_connect
    if getattr(original, "_closes_on_failure", False):
        return

    async def sock_connect(self, net, sock, sockaddr, timeout_at=None):
        try:
            return await original(self, net, sock, sockaddr, timeout_at=timeout_at)
        except BaseException:
            sock.close()
            raise

    sock_connect._closes_on_failure = True
    cls.sock_connect = sock_connect


def client_config(conn: Connection, keypath: str = "connection") -> dict:
    """Keyword arguments for a kafka-python client, with the secrets read now.

    The returned dictionary hides its secret values in ``repr``; do not log its items.

    Raises
    ------
    ConfigError
        A secret is not available, or a certificate file is missing.
    """
    close_failed_sockets()
    s = conn.security
    kw = _Revealed(
        bootstrap_servers=list(conn.bootstrap_servers),
        client_id=conn.client_id,
        security_protocol=s.protocol,
        request_timeout_ms=conn.request_timeout_ms,
        bootstrap_timeout_ms=conn.connect_timeout_ms,
    )
    if s.protocol in ("SSL", "SASL_SSL"):
        kp = f"{keypath}.security"
        kw.update(ssl_check_hostname=s.check_hostname,
                  ssl_cafile=_check_file(s.ca_file, "ca_file", f"{kp}.ca_file"),
                  ssl_certfile=_check_file(s.cert_file, "cert_file", f"{kp}.cert_file"),
                  ssl_keyfile=_check_file(s.key_file, "key_file", f"{kp}.key_file"),
                  ssl_crlfile=_check_file(s.crl_file, "crl_file", f"{kp}.crl_file"))
        if s.key_password is not None:
            kw["ssl_password"] = s.key_password.reveal()
    if s.protocol == "SASL_SSL":
        kw.update(sasl_mechanism=s.sasl_mechanism, sasl_plain_username=s.username,
                  sasl_plain_password=s.password.reveal())
    return kw


def wait_reachable(conn: Connection, what: str) -> None:
    """Wait until a TCP connection to one of the bootstrap servers succeeds, up to ``connect_timeout_ms``.

    kafka-python 3.0.12 leaves sockets and a thread behind when a client fails to
    bootstrap, so a client is made only once something listens.

    Raises
    ------
    KafkaTransportError
        Nothing accepted a connection in time.
    """
    deadline = time.monotonic() + conn.connect_timeout_ms / 1000.0
    last = "no answer"
    while True:
        for server in conn.bootstrap_servers:
            host, _, port = server.rpartition(":")
            try:
                with socket.create_connection((host.strip("[]"), int(port)),
                                              timeout=max(0.05, min(2.0, deadline - time.monotonic()))):
                    return
            except OSError as exc:
                last = f"{server}: {exc.strerror or type(exc).__name__}"
        if time.monotonic() >= deadline:
            raise KafkaTransportError(f"{what}: no broker accepted a connection within {conn.connect_timeout_ms} ms "
                                      f"({last}; is a broker running at {conn.servers_text}?)")
        time.sleep(0.2)


def _secret_values(conn: Connection) -> list[str]:
    out = []
    for ref in conn.security.secret_refs():
        try:
            value = ref.reveal()
        except InputError:
            continue
        if value:
            out.append(value)
    return out


def scrub(text: str, conn: Connection) -> str:
    """``text`` with every secret value of ``conn`` replaced by ``***``."""
    for value in _secret_values(conn):
        text = text.replace(value, _REDACTED)
    return text


_REFUSALS = ("AuthenticationFailed", "AuthorizationFailed", "Authorization failed", "certificate verify failed",
             "CERTIFICATE_VERIFY_FAILED", "SSLError", "SSLCertVerificationError", "Handshake failed")


class ClientProblems(logging.Handler):
    """Keeps the last refusal kafka-python logged (authentication, TLS) while a client is being made.

    kafka-python retries a refused bootstrap until its timeout and then raises only
    "Unable to bootstrap"; the reason (a wrong password, an untrusted certificate) is
    in its log. This handler, on the ``kafka`` logger for the duration, keeps it for
    the error message. The texts are kafka-python's own (no secrets; scrubbed anyway).
    """

    def __init__(self):
        super().__init__(logging.WARNING)
        self.last: str | None = None

    def emit(self, record: logging.LogRecord) -> None:
        try:
            msg = record.getMessage()
        except Exception:  # a malformed record from the library must not break our error path
            return
        if any(word in msg for word in _REFUSALS):
            m = re.search(r"\[Error \d+\].*", msg)
            text = re.sub(r"\s*\(backoff [^)]*\)\s*$", "", m.group(0) if m else msg)
            self.last = re.sub(r"(\w+Error): \1: ", r"\1: ", text).strip()

    @classmethod
    @contextlib.contextmanager
    def watching(cls) -> Iterator[ClientProblems]:
        handler = cls()
        logger = logging.getLogger("kafka")
        logger.addHandler(handler)
        try:
            yield handler
        finally:
            logger.removeHandler(handler)


def explain(exc: BaseException, conn: Connection, problems: ClientProblems | None = None) -> str:
    """A one-line text for a kafka-python error: its type and text, why, and a hint; secrets scrubbed."""
    from kafka import errors as kerr

    detail = re.sub(r"^(\w+): \1: ", r"\1: ", f"{type(exc).__name__}: {exc}")  # kafka errors repeat their name
    if problems is not None and problems.last:
        detail += f"; the broker refused the connection: {problems.last}"
    elif isinstance(exc, (kerr.KafkaConnectionError, kerr.KafkaTimeoutError)):
        detail += f" (is a broker running at {conn.servers_text}?)"
    return scrub(detail, conn)


@contextlib.contextmanager
def transport_errors(what: str, conn: Connection) -> Iterator[None]:
    """Turn kafka-python's errors inside the block into :class:`KafkaTransportError`.

    Parameters
    ----------
    what : str
        What was being done, for the message (``"kafka source reports: subscribing"``).
    conn : Connection
        Its brokers are named in the message; its secrets are scrubbed from it.
    """
    from kafka import errors as kerr

    with ClientProblems.watching() as problems:
        try:
            yield
        except (kerr.KafkaError, OSError) as exc:
            raise KafkaTransportError(f"{what}: {explain(exc, conn, problems)}") from None


def describe_connection(conn: Connection) -> dict:
    """What may be shown about a connection (dashboard, ``matcher status``): never a secret."""
    s = conn.security
    return {"bootstrap_servers": list(conn.bootstrap_servers), "client_id": conn.client_id,
            "security_protocol": s.protocol, "sasl_mechanism": s.sasl_mechanism, "username": s.username}
