"""Static checks of deploy/: the image, the compose stack, the Kubernetes manifests, Prometheus,
Alertmanager and the OpenTelemetry Collector configuration, against the code they deploy (no container
engine runs here; tests/test_alert_delivery.py runs Prometheus and Alertmanager with these files).

References: the Dockerfile reference (instructions, line continuations, exec form = a JSON array),
the Compose specification, the Kubernetes API (apps/v1 Deployment, policy/v1 PodDisruptionBudget,
monitoring.coreos.com/v1 ServiceMonitor), Prometheus' own promtool, Alertmanager's own amtool,
kustomize (kubectl kustomize), and the code's own schema, CLI parser and HTTP endpoints for names,
ports and paths.
"""

from __future__ import annotations

import json
import os
import re
import shlex
import shutil
import subprocess
import urllib.error
import urllib.request
from pathlib import Path

import pytest
import yaml

from conftest import required_tool
from shiftsieve.stream.cli import _parser, main
from shiftsieve.stream.config import SCHEMA, load_config
from shiftsieve.stream.endpoints import Endpoints, parse_listen
from shiftsieve.stream.kafka import parse_kafka_url
from shiftsieve.stream.otlp import decode_otlp

DEPLOY = Path(__file__).parent.parent / "deploy"
K8S = DEPLOY / "k8s"
TOML = DEPLOY / "config" / "shiftsieve.toml"
OTLP_SAMPLE = Path(__file__).parent / "data" / "otlp_gauge_sum.json"
SETTINGS = {s.env: s for s in SCHEMA}
DEFAULT_PORT = parse_listen(next(s.default for s in SCHEMA if (s.section, s.key) == ("http", "listen")))[1]
STATE_DIR = load_config(TOML, environ={}).state.directory
ENDPOINT_PATHS = ("/metrics", "/healthz", "/readyz")


# --- parsing --------------------------------------------------------------------------------------

def yaml_files() -> list[Path]:
    return sorted(p for p in DEPLOY.rglob("*") if p.suffix in (".yml", ".yaml"))


def load_yaml(path: Path) -> list:
    return [d for d in yaml.safe_load_all(path.read_text()) if d is not None]


