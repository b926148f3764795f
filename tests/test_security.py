"""Security properties: no unsafe deserialisation or dynamic code, Kafka secrets, the HTTP surface.

- Source scan: nothing in the packages stream/, models/, replay_data/ imports pickle & co.,
  evaluates code, imports dynamically, loads numpy arrays with pickles, or runs a shell.
  (tests/test_state.py has the older, state-module-only version of this scan.)
- Kafka TLS and SASL (PLAIN, SCRAM-SHA-256, SCRAM-SHA-512) settings pass from the configuration
  (TOML, SHIFTSIEVE_KAFKA_* variables, kafka.sasl_password_file) to kafka-python's keyword
  arguments ("KafkaConsumer / KafkaProducer configuration parameters" of kafka-python); the
  password is masked by `config check`, in reprs and in every log record, kafka-python's included.
- The HTTP endpoints serve /metrics, /healthz and /readyz and nothing else.
"""

from __future__ import annotations

import ast
import logging
import os
import socket
import struct
import threading
import time
from pathlib import Path

import pytest

from conftest import recv_exactly
from shiftsieve.stream import endpoints as endpoints_module
from shiftsieve.stream.cli import main
from shiftsieve.stream.config import ENV_PREFIX, SCHEMA, ConfigError, load_config
from shiftsieve.stream.endpoints import DEFAULT_LISTEN, Endpoints
from shiftsieve.stream.kafka import KafkaSettings, KafkaSource

ROOT = Path(__file__).resolve().parent.parent
PACKAGES = ("stream", "models", "replay_data")
URL = "kafka://h:9092/topic?group=g"
PASSWORD = "Pw-7f3a9c-not-for-logs"


@pytest.fixture
def env(monkeypatch):
    """os.environ without SHIFTSIEVE_ configuration (the CLI reads os.environ)."""
    for name in list(os.environ):
        if name.startswith(ENV_PREFIX):
            monkeypatch.delenv(name)
    return monkeypatch


# =================================================================================================
# Source scan
# =================================================================================================
#: modules that deserialise arbitrary objects or import code by name
BANNED_MODULES = {"pickle", "cPickle", "_pickle", "cloudpickle", "dill", "joblib", "marshal", "shelve", "importlib"}
#: importlib.resources is allowed to locate package data: resources.files("<literal package>") only;
#: importlib.metadata reads the installed distribution's metadata (`--version`) and loads no code
ALLOWED_SUBMODULES = {"importlib.resources", "importlib.metadata"}
BANNED_CALLS = {"eval", "exec", "compile", "__import__"}
BANNED_ATTRIBUTE_CALLS = {
    ("os", "system"), ("os", "popen"), ("subprocess", "getoutput"), ("subprocess", "getstatusoutput"),
    ("yaml", "load"), ("yaml", "unsafe_load"), ("yaml", "full_load"), ("yaml", "load_all"),
    ("pd", "read_pickle"), ("pandas", "read_pickle"), ("builtins", "eval"), ("builtins", "exec"),
    ("builtins", "compile"), ("builtins", "__import__"), ("importlib", "import_module"),
}


def _problems(source: str, filename: str = "<src>") -> list[str]:
    """What the scan objects to in one module, as 'file:line: reason'."""
    tree = ast.parse(source, filename)
    out: list[str] = []
    resource_names: set[str] = set()   # local names bound to importlib.resources

    def flag(node: ast.AST, why: str) -> None:
        out.append(f"{filename}:{getattr(node, 'lineno', '?')}: {why}")

    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name in ALLOWED_SUBMODULES:
                    resource_names.add(alias.asname or alias.name)
                elif alias.name.split(".")[0] in BANNED_MODULES:
                    flag(node, f"import {alias.name}")
        elif isinstance(node, ast.ImportFrom):
            module = node.module or ""
            for alias in node.names:
                full = f"{module}.{alias.name}"
                if full in ALLOWED_SUBMODULES or module in ALLOWED_SUBMODULES:
                    resource_names.add(alias.asname or alias.name)
                elif module.split(".")[0] in BANNED_MODULES:
                    flag(node, f"from {module} import {alias.name}")
        elif isinstance(node, ast.Call):
            func = node.func
            keywords = {k.arg: k.value for k in node.keywords}
            if isinstance(func, ast.Name) and func.id in BANNED_CALLS:
                flag(node, f"call of {func.id}()")
            if isinstance(func, ast.Attribute):
                owner = ast.unparse(func.value)
                if (owner, func.attr) in BANNED_ATTRIBUTE_CALLS:
                    flag(node, f"call of {owner}.{func.attr}()")
                if func.attr == "load" and owner in ("np", "numpy"):
                    ap = keywords.get("allow_pickle")
                    if not (isinstance(ap, ast.Constant) and ap.value is False):
                        flag(node, f"{owner}.load() without allow_pickle=False")
                if owner in resource_names and func.attr != "files":
                    flag(node, f"importlib.resources.{func.attr}() (only files() is allowed)")
                if owner in resource_names and not all(isinstance(a, ast.Constant) for a in node.args):
                    flag(node, "importlib.resources.files() of a computed package name")
            if "shell" in keywords and not (isinstance(keywords["shell"], ast.Constant)
                                            and keywords["shell"].value is False):
                flag(node, f"{ast.unparse(func)}(shell=...)")
            if isinstance(func, ast.Attribute) and ast.unparse(func.value) == "os" and \
                    func.attr.startswith(("exec", "spawn")):
                flag(node, f"os.{func.attr}()")
    return out


