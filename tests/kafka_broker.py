"""A real single-node Apache Kafka broker for the tests.

The broker is Apache Kafka itself (``kafka.Kafka`` from ``org.apache.kafka:kafka_2.13``,
jars fetched from Maven Central by ``tests/kafka/fetch.sh`` into ``.cache/kafka/lib``),
run as one combined broker+controller KRaft node on 127.0.0.1, on free non-default
ports picked when it is first started. Nothing here imitates a broker.

``KafkaBroker`` starts, stops, kills and restarts that process; the session-scoped
pytest fixture ``kafka_broker`` hands one running broker to the tests marked
``@pytest.mark.kafka``. If the broker cannot start, the fixture raises
``BrokerError`` with the tail of the broker's log: the tests fail, they never skip.

Registered in ``tests/conftest.py`` as a pytest plugin (``pytest_plugins``), so the
fixture and the report hook below are available to every test module.
"""

from __future__ import annotations

import atexit
import base64
import os
import shutil
import signal
import socket
import subprocess
import tempfile
import time
import uuid
import weakref
from collections.abc import Mapping
from pathlib import Path

import pytest

__all__ = [
    "BrokerError",
    "KafkaBroker",
    "kafka_broker",
    "new_cluster_id",
    "unique_topic",
    "LIB_DIR",
    "LOG_CONFIG",
]

TESTS_DIR = Path(__file__).resolve().parent
ROOT = TESTS_DIR.parent
LIB_DIR = ROOT / ".cache" / "kafka" / "lib"
LOG_CONFIG = TESTS_DIR / "kafka" / "log4j2.properties"
FETCH_COMMAND = "bash tests/kafka/fetch.sh"

# The Kafka defaults: never used, so a broker started by hand elsewhere on this
# machine cannot be mistaken for ours.
_DEFAULT_PORTS = frozenset({9092, 9093})
_NODE_ID = 1

_running: weakref.WeakSet[KafkaBroker] = weakref.WeakSet()


class BrokerError(RuntimeError):
    """The test broker could not be started, reached or stopped.

    The message says what failed and ends with the tail of the broker's log.
    """


def new_cluster_id() -> str:
    """Return a new KRaft cluster id.

    Returns
    -------
    str
        16 random bytes in URL-safe base64 without padding (22 characters), the form
        ``kafka.tools.StorageTool format -t`` accepts, never starting with ``-``: the tool's
        argument parser takes such an id for an option and stops with "argument
        --cluster-id/-t: expected one argument" (seen once in 64 runs, as the odds say;
        Kafka's own ``Uuid.randomUuid`` skips those ids for the same reason).
    """
    while True:
        cid = base64.urlsafe_b64encode(os.urandom(16)).rstrip(b"=").decode("ascii")
        if not cid.startswith("-"):
            return cid


def unique_topic(prefix: str) -> str:
    """Return a topic name no other test in this session uses.

    Parameters
    ----------
    prefix : str
        Readable start of the name; letters, digits, ``.``, ``_`` and ``-`` only.
    """
    return f"{prefix}-{uuid.uuid4().hex[:12]}"


def _free_port(taken: set[int]) -> int:
    """Ask the kernel for a free loopback TCP port not in ``taken`` nor a Kafka default."""
    for _ in range(100):
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
            sock.bind(("127.0.0.1", 0))
            port = sock.getsockname()[1]
        if port not in taken and port not in _DEFAULT_PORTS:
            return port
    raise BrokerError("could not find a free TCP port on 127.0.0.1 after 100 tries")


def _port_open(port: int) -> bool:
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=0.5):
            return True
    except OSError:
        return False


def _default_java() -> str:
    java_home = os.environ.get("JAVA_HOME")
    if java_home and (Path(java_home) / "bin" / "java").is_file():
        return str(Path(java_home) / "bin" / "java")
    return "java"