def dockerfile(path: Path = DEPLOY / "Dockerfile") -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) per instruction: comments dropped, backslash continuations joined
    (Dockerfile reference: a comment line inside a continuation is removed, not ended on)."""
    instructions, pending = [], ""
    for line in path.read_text().splitlines():
        if line.lstrip().startswith("#") or (not line.strip() and not pending):
            continue
        if line.rstrip().endswith("\\"):
            pending += line.rstrip()[:-1] + " "
            continue
        text = (pending + line).strip()
        pending = ""
        if text:
            word, _, rest = text.partition(" ")
            instructions.append((word.upper(), rest.strip()))
    assert not pending, "Dockerfile ends inside a line continuation"
    return instructions


def exec_form(arguments: str) -> list[str]:
    """The JSON array of an exec-form instruction; fails on the shell form."""
    assert arguments.startswith("["), f"not exec form (a JSON array): {arguments}"
    argv = json.loads(arguments)
    assert isinstance(argv, list) and all(isinstance(a, str) for a in argv)
    return argv


def args_of(instructions: list[tuple[str, str]], name: str) -> list[str]:
    return [a for i, a in instructions if i == name]


def healthcheck_argv(arguments: str) -> list[str]:
    options, _, command = arguments.partition("CMD ")
    assert all(o.startswith("--") for o in options.split()), arguments
    return exec_form(command.strip())


def compose() -> dict:
    [doc] = load_yaml(DEPLOY / "compose.yaml")
    return doc


def shiftsieve_services() -> dict[str, dict]:
    """Compose services that run the shiftsieve image (the Dockerfile built here)."""
    return {name: s for name, s in compose()["services"].items()
            if s.get("build", {}).get("dockerfile") == "deploy/Dockerfile"}


def k8s_documents() -> list[dict]:
    return [d for p in sorted(K8S.rglob("*.yaml")) if p.name != "kustomization.yaml" for d in load_yaml(p)]


def k8s_one(kind: str) -> dict:
    [doc] = [d for d in k8s_documents() if d["kind"] == kind]
    return doc


def deployment_container() -> dict:
    [container] = k8s_one("Deployment")["spec"]["template"]["spec"]["containers"]
    return container


def image_env() -> dict[str, str]:
    env = {}
    for arguments in args_of(dockerfile(), "ENV"):
        env.update(dict(pair.split("=", 1) for pair in shlex.split(arguments)))
    return env


def url_port_path(url: str) -> tuple[int, str]:
    m = re.fullmatch(r"http://127\.0\.0\.1:(\d+)(/\S*)", url)
    assert m, url
    return int(m.group(1)), m.group(2)


def urls_in(argv: list[str]) -> list[str]:
    return re.findall(r"http://[^'\"\s]+", " ".join(argv))


# --- every file parses ----------------------------------------------------------------------------

def test_every_yaml_file_parses() -> None:
    files = yaml_files()
    assert {DEPLOY / "compose.yaml", DEPLOY / "otel-collector.yaml", K8S / "kustomization.yaml"} <= set(files)
    for path in files:
        assert load_yaml(path), f"{path} holds no document"


def test_dockerfile_parses_into_known_instructions() -> None:
    # the instruction set of the Dockerfile reference
    known = {"FROM", "RUN", "CMD", "LABEL", "EXPOSE", "ENV", "ADD", "COPY", "ENTRYPOINT", "VOLUME", "USER",
             "WORKDIR", "ARG", "ONBUILD", "STOPSIGNAL", "HEALTHCHECK", "SHELL"}
    instructions = dockerfile()
    assert instructions and {i for i, _ in instructions} <= known


def test_dockerfile_parser_joins_continuations_and_reads_exec_form(tmp_path) -> None:
    sample = tmp_path / "Dockerfile"
    sample.write_text('FROM a AS b\nRUN x \\\n# dropped\n    && y\n\nCMD ["run", "--x"]\n')
    assert [(i, a.split()) for i, a in dockerfile(sample)] == [
        ("FROM", ["a", "AS", "b"]), ("RUN", ["x", "&&", "y"]), ("CMD", ['["run",', '"--x"]'])]
    assert exec_form('["run", "--x"]') == ["run", "--x"]
    with pytest.raises(AssertionError):
        exec_form("shiftsieve run")


# --- the image ------------------------------------------------------------------------------------

def test_image_is_multi_stage_on_a_pinned_slim_python() -> None:
    instructions = dockerfile()
    bases = args_of(instructions, "FROM")
    assert len(bases) >= 2
    for base in bases:
        m = re.fullmatch(r"python:3\.(\d+)-slim(-\w+)?( AS \w+)?", base)
        assert m and int(m.group(1)) >= 11, base   # pyproject: requires-python >= 3.11
    builder = bases[0].split(" AS ")[1]
    runtime_steps = " ".join(a for i, a in instructions[[i for i, _ in instructions].index("FROM", 1):])
    assert f"from={builder}" in runtime_steps        # the runtime takes the builder's wheels
    assert "pip wheel" in args_of(instructions, "RUN")[0]
    assert "--no-index" in runtime_steps             # and installs nothing from elsewhere


def test_image_runs_as_a_fixed_non_root_uid() -> None:
    [user] = args_of(dockerfile(), "USER")
    uid = user.split(":")[0]
    assert uid.isdigit() and int(uid) != 0   # numeric: what Kubernetes' runAsNonRoot can verify
    assert k8s_one("Deployment")["spec"]["template"]["spec"]["securityContext"]["runAsUser"] == int(uid)


def test_image_ports_paths_and_signals_agree_with_the_code() -> None:
    instructions = dockerfile()
    assert args_of(instructions, "EXPOSE") == [str(DEFAULT_PORT)]
    assert parse_listen(image_env()["SHIFTSIEVE_HTTP_LISTEN"])[1] == DEFAULT_PORT
    [health] = args_of(instructions, "HEALTHCHECK")
    [url] = urls_in(healthcheck_argv(health))
    assert url_port_path(url) == (DEFAULT_PORT, "/healthz")
    assert args_of(instructions, "STOPSIGNAL") == ["SIGTERM"]
    assert exec_form(args_of(instructions, "ENTRYPOINT")[0]) == ["/usr/local/bin/docker-entrypoint.sh"]
    assert exec_form(args_of(instructions, "CMD")[0]) == ["run"]
    assert STATE_DIR in exec_form(args_of(instructions, "VOLUME")[0])
    assert image_env()["PYTHONDONTWRITEBYTECODE"] == "1"


def test_image_bakes_in_no_secret() -> None:
    secrets = {"SHIFTSIEVE_KAFKA_SASL_PASSWORD", "SHIFTSIEVE_KAFKA_SASL_USERNAME"}
    assert not secrets & set(image_env())
    assert not args_of(dockerfile(), "ARG")


def test_entrypoint_checks_the_config_then_execs_run() -> None:
    script = (DEPLOY / "docker-entrypoint.sh").read_text()
    assert script.startswith("#!/bin/sh\n")
    lines = [ln.strip() for ln in script.splitlines() if ln.strip().startswith(("shiftsieve ", "exec shiftsieve "))]
    check = lines.index('shiftsieve config check "$CONFIG"')
    assert lines[check + 1] == 'exec shiftsieve run --config "$CONFIG" "$@"'
    assert subprocess.run(["sh", "-n", str(DEPLOY / "docker-entrypoint.sh")]).returncode == 0   # POSIX sh syntax


# --- configuration: every variable and key exists -------------------------------------------------

def test_every_shiftsieve_variable_in_deploy_is_a_config_key() -> None:
    used = {}
    for path in DEPLOY.rglob("*"):
        if path.is_file():
            for name in re.findall(r"\bSHIFTSIEVE_[A-Z0-9_]+", path.read_text()):
                used.setdefault(name, path)
    assert "SHIFTSIEVE_SOURCE_URL" in used
    unknown = {name: str(path) for name, path in used.items() if name not in SETTINGS}
    assert not unknown, f"not in stream.config.SCHEMA: {unknown}"


def test_the_shipped_config_loads_and_passes_config_check(capsys, monkeypatch) -> None:
    for name in [k for k in os.environ if k.startswith("SHIFTSIEVE_")]:
        monkeypatch.delenv(name)
    config = load_config(TOML, environ={})
    assert config.source.encoding == "vector" and config.state.directory == STATE_DIR
    assert main(["config", "check", str(TOML)]) == 0
    assert capsys.readouterr().err == ""


def test_each_compose_service_config_loads() -> None:
    services = shiftsieve_services()
    assert {"shiftsieve", "shiftsieve-otlp", "producer"} <= set(services)
    for name, service in services.items():
        environ = {**image_env(), **{k: str(v) for k, v in service.get("environment", {}).items()}}
        environ = {k: v for k, v in environ.items() if k.startswith("SHIFTSIEVE_")}
        config = load_config(TOML, environ=environ)
        if "SHIFTSIEVE_SOURCE_URL" in environ:
            parse_kafka_url(config.source.url)


def test_the_kubernetes_config_loads(tmp_path) -> None:
    container = deployment_container()
    [env_map] = [d for d in k8s_documents() if d["kind"] == "ConfigMap" and d["metadata"]["name"] == "shiftsieve-env"]
    assert [ref["configMapRef"]["name"] for ref in container["envFrom"]] == ["shiftsieve-env"]
    environ = {**image_env(), **env_map["data"]}
    password = tmp_path / "password"
    password.write_text("not-a-secret\n")
    for var in container["env"]:
        if "valueFrom" in var:
            assert var["valueFrom"]["secretKeyRef"]["name"] == "shiftsieve-kafka"
            environ[var["name"]] = "from-the-secret"
        else:
            environ[var["name"]] = var["value"]
    password_file = environ["SHIFTSIEVE_KAFKA_SASL_PASSWORD_FILE"]
    environ["SHIFTSIEVE_KAFKA_SASL_PASSWORD_FILE"] = str(password)   # the mounted Secret, here
    config = load_config(TOML, environ={k: v for k, v in environ.items() if k.startswith("SHIFTSIEVE_")})
    assert config.kafka.sasl_password == "not-a-secret"
    parse_kafka_url(config.source.url)
    # the Secret volume puts its `password` key exactly at that path
    mounts = {m["name"]: m["mountPath"] for m in container["volumeMounts"]}
    [secret] = [v for v in k8s_one("Deployment")["spec"]["template"]["spec"]["volumes"] if "secret" in v]
    [item] = secret["secret"]["items"]
    assert f"{mounts[secret['name']]}/{item['path']}" == password_file


def test_the_configmap_is_the_shipped_toml() -> None:
    [doc] = [d for d in k8s_documents() if d["kind"] == "ConfigMap" and d["metadata"]["name"] == "shiftsieve-config"]
    assert doc["data"] == {TOML.name: TOML.read_text()}


# --- ports, paths and commands agree with the code ------------------------------------------------

def test_the_code_serves_the_paths_deploy_uses() -> None:
    endpoints = Endpoints("127.0.0.1:0", lambda: b"", lambda: True).start()
    try:
        for path in (*ENDPOINT_PATHS, "/other"):
            try:
                with urllib.request.urlopen(f"http://{endpoints.address}{path}", timeout=5) as r:
                    status = r.status
            except urllib.error.HTTPError as exc:
                status = exc.code
            assert status == (404 if path == "/other" else 200), path
    finally:
        endpoints.stop()


def test_compose_ports_paths_and_state_agree_with_the_code() -> None:
    config_mount = f"./config/{TOML.name}:{image_env()['CONFIG']}:ro"
    for name in ("shiftsieve", "shiftsieve-otlp"):
        service = shiftsieve_services()[name]
        assert service["read_only"] is True and "/tmp" in service["tmpfs"][0]
        [url] = urls_in(service["healthcheck"]["test"])
        assert url_port_path(url) == (DEFAULT_PORT, "/healthz")
        assert any(p.endswith(f":{DEFAULT_PORT}") for p in service["ports"])
        assert config_mount in service["volumes"]
        state = [v for v in service["volumes"] if v.split(":")[1] == STATE_DIR]
        assert state and state[0].split(":")[0] in compose()["volumes"]   # a named volume
    [prometheus] = load_yaml(DEPLOY / "prometheus" / "prometheus.yml")
    [job] = [j for j in prometheus["scrape_configs"] if j["job_name"] == "shiftsieve"]
    assert job["metrics_path"] == "/metrics"
    assert sorted(job["static_configs"][0]["targets"]) == [f"shiftsieve-otlp:{DEFAULT_PORT}", f"shiftsieve:{DEFAULT_PORT}"]


def test_kubernetes_ports_probes_and_security() -> None:
    deployment = k8s_one("Deployment")
    pod = deployment["spec"]["template"]
    container = deployment_container()
    [port] = container["ports"]
    assert port == {"name": "http-metrics", "containerPort": DEFAULT_PORT}
    assert container["livenessProbe"]["httpGet"] == {"path": "/healthz", "port": "http-metrics"}
    assert container["readinessProbe"]["httpGet"] == {"path": "/readyz", "port": "http-metrics"}
    for kind in ("requests", "limits"):
        assert set(container["resources"][kind]) == {"cpu", "memory"}
    assert quantity(container["resources"]["requests"]["memory"]) <= quantity(container["resources"]["limits"]["memory"])
    assert quantity(container["resources"]["requests"]["cpu"]) <= quantity(container["resources"]["limits"]["cpu"])
    assert pod["spec"]["securityContext"]["runAsNonRoot"] is True
    assert container["securityContext"] == {"allowPrivilegeEscalation": False, "readOnlyRootFilesystem": True,
                                            "capabilities": {"drop": ["ALL"]}}
    mounts = {m["mountPath"]: m for m in container["volumeMounts"]}
    assert STATE_DIR in mounts and not mounts[STATE_DIR].get("readOnly")
    assert mounts[str(Path(image_env()["CONFIG"]).parent)]["readOnly"] is True
    # SIGTERM: one poll (source.poll_seconds) plus flush, snapshots and commit must fit the grace period
    poll = next(s.default for s in SCHEMA if (s.section, s.key) == ("source", "poll_seconds"))
    assert pod["spec"]["terminationGracePeriodSeconds"] >= 10 * poll
    assert pod["metadata"]["annotations"] == {"prometheus.io/scrape": "true", "prometheus.io/port": str(DEFAULT_PORT),
                                              "prometheus.io/path": "/metrics"}


def quantity(text: str) -> float:
    """A Kubernetes resource quantity (the suffixes used here: m, Ki, Mi, Gi) as a number."""
    units = {"m": 1e-3, "Ki": 2**10, "Mi": 2**20, "Gi": 2**30}
    m = re.fullmatch(r"([0-9.]+)(m|Ki|Mi|Gi)?", str(text))
    assert m, text
    return float(m.group(1)) * units.get(m.group(2), 1)


def test_service_pdb_and_servicemonitor_select_the_pods() -> None:
    pod_labels = k8s_one("Deployment")["spec"]["template"]["metadata"]["labels"]
    service = k8s_one("Service")
    assert service["spec"]["selector"].items() <= pod_labels.items()
    [port] = service["spec"]["ports"]
    assert port == {"name": "http-metrics", "port": DEFAULT_PORT, "targetPort": "http-metrics"}
    pdb = k8s_one("PodDisruptionBudget")
    assert pdb["spec"]["maxUnavailable"] == 1 and pdb["spec"]["selector"]["matchLabels"].items() <= pod_labels.items()
    monitor = k8s_one("ServiceMonitor")
    assert monitor["apiVersion"] == "monitoring.coreos.com/v1"
    assert monitor["spec"]["selector"]["matchLabels"].items() <= service["metadata"]["labels"].items()
    assert monitor["spec"]["endpoints"][0]["port"] == "http-metrics" and monitor["spec"]["endpoints"][0]["path"] == "/metrics"
    # the Prometheus Operator names the job after the Service: the rules' ShiftsieveDown wants "shiftsieve"
    assert service["metadata"]["name"] == "shiftsieve"
    claims = {d["metadata"]["name"]: d for d in k8s_documents() if d["kind"] == "PersistentVolumeClaim"}
    [state] = [v for v in k8s_one("Deployment")["spec"]["template"]["spec"]["volumes"] if v["name"] == "state"]
    assert claims[state["persistentVolumeClaim"]["claimName"]]["spec"]["accessModes"] == ["ReadWriteMany"]


def test_every_shiftsieve_command_in_deploy_parses_in_the_cli() -> None:
    parser = _parser()
    commands = [exec_form(args_of(dockerfile(), "CMD")[0])]
    commands += [s["command"] for s in shiftsieve_services().values()]
    commands += [deployment_container()["args"]]
    for line in (DEPLOY / "docker-entrypoint.sh").read_text().splitlines():
        words = shlex.split(line.strip())
        if words and words[0] == "exec":
            words = words[1:]
        if words[:1] == ["shiftsieve"] and words[1:] != ["$@"]:   # `exec shiftsieve "$@"` passes anything on
            commands.append([w for w in words[1:] if w != "$@"])   # "$CONFIG" stays a placeholder value
    assert ["produce"] in [c[:1] for c in commands] and ["config", "check", "$CONFIG"] in commands
    for argv in commands:
        if argv[:1] == ["run"]:   # the entrypoint adds --config "$CONFIG"
            argv = [*argv, "--config", "$CONFIG"]
        try:
            parser.parse_args(argv)
        except SystemExit:
            pytest.fail(f"`shiftsieve {' '.join(argv)}` is not a valid command line of stream/cli.py")


def test_topics_exist_and_the_producer_feeds_the_vector_service() -> None:
    services = compose()["services"]
    created = " ".join(services["kafka-topics"]["command"])
    topics = {}
    for name in ("shiftsieve", "shiftsieve-otlp"):
        brokers, topic, _ = parse_kafka_url(services[name]["environment"]["SHIFTSIEVE_SOURCE_URL"])
        assert brokers == ("kafka:9092",)
        topics[name] = topic
    producer = services["producer"]["command"]
    assert producer[producer.index("--topic") + 1] == topics["shiftsieve"]
    assert producer[producer.index("--brokers") + 1] == "kafka:9092"
    config = load_config(TOML, environ={})
    for topic in (*topics.values(), config.kafka.alert_topic, config.kafka.dead_letter_topic):
        assert re.search(rf"\b{re.escape(topic)}\b", created), topic


# --- Kubernetes: kustomize ------------------------------------------------------------------------

def test_every_manifest_is_listed_in_its_kustomization() -> None:
    for kustomization in K8S.rglob("kustomization.yaml"):
        [doc] = load_yaml(kustomization)
        listed = set(doc.get("resources", []))
        here = {p.name for p in kustomization.parent.glob("*.yaml")} - {"kustomization.yaml"}
        assert listed == here, kustomization
    [base] = load_yaml(K8S / "kustomization.yaml")
    assert "namespace" not in base and all("namespace" not in d["metadata"] for d in k8s_documents())


def test_kustomize_builds_the_manifests(tmp_path) -> None:
    kubectl = shutil.which("kubectl")
    if kubectl is None:
        pytest.skip("kubectl (with its built-in kustomize) not installed")
    overlay = tmp_path / "overlay"
    shutil.copytree(K8S, overlay / "base")
    (overlay / "kustomization.yaml").write_text("resources: [base]\ncomponents: [base/servicemonitor]\n")
    proc = subprocess.run([kubectl, "kustomize", str(overlay)], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    kinds = sorted(d["kind"] for d in yaml.safe_load_all(proc.stdout))
    assert kinds == sorted(d["kind"] for d in k8s_documents())


# --- Prometheus: promtool -------------------------------------------------------------------------

def test_promtool_checks_the_compose_prometheus_config() -> None:
    # (the rules themselves are checked and unit-tested in tests/test_rules.py)
    proc = subprocess.run([required_tool("promtool"), "check", "config", "prometheus.yml"], cwd=DEPLOY / "prometheus",
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_promtool_checks_the_kubernetes_prometheus_config(tmp_path) -> None:
    """Debian's promtool is built without Kubernetes discovery ("field kubernetes_sd_configs not found"),
    so the discovery block is swapped for a static target; everything else (relabelling, rule files)
    goes through promtool as written."""
    promtool = required_tool("promtool")
    [config] = load_yaml(DEPLOY / "prometheus" / "prometheus-kubernetes.yml")
    [job] = config["scrape_configs"]
    assert job["job_name"] == "shiftsieve" and job.pop("kubernetes_sd_configs") == [{"role": "pod"}]
    job["static_configs"] = [{"targets": [f"10.0.0.1:{DEFAULT_PORT}"]}]
    (tmp_path / "prometheus.yml").write_text(yaml.safe_dump(config))
    shutil.copy(DEPLOY / "prometheus" / "shiftsieve-rules.yml", tmp_path)
    proc = subprocess.run([promtool, "check", "config", "prometheus.yml"], cwd=tmp_path, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    # the relabelling reads exactly the annotations the Deployment sets
    annotations = k8s_one("Deployment")["spec"]["template"]["metadata"]["annotations"]
    meta = {f"__meta_kubernetes_pod_annotation_{re.sub(r'[^a-zA-Z0-9]', '_', a)}" for a in annotations}
    read = {label for rule in job["relabel_configs"] for label in rule["source_labels"]
            if "annotation" in label}
    assert read == meta


# --- Alertmanager: amtool and the compose wiring --------------------------------------------------

ALERTMANAGER = DEPLOY / "alertmanager" / "alertmanager.yml"


def test_amtool_checks_the_shipped_alertmanager_config() -> None:
    amtool = required_tool("amtool", package="prometheus-alertmanager")
    proc = subprocess.run([amtool, "check-config", str(ALERTMANAGER)], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr


def test_the_route_groups_shift_alerts_by_entity_and_sends_resolved() -> None:
    [config] = load_yaml(ALERTMANAGER)
    route = config["route"]
    assert "entity" in route["group_by"] and set(route["group_by"]) <= {"alertname", "entity"}
    [receiver] = [r for r in config["receivers"] if r["name"] == route["receiver"]]
    [hook] = receiver["webhook_configs"]
    assert hook["send_resolved"] is True and ".invalid" in hook["url"]   # a placeholder (RFC 2606), not a real host


def test_compose_prometheus_sends_to_the_stacks_alertmanager() -> None:
    services = compose()["services"]
    alertmanager = services["alertmanager"]
    image, _, tag = alertmanager["image"].partition(":")
    assert image == "prom/alertmanager" and re.fullmatch(r"v\d+\.\d+\.\d+", tag)   # pinned
    config_flag = next(a for a in alertmanager["command"] if a.startswith("--config.file="))
    assert f"./alertmanager/{ALERTMANAGER.name}:{config_flag.split('=', 1)[1]}:ro" in alertmanager["volumes"]
    assert "alertmanager" in services["prometheus"]["depends_on"]
    for path in (DEPLOY / "prometheus" / "prometheus.yml", DEPLOY / "prometheus" / "prometheus-kubernetes.yml"):
        [prometheus] = load_yaml(path)
        [target] = prometheus["alerting"]["alertmanagers"][0]["static_configs"][0]["targets"]
        assert target == "alertmanager:9093", path   # Alertmanager's default port; in compose, the service name
    assert any(p.endswith(":9093") for p in alertmanager["ports"])


# --- the OpenTelemetry Collector and the OTLP sample ----------------------------------------------

def test_collector_exports_otlp_json_to_the_topic_shiftsieve_otlp_reads() -> None:
    [collector] = load_yaml(DEPLOY / "otel-collector.yaml")
    [pipeline] = [p for name, p in collector["service"]["pipelines"].items() if name.split("/")[0] == "metrics"]
    [exporter] = [collector["exporters"][e] for e in pipeline["exporters"] if e.split("/")[0] == "kafka"]
    assert exporter["metrics"]["encoding"] == "otlp_json"
    otlp = compose()["services"]["shiftsieve-otlp"]["environment"]
    brokers, topic, _ = parse_kafka_url(otlp["SHIFTSIEVE_SOURCE_URL"])
    assert exporter["metrics"]["topic"] == topic and tuple(exporter["brokers"]) == brokers
    assert exporter["partition_metrics_by_resource_attributes"] is True   # one entity, one partition
    assert otlp["SHIFTSIEVE_SOURCE_ENCODING"] == "otlp_json"
    # the collector scrapes the vector service on the code's default port, at the step the service assembles
    [receiver] = [collector["receivers"][r] for r in pipeline["receivers"]]
    jobs = {j["job_name"]: j for j in receiver["config"]["scrape_configs"]}
    assert jobs["shiftsieve"]["static_configs"][0]["targets"] == [f"shiftsieve:{DEFAULT_PORT}"]
    assert {j["scrape_interval"] for j in jobs.values()} == {f"{otlp['SHIFTSIEVE_SOURCE_STEP_SECONDS']}s"}


def test_the_otlp_sample_has_what_the_collector_example_sends() -> None:
    """tests/data/otlp_gauge_sum.json (what tests/test_otlp.py decodes) is hand-written in the
    shape of the Kafka exporter's otlp_json output, not captured (tests/data/README.md). Check that
    it carries what this pipeline sends: the prometheus receiver maps a scrape target to a resource
    with service.name = job and service.instance.id = instance, gauges to OTLP gauges and counters to
    sums, histograms to histograms (OpenTelemetry specification, "Prometheus and OpenMetrics
    Compatibility"; from memory)."""
    otlp = compose()["services"]["shiftsieve-otlp"]["environment"]
    entity_labels = load_config(TOML, environ={"SHIFTSIEVE_SOURCE_ENTITY_LABELS":
                                               otlp["SHIFTSIEVE_SOURCE_ENTITY_LABELS"]}).source.entity_labels
    assert entity_labels == ["service.name", "service.instance.id"]
    sample = json.loads(OTLP_SAMPLE.read_text())
    kinds = set()
    for resource in sample["resourceMetrics"]:
        keys = {a["key"] for a in resource["resource"]["attributes"]}
        assert set(entity_labels) <= keys
        kinds |= {k for sm in resource["scopeMetrics"] for m in sm["metrics"] for k in m
                  if k in ("gauge", "sum", "histogram", "exponentialHistogram", "summary")}
    assert {"gauge", "sum"} <= kinds
    samples, skipped = decode_otlp(OTLP_SAMPLE.read_bytes(), resource_labels=entity_labels)
    assert samples and skipped > 0   # gauges and sums decode; the histogram is skipped and counted
    assert all(set(entity_labels) <= set(s.labels) for s in samples)