def _package_files() -> list[Path]:
    files = []
    for package in PACKAGES:
        directory = ROOT / package
        assert (directory / "__init__.py").is_file(), f"{directory} is not a package"
        files += sorted(directory.rglob("*.py"))
    return files


def test_no_pickle_eval_dynamic_import_or_shell_in_the_packages():
    files = _package_files()
    assert len(files) >= 20, files   # the scan sees the code (a moved tree would pass vacuously)
    problems = [p for f in files for p in _problems(f.read_text(encoding="utf-8"), str(f.relative_to(ROOT)))]
    assert problems == []


def test_importlib_resources_is_used_only_to_locate_package_data():
    # the allowed uses: stream/demo.py locates the bundled replay_data files, stream/cli.py reads the
    # installed version (importlib.metadata); without them, ban importlib too
    users = [f for f in _package_files() if "importlib" in f.read_text(encoding="utf-8")]
    assert [f.relative_to(ROOT).as_posix() for f in users] == ["stream/cli.py", "stream/demo.py"]
    assert 'resources.files("shiftsieve.replay_data")' in (ROOT / "stream" / "demo.py").read_text()
    cli = (ROOT / "stream" / "cli.py").read_text()
    assert [line.strip() for line in cli.splitlines() if "importlib" in line] == \
        ["from importlib.metadata import PackageNotFoundError, version"]


@pytest.mark.parametrize("snippet", [
    "import pickle", "import cPickle as p", "from pickle import loads", "import dill", "import marshal",
    "import shelve", "import importlib", "from importlib import import_module", "import importlib.util",
    "import joblib", "eval('1')", "exec('x = 1')", "compile('1', 'f', 'eval')", "__import__('os')",
    "import builtins\nbuiltins.eval('1')", "import numpy as np\nnp.load('f')",
    "import numpy as np\nnp.load('f', allow_pickle=True)", "import numpy\nnumpy.load('f', allow_pickle=flag)",
    "import yaml\nyaml.load(s)", "import subprocess\nsubprocess.run('ls', shell=True)",
    "import subprocess\nsubprocess.Popen(cmd, shell=use_shell)", "import os\nos.system('ls')",
    "import os\nos.popen('ls')", "import os\nos.execvp('ls', ['ls'])",
    "from importlib import resources\nresources.read_text('p', 'f')",
    "from importlib import resources\nresources.files(name)",
])
def test_the_scan_catches(snippet):
    assert _problems(snippet)


@pytest.mark.parametrize("snippet", [
    "import re\nre.compile('x')", "import numpy as np\nnp.load(f, allow_pickle=False)",
    "from importlib import resources\nresources.files('shiftsieve.replay_data')",
    "import subprocess\nsubprocess.run(['ls'], shell=False)", "import json\njson.loads(s)",
    "model.eval_score = 1", "x.load()",
])
def test_the_scan_allows(snippet):
    assert _problems(snippet) == []


# =================================================================================================
# Kafka TLS and SASL: configuration -> kafka-python, masking
# =================================================================================================
MECHANISMS = ("PLAIN", "SCRAM-SHA-256", "SCRAM-SHA-512")
SOURCES = ("toml", "env", "file")