class KafkaBroker:
    """One Apache Kafka process, combined broker and controller (KRaft), on loopback.

    The first :meth:`start` makes a work folder (``server.properties``, ``data/``,
    ``broker.log``), picks two free ports (client and controller listeners) and
    formats the storage. Later starts (:meth:`restart`, or :meth:`start` after
    :meth:`stop` or :meth:`kill`) reuse the same ports and data, as a restarted
    production broker would.

    Parameters
    ----------
    lib_dir : Path
        Folder of the broker's jars (``tests/kafka/fetch.sh`` fills it).
    java : str, optional
        The ``java`` executable; default ``$JAVA_HOME/bin/java`` or ``java`` on PATH.
    max_heap : str
        JVM ``-Xmx`` value.
    start_timeout : float
        Seconds from launch until the broker must answer a client.
    stop_timeout : float
        Seconds a clean stop may take before the process is killed.
    properties : Mapping[str, str], optional
        Extra ``server.properties`` entries, overriding the defaults.
    """

    def __init__(
        self,
        lib_dir: Path = LIB_DIR,
        java: str | None = None,
        max_heap: str = "512m",
        start_timeout: float = 120.0,
        stop_timeout: float = 60.0,
        properties: Mapping[str, str] | None = None,
    ):
        self.lib_dir = Path(lib_dir).resolve()
        self.java = java or _default_java()
        self.max_heap = max_heap
        self.start_timeout = float(start_timeout)
        self.stop_timeout = float(stop_timeout)
        self.extra_properties = dict(properties or {})
        self.work_dir: Path | None = None
        self.port: int | None = None
        self.controller_port: int | None = None
        self.cluster_id: str | None = None
        #: Seconds from launching ``kafka.Kafka`` to a client seeing the broker, per start.
        self.start_seconds: list[float] = []
        #: Seconds the storage format took (first start only).
        self.format_seconds: float | None = None
        self._proc: subprocess.Popen | None = None
        self._log_file = None

    # -- paths and properties -------------------------------------------------------

    @property
    def bootstrap(self) -> str:
        """``host:port`` of the client listener, for ``bootstrap_servers``."""
        if self.port is None:
            raise BrokerError("the broker has not been started yet: no bootstrap address")
        return f"127.0.0.1:{self.port}"

    @property
    def log_path(self) -> Path:
        """The file that receives the broker's stdout and stderr (all starts)."""
        if self.work_dir is None:
            raise BrokerError("the broker has not been started yet: no log")
        return self.work_dir / "broker.log"

    @property
    def running(self) -> bool:
        """Whether the broker process is alive."""
        return self._proc is not None and self._proc.poll() is None

    @property
    def pid(self) -> int | None:
        """Process id of the running broker, or None."""
        return self._proc.pid if self.running else None

    def server_properties(self) -> dict[str, str]:
        """The ``server.properties`` entries for the current ports and work folder."""
        data = self.work_dir / "data"
        props = {
            "process.roles": "broker,controller",
            "node.id": str(_NODE_ID),
            "controller.quorum.voters": f"{_NODE_ID}@127.0.0.1:{self.controller_port}",
            "listeners": (
                f"PLAINTEXT://127.0.0.1:{self.port},CONTROLLER://127.0.0.1:{self.controller_port}"
            ),
            "advertised.listeners": f"PLAINTEXT://127.0.0.1:{self.port}",
            "inter.broker.listener.name": "PLAINTEXT",
            "controller.listener.names": "CONTROLLER",
            "listener.security.protocol.map": "CONTROLLER:PLAINTEXT,PLAINTEXT:PLAINTEXT",
            "log.dirs": str(data),
            "num.partitions": "1",
            "default.replication.factor": "1",
            "min.insync.replicas": "1",
            "offsets.topic.replication.factor": "1",
            "offsets.topic.num.partitions": "1",
            "transaction.state.log.replication.factor": "1",
            "transaction.state.log.min.isr": "1",
            "transaction.state.log.num.partitions": "1",
            "share.coordinator.state.topic.replication.factor": "1",
            "share.coordinator.state.topic.min.isr": "1",
            "group.initial.rebalance.delay.ms": "0",
            # Tests create their topics; a typo in a topic name must fail, not
            # silently make a new topic.
            "auto.create.topics.enable": "false",
        }
        props.update(self.extra_properties)
        return props

    def _write_properties(self) -> Path:
        path = self.work_dir / "server.properties"
        lines = [f"{key}={value}" for key, value in self.server_properties().items()]
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        return path

    def _classpath(self) -> str:
        manifest = self.lib_dir / "MANIFEST"
        if not manifest.is_file():
            raise BrokerError(
                f"Kafka broker jars not found: {manifest} is missing. "
                f"Run `{FETCH_COMMAND}` (needs mvn and Maven Central)."
            )
        names = [line.split()[0] for line in manifest.read_text().splitlines()[1:] if line]
        missing = [n for n in names if not (self.lib_dir / n).is_file()]
        if missing:
            raise BrokerError(
                f"Kafka broker jars incomplete in {self.lib_dir}: {len(missing)} missing "
                f"(first: {missing[0]}). Run `{FETCH_COMMAND}`."
            )
        return str(self.lib_dir / "*")

    def _java_command(self, main: str, *args: str) -> list[str]:
        return [
            self.java,
            "-cp",
            self._classpath(),
            f"-Xmx{self.max_heap}",
            f"-Dlog4j2.configurationFile=file:{LOG_CONFIG}",
            main,
            *args,
        ]

    # -- logs -----------------------------------------------------------------------

    def log_tail(self, lines: int = 60) -> str:
        """The last ``lines`` lines of the broker's log, or a note that there is none."""
        if self.work_dir is None or not self.log_path.exists():
            return "(no broker log written)"
        text = self.log_path.read_text(encoding="utf-8", errors="replace").splitlines()
        return "\n".join(text[-lines:]) if text else "(broker log is empty)"

    def _error(self, problem: str) -> BrokerError:
        where = f" (work folder {self.work_dir})" if self.work_dir else ""
        return BrokerError(
            f"Kafka test broker{where}: {problem}\n--- broker log, last lines ---\n"
            f"{self.log_tail()}"
        )

    def _note(self, text: str) -> None:
        with open(self.log_path, "a", encoding="utf-8") as fh:
            fh.write(f"=== {time.strftime('%Y-%m-%dT%H:%M:%S')} {text} ===\n")

    # -- lifecycle ------------------------------------------------------------------

    def _prepare(self) -> None:
        """First start: work folder, ports, properties, formatted storage."""
        self.work_dir = Path(tempfile.mkdtemp(prefix="matcher-kafka-")).resolve()
        self.cluster_id = new_cluster_id()
        self._pick_ports_and_format()

    def _pick_ports_and_format(self) -> None:
        self.port = _free_port(set())
        self.controller_port = _free_port({self.port})
        data = self.work_dir / "data"
        if data.exists():
            _remove_tree(data)
        data.mkdir()
        props = self._write_properties()
        cmd = self._java_command(
            "kafka.tools.StorageTool", "format", "-t", self.cluster_id, "-c", str(props), "-g"
        )
        self._note("format: " + " ".join(cmd))
        t0 = time.monotonic()
        with open(self.log_path, "a", encoding="utf-8") as log:
            result = subprocess.run(
                cmd, stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
                timeout=120, check=False,
            )
        self.format_seconds = time.monotonic() - t0
        if result.returncode != 0:
            raise self._error(f"StorageTool format exited with status {result.returncode}")

    def start(self) -> KafkaBroker:
        """Start the broker and wait until a kafka-python client sees it.

        Returns
        -------
        KafkaBroker
            ``self``, for chaining.

        Raises
        ------
        BrokerError
            If the jars are missing, the process exits, or no client reaches it
            within ``start_timeout`` seconds; the message has the log tail.
        """
        if self.running:
            raise BrokerError(f"the broker is already running (pid {self._proc.pid})")
        first = self.work_dir is None
        if first:
            self._prepare()
        # Ports are picked free but only taken by Kafka a few seconds later; if
        # another process grabbed one meanwhile, pick new ones (first start only:
        # a restart must keep its address).
        attempts = 3 if first else 1
        for attempt in range(1, attempts + 1):
            try:
                self._launch_and_wait()
            except BrokerError as exc:
                if attempt == attempts or "Address already in use" not in str(exc):
                    raise
                self._note("a port was taken meanwhile: picking new ports")
                self._pick_ports_and_format()
            else:
                break
        return self

    def _launch_and_wait(self) -> None:
        cmd = self._java_command("kafka.Kafka", str(self.work_dir / "server.properties"))
        self._note("start: " + " ".join(cmd))
        self._log_file = open(self.log_path, "a", encoding="utf-8")
        t0 = time.monotonic()
        self._proc = subprocess.Popen(
            cmd,
            cwd=self.work_dir,
            stdin=subprocess.DEVNULL,
            stdout=self._log_file,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        _running.add(self)
        try:
            self._wait_ready(t0 + self.start_timeout)
        except BaseException:
            if self.running:
                self._signal_and_wait(signal.SIGKILL, 30)
            raise
        self.start_seconds.append(time.monotonic() - t0)

    def _wait_ready(self, deadline: float) -> None:
        """Wait for the listener, then for a client to see broker 1 unfenced."""
        from kafka import KafkaAdminClient

        # A plain TCP check first: a kafka-python client that fails to bootstrap
        # leaves its IO thread behind (kafka-python 3.0.12), so the client is only
        # made once something listens.
        while not _port_open(self.port):
            self._check_alive_and_time(deadline, "the client listener never opened")
            time.sleep(0.1)
        last_problem = "no answer"
        while True:
            self._check_alive_and_time(deadline, f"no client could see the broker ({last_problem})")
            remaining_ms = int(max(1.0, deadline - time.monotonic()) * 1000)
            try:
                admin = KafkaAdminClient(
                    bootstrap_servers=self.bootstrap,
                    client_id="matcher-test-broker-probe",
                    bootstrap_timeout_ms=min(remaining_ms, 10_000),
                    request_timeout_ms=min(remaining_ms, 10_000),
                )
            except Exception as exc:  # any client failure: retry until the deadline
                last_problem = f"{type(exc).__name__}: {exc}"
                time.sleep(0.2)
                continue
            try:
                while True:
                    try:
                        cluster = admin.describe_cluster()
                    except Exception as exc:
                        last_problem = f"{type(exc).__name__}: {exc}"
                    else:
                        brokers = {b["broker_id"]: b for b in cluster.get("brokers", [])}
                        node = brokers.get(_NODE_ID)
                        if node is not None and not node.get("is_fenced", False):
                            return
                        last_problem = f"cluster metadata without an unfenced broker: {cluster}"
                    self._check_alive_and_time(
                        deadline, f"no client could see the broker ({last_problem})"
                    )
                    time.sleep(0.1)
            finally:
                admin.close()

    def _check_alive_and_time(self, deadline: float, problem: str) -> None:
        status = self._proc.poll()
        if status is not None:
            self._close_log()
            raise self._error(f"the broker process exited with status {status} while starting")
        if time.monotonic() > deadline:
            raise self._error(f"not ready after {self.start_timeout:.0f} s: {problem}")

    def _signal_and_wait(self, sig: int, timeout: float) -> int | None:
        self._proc.send_signal(sig)
        try:
            return self._proc.wait(timeout)
        except subprocess.TimeoutExpired:
            return None
        finally:
            if self._proc.poll() is not None:
                self._close_log()

    def _close_log(self) -> None:
        if self._log_file is not None:
            self._log_file.close()
            self._log_file = None

    def stop(self) -> None:
        """Stop the broker cleanly (SIGTERM, Kafka's controlled shutdown).

        Raises
        ------
        BrokerError
            If it is still running after ``stop_timeout`` seconds (it is then
            killed), or if it exits with a status other than a clean stop.
        """
        if not self.running:
            return
        self._note(f"stop (SIGTERM) pid {self._proc.pid}")
        status = self._signal_and_wait(signal.SIGTERM, self.stop_timeout)
        if status is None:
            self._signal_and_wait(signal.SIGKILL, 30)
            raise self._error(f"did not stop within {self.stop_timeout:.0f} s; killed it")
        # 143 = 128 + SIGTERM: the JVM's exit status after its shutdown hooks ran.
        if status not in (0, 143):
            raise self._error(f"exited with status {status} on a clean stop")
        self._note(f"stopped with status {status}")

    def kill(self) -> None:
        """Kill the broker at once (SIGKILL), as a crash would; the data stays."""
        if not self.running:
            return
        self._note(f"kill (SIGKILL) pid {self._proc.pid}")
        if self._signal_and_wait(signal.SIGKILL, 30) is None:
            raise self._error("still running 30 s after SIGKILL")

    def restart(self) -> KafkaBroker:
        """Stop cleanly if running, then start again on the same ports and data."""
        self.stop()
        return self.start()

    def close(self) -> None:
        """Stop the broker and delete its work folder."""
        try:
            self.stop()
        finally:
            if self.running:
                self.kill()
            _running.discard(self)
            if self.work_dir is not None and self.work_dir.exists():
                _remove_tree(self.work_dir)

    def __enter__(self) -> KafkaBroker:
        return self.start()

    def __exit__(self, *exc_info) -> None:
        self.close()

    # -- topics ---------------------------------------------------------------------

    def create_topics(
        self,
        topics: Mapping[str, int],
        configs: Mapping[str, str] | None = None,
        timeout: float = 30.0,
    ) -> None:
        """Create topics and wait until every partition has a leader.

        Parameters
        ----------
        topics : Mapping[str, int]
            Topic name to number of partitions (replication factor is 1).
        configs : Mapping[str, str], optional
            Topic configuration applied to every topic created here
            (e.g. ``{"max.message.bytes": "10485760"}``).
        timeout : float
            Seconds for the creation and for the leaders to appear.
        """
        from kafka import KafkaAdminClient

        for name, partitions in topics.items():
            if not isinstance(partitions, int) or isinstance(partitions, bool) or partitions < 1:
                raise ValueError(f"topic {name!r}: partitions must be an int >= 1, got {partitions!r}")
        if not self.running:
            raise self._error("create_topics: the broker is not running")
        request = {
            name: {"num_partitions": n, "replication_factor": 1, "configs": dict(configs or {})}
            for name, n in topics.items()
        }
        admin = KafkaAdminClient(
            bootstrap_servers=self.bootstrap,
            client_id="matcher-test-admin",
            bootstrap_timeout_ms=int(timeout * 1000),
            request_timeout_ms=int(timeout * 1000),
        )
        try:
            admin.create_topics(request, timeout_ms=int(timeout * 1000))
            admin.wait_for_topics(list(topics), timeout_ms=int(timeout * 1000))
        finally:
            admin.close()


def _remove_tree(path: Path) -> None:
    shutil.rmtree(path, ignore_errors=True)


@atexit.register
def _kill_leftovers() -> None:
    """Never leave a broker running when the Python process ends."""
    for broker in list(_running):
        if broker.running:
            broker._proc.kill()
            broker._proc.wait(30)


@pytest.fixture(scope="session")
def kafka_broker():
    """One real Kafka broker for the whole test session.

    Tests that stop or kill it must start it again (``try``/``finally``) so the
    tests after them find it running; ports and data are kept across restarts.
    """
    broker = KafkaBroker()
    try:
        broker.start()
        yield broker
    finally:
        broker.close()


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item, call):
    """Attach the broker's log tail to the report of a failed test that used it."""
    outcome = yield
    report = outcome.get_result()
    broker = getattr(item, "funcargs", {}).get("kafka_broker")
    if report.failed and isinstance(broker, KafkaBroker):
        report.sections.append(("kafka broker log (last lines)", broker.log_tail(80)))