def _tls_files(tmp_path: Path) -> dict[str, str]:
    files = {}
    for key in ("ssl_cafile", "ssl_certfile", "ssl_keyfile"):
        path = tmp_path / f"{key}.pem"
        path.write_text("-----BEGIN CERTIFICATE-----\n(test)\n-----END CERTIFICATE-----\n")
        files[key] = str(path)
    return files


def _secure_config(tmp_path: Path, monkeypatch, mechanism: str, source: str, password: str = PASSWORD,
                   protocol: str = "SASL_SSL"):
    """A config file for SASL over TLS, the password from `source`; returns (path, tls files)."""
    tls = _tls_files(tmp_path)
    lines = ["[kafka]", f'security_protocol = "{protocol}"', f'sasl_mechanism = "{mechanism}"',
             'sasl_username = "svc-shiftsieve"', *(f'{k} = "{v}"' for k, v in tls.items())]
    if source == "toml":
        lines.append(f'sasl_password = "{password}"')
    elif source == "env":
        monkeypatch.setenv("SHIFTSIEVE_KAFKA_SASL_PASSWORD", password)
    else:
        secret = tmp_path / "sasl_password"
        secret.write_text(password + "\n")   # as a mounted secret often ends: the newline is not part of it
        lines.append(f'sasl_password_file = "{secret}"')
    path = tmp_path / "shiftsieve.toml"
    path.write_text("\n".join(lines) + "\n")
    return path, tls


@pytest.mark.parametrize("source", SOURCES)
@pytest.mark.parametrize("mechanism", MECHANISMS)
def test_tls_and_sasl_reach_the_kafka_python_keyword_arguments(mechanism, source, tmp_path, env):
    from kafka import KafkaConsumer, KafkaProducer
    path, tls = _secure_config(tmp_path, env, mechanism, source)
    settings = load_config(path).kafka_settings(URL)
    expected = {"security_protocol": "SASL_SSL", "sasl_mechanism": mechanism,
                "sasl_plain_username": "svc-shiftsieve", "sasl_plain_password": PASSWORD, **tls}
    for kwargs, cls in ((settings.consumer_kwargs(), KafkaConsumer), (settings.producer_kwargs(), KafkaProducer)):
        assert {k: kwargs.get(k) for k in expected} == expected
        assert kwargs["bootstrap_servers"] == ["h:9092"]
        # every key is one of kafka-python's configuration parameters (a misspelt one would raise there)
        assert set(kwargs) <= set(cls.DEFAULT_CONFIG), set(kwargs) - set(cls.DEFAULT_CONFIG)
    for text in (repr(settings), str(settings), f"{settings}", f"{settings!r}"):
        assert PASSWORD not in text and "***" in text


def test_tls_without_sasl(tmp_path, env):
    tls = _tls_files(tmp_path)
    path = tmp_path / "c.toml"
    path.write_text('[kafka]\nsecurity_protocol = "SSL"\n' + "".join(f'{k} = "{v}"\n' for k, v in tls.items()))
    kwargs = load_config(path).kafka_settings(URL).consumer_kwargs()
    assert kwargs["security_protocol"] == "SSL" and {k: kwargs[k] for k in tls} == tls
    assert "sasl_mechanism" not in kwargs and "sasl_plain_password" not in kwargs


@pytest.mark.parametrize("source", SOURCES)
def test_config_check_masks_the_password_from_every_source(source, tmp_path, env, capsys):
    path, _ = _secure_config(tmp_path, env, "SCRAM-SHA-512", source)
    assert main(["config", "check", str(path)]) == 0
    captured = capsys.readouterr()
    assert PASSWORD not in captured.out + captured.err
    [line] = [ln for ln in captured.out.splitlines() if ln.startswith("sasl_password =")]
    assert line.startswith('sasl_password = "***"  # '), line
    if source == "file":
        assert "kafka.sasl_password_file" in line   # where the effective password came from


def test_password_file_content_wins_and_is_stripped(tmp_path, env):
    path, _ = _secure_config(tmp_path, env, "PLAIN", "file", password="  from-file  ")
    env.setenv("SHIFTSIEVE_KAFKA_SASL_PASSWORD", "from-env")
    assert load_config(path).kafka_settings(URL).sasl_password == "from-file"


def test_a_missing_password_file_is_a_one_line_error_naming_the_key(tmp_path, env, capsys):
    path, _ = _secure_config(tmp_path, env, "PLAIN", "file")
    secret = tmp_path / "sasl_password"
    config = load_config(path)
    secret.unlink()
    assert main(["config", "check", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("shiftsieve: error: kafka.sasl_password_file") and err.count("\n") == 1
    assert str(secret) in err and "No such file" in err
    with pytest.raises(ConfigError) as info:   # gone between loading and connecting (Config.kafka_settings)
        config.kafka_settings(URL)
    assert str(info.value).startswith("kafka.sasl_password_file") and "\n" not in str(info.value)
    env.setenv("SHIFTSIEVE_KAFKA_SASL_PASSWORD_FILE", str(tmp_path / "other"))
    assert main(["config", "check", str(path)]) == 2
    err = capsys.readouterr().err
    assert "kafka.sasl_password_file (SHIFTSIEVE_KAFKA_SASL_PASSWORD_FILE)" in err and err.count("\n") == 1


def test_an_empty_password_file_is_refused(tmp_path, env):
    path, _ = _secure_config(tmp_path, env, "PLAIN", "file")
    (tmp_path / "sasl_password").write_text("\n")
    with pytest.raises(ConfigError, match="kafka.sasl_password_file"):
        load_config(path)


def test_the_password_appears_in_no_config_error(tmp_path, env, capsys):
    # a secret in the wrong place or of the wrong type is still a secret
    for value in (f'["{PASSWORD}"]', f'{{ x = "{PASSWORD}" }}'):
        text = f"[kafka]\nsasl_password = {value}\n"
        path = tmp_path / "bad.toml"
        path.write_text(text)
        assert main(["config", "check", str(path)]) == 2
        err = capsys.readouterr().err
        assert "kafka.sasl_password" in err and PASSWORD not in err and err.count("\n") == 1


# =================================================================================================
# Kafka: the password is never logged
# =================================================================================================
def _assert_not_logged(caplog, source: KafkaSource, password: str) -> None:
    formatter = logging.Formatter("%(name)s %(levelname)s %(message)s")
    assert caplog.records, "kafka-python logged nothing at DEBUG: the check would be vacuous"
    for record in caplog.records:
        assert password not in formatter.format(record), (record.name, record.getMessage()[:200])
    assert password not in caplog.text
    assert password not in (source.last_error or "")
    assert password not in repr(source)


@pytest.mark.parametrize("mechanism", MECHANISMS)
def test_an_unreachable_broker_logs_no_password(mechanism, caplog):
    caplog.set_level(logging.DEBUG)   # root: kafka-python's loggers included
    password = f"{PASSWORD}-{mechanism}"
    settings = KafkaSettings(bootstrap=("127.0.0.1:1",), topic="t", group="g", api_version=(2, 5, 0),
                             security_protocol="SASL_PLAINTEXT", sasl_mechanism=mechanism,
                             sasl_username="svc", sasl_password=password)
    source = KafkaSource(settings)
    try:
        for _ in range(2):
            assert source.poll(0.2) == []   # never raises
    finally:
        source.close()
    assert not source.connected   # it did try (and fail) to reach the broker: see the records
    _assert_not_logged(caplog, source, password)


class _SaslOnlyBroker:
    """A loopback server that speaks just enough Kafka for a client to send its SASL credentials.

    It answers ApiVersions, SaslHandshake (offering PLAIN) and SaslAuthenticate (refusing), with
    kafka-python's own protocol classes. kafka-python 3.0.12 logs every request it sends at DEBUG
    (kafka.net.connection "Request N: SaslAuthenticateRequest(auth_bytes=b'user\\x00user\\x00PASSWORD')"
    and kafka.protocol.parser "Send: <bytes>"): this is the path on which the password would leak.
    """

    def __init__(self) -> None:
        self.sock = socket.create_server(("127.0.0.1", 0))
        self.port = self.sock.getsockname()[1]
        self.authentications = 0
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while True:
            try:
                conn, _ = self.sock.accept()
            except OSError:
                return
            threading.Thread(target=self._serve, args=(conn,), daemon=True).start()

    def _serve(self, conn: socket.socket) -> None:
        from kafka.protocol.metadata.api_versions import ApiVersionsResponse
        from kafka.protocol.sasl import SaslAuthenticateResponse, SaslHandshakeResponse
        version = ApiVersionsResponse.ApiVersion
        try:
            with conn:
                while True:
                    (size,) = struct.unpack(">i", recv_exactly(conn, 4))
                    api_key, api_version, correlation_id = struct.unpack(">hhi", recv_exactly(conn, size)[:8])
                    if api_key == 18:      # ApiVersions
                        response = ApiVersionsResponse(version=api_version, error_code=0, throttle_time_ms=0, api_keys=[
                            version(api_key=18, min_version=0, max_version=3),
                            version(api_key=17, min_version=0, max_version=1),
                            version(api_key=36, min_version=0, max_version=2),
                            version(api_key=3, min_version=0, max_version=9)])
                    elif api_key == 17:    # SaslHandshake
                        response = SaslHandshakeResponse(version=api_version, error_code=0, mechanisms=["PLAIN"])
                    elif api_key == 36:    # SaslAuthenticate: 58 = SASL_AUTHENTICATION_FAILED
                        self.authentications += 1
                        response = SaslAuthenticateResponse(version=api_version, error_code=58,
                                                            error_message="authentication failed", auth_bytes=b"")
                    else:
                        return
                    response.with_header(correlation_id=correlation_id)
                    conn.sendall(response.encode(header=True, framed=True))
        except (EOFError, OSError):
            pass

    def close(self) -> None:
        self.sock.close()


@pytest.mark.parametrize("password", [PASSWORD, "p'a\"ss-é-\\-Ω"])
def test_kafka_python_debug_logs_do_not_show_the_sasl_plain_password(password, caplog):
    broker = _SaslOnlyBroker()
    caplog.set_level(logging.DEBUG)
    settings = KafkaSettings(bootstrap=(f"127.0.0.1:{broker.port}",), topic="t", group="g",
                             api_version=(2, 5, 0), security_protocol="SASL_PLAINTEXT",
                             sasl_mechanism="PLAIN", sasl_username="svc", sasl_password=password)
    source = KafkaSource(settings)
    try:
        deadline = time.monotonic() + 5
        while broker.authentications == 0 and time.monotonic() < deadline:
            source.poll(0.2)
    finally:
        source.close()
        broker.close()
    assert broker.authentications >= 1, "the client never sent its credentials: the check would be vacuous"
    # kafka-python did log the authentication request -- with the password masked
    assert any("SaslAuthenticateRequest" in r.getMessage() and "***" in r.getMessage() for r in caplog.records)
    escaped = repr(password.encode())[2:-1]
    for record in caplog.records:
        assert escaped not in record.getMessage() and password not in record.getMessage(), record.getMessage()[:300]
    _assert_not_logged(caplog, source, password)


def test_the_producer_path_redacts_too_and_other_records_are_untouched(caplog):
    # KafkaSink builds its producer from producer_kwargs(): the filter is installed from there as well
    password = "sink-Pw-4e1d"
    KafkaSettings(bootstrap=("h:9092",), topic="t", group="g", security_protocol="SASL_SSL",
                  sasl_mechanism="PLAIN", sasl_username="u", sasl_password=password).producer_kwargs()
    caplog.set_level(logging.DEBUG)
    for name in ("kafka.net.connection", "kafka.protocol.parser"):   # the loggers that show request payloads
        logging.getLogger(name).debug("Request 3: %r", b"u\x00u\x00" + password.encode())
        logging.getLogger(name).debug("Send: %s", password)
    logging.getLogger("kafka.net.connection").info("Connected to %s", "broker-1")
    assert password not in caplog.text and caplog.text.count("***") == 4
    assert caplog.records[-1].getMessage() == "Connected to broker-1"


# =================================================================================================
# HTTP endpoints
# =================================================================================================
EXPOSITION = b"# HELP up test\n# TYPE up gauge\nup 1\n"


@pytest.fixture(scope="module")
def _shared_server():
    state = {"ready": True}
    endpoints = Endpoints("127.0.0.1:0", lambda: EXPOSITION, lambda: state["ready"]).start()
    endpoints.state = state
    yield endpoints
    endpoints.stop()   # (takes up to serve_forever's 0.5 s poll interval: once per module)


@pytest.fixture
def server(_shared_server):
    """One server for the module -- every test also shows the ones before did not break it."""
    _shared_server.state["ready"] = True
    yield _shared_server
    assert _shared_server.thread.is_alive()


def _raw(endpoints: Endpoints, data: bytes, timeout: float = 5.0) -> tuple[int, dict[str, str], bytes]:
    """Send bytes, read the whole response (HTTP/1.0: the server closes), return (status, headers, body)."""
    host, port = endpoints.server.server_address[:2]
    with socket.create_connection((host, port), timeout=timeout) as s:
        s.sendall(data)
        response = b""
        while chunk := s.recv(65536):
            response += chunk
    if not response.startswith(b"HTTP/"):   # an HTTP/0.9-style answer (no status line): "400 Bad ..."
        return int(response.split()[0]), {}, response
    head, _, body = response.partition(b"\r\n\r\n")
    status_line, *header_lines = head.decode("latin-1").split("\r\n")
    headers = {}
    for line in header_lines:
        name, _, value = line.partition(":")
        headers[name.strip().lower()] = value.strip()
    return int(status_line.split()[1]), headers, body


def _get(endpoints: Endpoints, target: str, method: str = "GET") -> tuple[int, dict[str, str], bytes]:
    return _raw(endpoints, f"{method} {target} HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n".encode())


def test_the_three_endpoints(server):
    status, headers, body = _get(server, "/metrics")
    # Prometheus exposition formats: the text format is "text/plain; version=0.0.4"
    assert status == 200 and body == EXPOSITION
    assert headers["content-type"] == "text/plain; version=0.0.4; charset=utf-8"
    assert headers["content-length"] == str(len(EXPOSITION))
    assert _get(server, "/healthz")[:1] == (200,)
    assert _get(server, "/readyz")[0] == 200
    server.state["ready"] = False
    assert _get(server, "/readyz")[0] == 503


def test_head_is_get_without_a_body(server):
    status, headers, body = _get(server, "/metrics", "HEAD")
    assert status == 200 and body == b"" and headers["content-length"] == str(len(EXPOSITION))


@pytest.mark.parametrize("target", [
    "/", "/index.html", "/metrics/", "/metrics/x", "/metricsx", "/METRICS", "/../etc/passwd", "/metrics/../x",
    "/%2e%2e/etc/passwd", "/%2E%2E%2Fetc%2Fpasswd", "/metrics/%2e%2e/%2e%2e/etc/passwd", "/..%2f..%2fetc/passwd",
    "/etc/passwd", "/%00", "/favicon.ico", "/debug/pprof", "http://evil.example/x", "*",
])
def test_every_other_path_is_404(server, target):
    status, headers, body = _get(server, target)
    assert status == 404 and body == b"not found\n"


@pytest.mark.parametrize("target,status", [
    ("/metrics?name[]=up", 200), ("/metrics?x=../../etc/passwd", 200), ("/healthz?probe=1", 200),
    ("/readyz?", 200), ("/nothing?x=1", 404), ("/metrics/?x", 404),
])
def test_a_query_string_is_ignored(server, target, status):
    # Prometheus may add scrape `params`; the answer is the same with or without them
    code, headers, body = _get(server, target)
    assert code == status
    if target.startswith("/metrics?"):
        assert body == EXPOSITION and headers["content-type"].startswith("text/plain; version=0.0.4")


@pytest.mark.parametrize("method", ["POST", "PUT", "DELETE", "PATCH", "OPTIONS", "TRACE", "CONNECT"])
def test_other_methods_are_405_with_allow(server, method):
    # RFC 9110 15.5.6 405 Method Not Allowed: the origin server MUST send Allow
    for target in ("/metrics", "/healthz", "/nothing"):
        status, headers, body = _raw(server, f"{method} {target} HTTP/1.1\r\nHost: x\r\nContent-Length: 4\r\n"
                                             f"Connection: close\r\n\r\nabcd".encode())
        assert status == 405 and headers["allow"] == "GET, HEAD" and b"abcd" not in body


def test_an_unknown_method_is_501_in_plain_text(server):
    # RFC 9110 15.6.2 501 Not Implemented: a method the server does not recognise
    status, headers, body = _get(server, "/metrics", "BREW")
    assert status == 501 and headers["content-type"].startswith("text/plain") and b"<" not in body


def test_no_server_header_leaks_versions(server):
    for response in (_get(server, "/metrics"), _get(server, "/nothing"), _get(server, "/x", "BREW")):
        assert response[1]["server"] == "shiftsieve"
        assert "python" not in str(response[1]).lower() and "basehttp" not in str(response[1]).lower()


@pytest.mark.parametrize("request_bytes,status", [
    (b"GET /" + b"a" * 70_000 + b" HTTP/1.1\r\n\r\n", 414),                       # request line
    (b"GET /metrics HTTP/1.1\r\nX-Big: " + b"a" * 70_000 + b"\r\n\r\n", 431),      # one header line
    (b"GET /metrics HTTP/1.1\r\n" + b"X-Many: a\r\n" * 200 + b"\r\n", 431),        # too many headers
    (b"\x16\x03\x01\x02\x00\x01\x00\x01\xfc\x03\x03" + b"\x00" * 64 + b"\r\n\r\n", 400),  # a TLS hello
    (b"GET\r\n\r\n", 400),
])
def test_oversized_or_garbled_requests_are_refused_and_the_server_lives_on(server, request_bytes, status):
    assert _raw(server, request_bytes)[0] == status
    assert _get(server, "/healthz")[0] == 200


def test_a_silent_client_blocks_no_one_and_is_dropped(monkeypatch):
    assert endpoints_module.REQUEST_TIMEOUT_S is not None and 0 < endpoints_module.REQUEST_TIMEOUT_S <= 60
    monkeypatch.setattr(endpoints_module, "REQUEST_TIMEOUT_S", 0.5)
    endpoints = Endpoints("127.0.0.1:0", lambda: EXPOSITION, lambda: True).start()
    try:
        host, port = endpoints.server.server_address[:2]
        silent = [socket.create_connection((host, port)) for _ in range(20)]   # > the old backlog of 5
        partial = socket.create_connection((host, port))
        partial.sendall(b"GET /metrics HTTP/1.1\r\nHost: x\r\n")   # never finishes its headers
        started = time.monotonic()
        assert _get(endpoints, "/metrics")[0] == 200
        assert time.monotonic() - started < 0.4   # answered while the others hang on
        for s in [*silent, partial]:
            s.settimeout(5)
            assert s.recv(1024) == b""   # closed by the server after its timeout, not held for ever
            s.close()
        assert time.monotonic() - started < 5
    finally:
        endpoints.stop()


def test_the_bind_address_is_the_one_asked_for():
    endpoints = Endpoints("127.0.0.1:0", lambda: b"", lambda: True)
    try:
        host, port = endpoints.server.socket.getsockname()[:2]
        assert host == "127.0.0.1" and port > 0 and endpoints.address == f"127.0.0.1:{port}"
        other = _non_loopback_ipv4()
        if other is not None:   # the same port on another interface of this host is not served
            with pytest.raises(OSError):
                socket.create_connection((other, port), timeout=1).close()
    finally:
        endpoints.stop()
    blank = Endpoints(":0", lambda: b"", lambda: True)   # no host: loopback, not every interface
    try:
        assert blank.server.socket.getsockname()[0] == "127.0.0.1"
    finally:
        blank.stop()


def _non_loopback_ipv4() -> str | None:
    try:
        with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
            s.connect(("192.0.2.1", 9))   # TEST-NET-1: picks the outgoing interface, sends nothing
            address = s.getsockname()[0]
    except OSError:
        return None
    return None if address.startswith("127.") or address == "0.0.0.0" else address


def test_an_ipv6_literal_binds_ipv6():
    if not socket.has_ipv6:
        pytest.skip("no IPv6 in this Python")
    try:
        endpoints = Endpoints("[::1]:0", lambda: EXPOSITION, lambda: True).start()
    except OSError as exc:
        pytest.skip(f"no IPv6 loopback here: {exc}")
    try:
        host, port = endpoints.server.socket.getsockname()[:2]
        assert host == "::1" and endpoints.address == f"[::1]:{port}"
        with socket.create_connection(("::1", port), timeout=5) as s:
            s.sendall(b"GET /healthz HTTP/1.0\r\n\r\n")
            assert s.recv(100).startswith(b"HTTP/1.0 200")
    finally:
        endpoints.stop()


def test_the_default_listen_address_is_loopback_and_documented():
    [setting] = [s for s in SCHEMA if (s.section, s.key) == ("http", "listen")]
    assert setting.default == DEFAULT_LISTEN and DEFAULT_LISTEN.startswith("127.0.0.1:")
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert DEFAULT_LISTEN in readme and "loopback" in readme and "/metrics" in readme
