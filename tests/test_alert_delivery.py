"""An incident reaches a person: `shiftsieve run` -> a real Prometheus evaluating
deploy/prometheus/shiftsieve-rules.yml as shipped -> a real Alertmanager routing by
deploy/alertmanager/alertmanager.yml (only the receiver's URL and the timings changed) -> a webhook
receiver in this test.

The input is one entity of 12 metrics driven by two shared factors plus unit noise
(`test_detector.shared_stream`, fixed seed); after the warm-up two metrics step up by 10 noise sigmas
together for 10 samples, then the stream is normal again. The test first checks that the service's
events file shows exactly that incident (one `firing` with both metrics, then one `resolved`), so
what it then asserts about the notifications is about the delivery path, not about detection luck.

Reference for the notifications: Alertmanager's webhook payload, a stated format of the trade
(Alertmanager documentation, Configuration, <webhook_config>): a JSON object with "version": "4",
"status" ("firing" or "resolved"), "receiver", "groupLabels", "commonLabels" and "alerts", each alert
with its own "status", "labels", "annotations", "startsAt" and "endsAt".
"""

from __future__ import annotations

import json
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from datetime import datetime
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import yaml

from conftest import free_port, required_tool
from test_detector import shared_stream

DEPLOY = Path(__file__).parent.parent / "deploy"
RULES = DEPLOY / "prometheus" / "shiftsieve-rules.yml"
ROUTE = DEPLOY / "alertmanager" / "alertmanager.yml"

ENTITY = "till-7"
N_METRICS, RANK, SEED = 12, 2, 3
WARMUP = 150                      # model.warmup for this test (default 540): a shorter start, same model
SHIFT_AT, SHIFT_LEN, TOTAL = 180, 10, 230
SHIFTED = ("m03", "m08")
STEP = 10.0                       # noise sigmas (the noise is unit)
LAMBDA = 3.29                     # the two-sided Gaussian quantile of the default false_alarm 0.001
T0 = 1780000000.0
DEADLINE_S = 30.0                 # per wait; the whole test takes ~15 s
QUIET_S = 4.0                     # after the resolved notification: several group_intervals with nothing more


def vectors() -> list[bytes]:
    X, _ = shared_stream(SEED, n=N_METRICS, r=RANK, samples=TOTAL)
    X[SHIFT_AT:SHIFT_AT + SHIFT_LEN, [int(m[1:]) for m in SHIFTED]] += STEP
    return [json.dumps({"ts": T0 + 30.0 * i, "entity": ENTITY,
                        "metrics": {f"m{j:02d}": round(float(x), 4) for j, x in enumerate(row)}}).encode() + b"\n"
            for i, row in enumerate(X)]


class Receiver:
    """The webhook end of Alertmanager: collects the JSON body of every POST."""

    def __init__(self) -> None:
        self.bodies: list[dict] = []
        lock = threading.Lock()
        bodies = self.bodies

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
                with lock:
                    bodies.append(json.loads(body))
                self.send_response(200)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hook"
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()
        self.lock = lock

    def received(self) -> list[dict]:
        with self.lock:
            return list(self.bodies)

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


def answers(url: str) -> bool:
    try:
        with urllib.request.urlopen(url, timeout=2) as r:
            return r.status == 200
    except (OSError, urllib.error.HTTPError):
        return False


def event_lines(path: Path) -> list[dict]:
    if not path.exists():
        return []
    return [json.loads(line) for line in path.read_text().splitlines() if line.endswith("}")]


def test_an_incident_reaches_the_webhook_once_and_resolves(tmp_path):
    prometheus = required_tool("prometheus")
    alertmanager = required_tool("prometheus-alertmanager", package="prometheus-alertmanager")
    ports: set[int] = set()
    while len(ports) < 3:
        ports.add(free_port())
    service_port, prom_port, am_port = sorted(ports)
    events = tmp_path / "events.jsonl"
    logs = {name: tmp_path / f"{name}.log" for name in ("service", "prometheus", "alertmanager")}

    # Alertmanager: the shipped route and receiver; only the webhook URL and the waits are the test's.
    receiver = Receiver()
    am_config = yaml.safe_load(ROUTE.read_text())
    route = am_config["route"]
    assert route["group_by"] in (["alertname", "entity"], ["entity"])
    # group_wait 3 s: longer than a scrape plus an evaluation, so metrics that fire in one vector are one
    # notification even if a scrape catches the exporter between their two series (as 30 s does in production).
    route.update(group_wait="3s", group_interval="1s", repeat_interval="1h")   # no repeat within the test
    [hooks] = [r["webhook_configs"] for r in am_config["receivers"] if r["name"] == route["receiver"]]
    [hook] = hooks
    hook["url"] = receiver.url
    (tmp_path / "alertmanager.yml").write_text(yaml.safe_dump(am_config))
    # Prometheus: the shipped rules file as it is, scraping the service as job "shiftsieve".
    (tmp_path / "prometheus.yml").write_text(yaml.safe_dump({
        "global": {"scrape_interval": "1s", "evaluation_interval": "1s"},
        "rule_files": [str(RULES)],
        "alerting": {"alertmanagers": [{"static_configs": [{"targets": [f"127.0.0.1:{am_port}"]}]}]},
        "scrape_configs": [{"job_name": "shiftsieve", "static_configs": [{"targets": [f"127.0.0.1:{service_port}"]}]}],
    }))
    (tmp_path / "shiftsieve.toml").write_text(f"[model]\nwarmup = {WARMUP}\n")

    commands = {
        "alertmanager": [alertmanager, f"--config.file={tmp_path / 'alertmanager.yml'}",
                         f"--storage.path={tmp_path / 'am-data'}", f"--web.listen-address=127.0.0.1:{am_port}",
                         "--cluster.listen-address="],   # no HA gossip port
        "prometheus": [prometheus, f"--config.file={tmp_path / 'prometheus.yml'}",
                       f"--storage.tsdb.path={tmp_path / 'tsdb'}", f"--web.listen-address=127.0.0.1:{prom_port}"],
        "service": [sys.executable, "-m", "shiftsieve.stream.cli", "run", "--source", "-",
                    "--listen", f"127.0.0.1:{service_port}", "--events", str(events),
                    "--config", str(tmp_path / "shiftsieve.toml")],
    }
    procs: dict[str, subprocess.Popen] = {}

    def diagnosis() -> str:
        tails = [f"--- {name}: {' '.join(path.read_text(errors='replace')[-1500:].split())}"
                 for name, path in logs.items() if path.exists()]
        return "\n".join([f"events: {event_lines(events)}", f"notifications: {receiver.received()}", *tails])

    def until(predicate, what: str):
        deadline = time.monotonic() + DEADLINE_S
        while time.monotonic() < deadline:
            value = predicate()
            if value:
                return value
            for name, proc in procs.items():
                if proc.poll() is not None and not (name == "service" and proc.stdin.closed):
                    raise AssertionError(f"{name} exited with {proc.returncode} while waiting for {what}\n{diagnosis()}")
            time.sleep(0.1)
        raise AssertionError(f"no {what} within {DEADLINE_S:.0f} s\n{diagnosis()}")

    data = vectors()
    try:
        for name, argv in commands.items():
            with open(logs[name], "wb") as log:
                procs[name] = subprocess.Popen(argv, stdin=subprocess.PIPE if name == "service" else subprocess.DEVNULL,
                                               stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
        until(lambda: answers(f"http://127.0.0.1:{am_port}/-/ready"), "Alertmanager ready")
        until(lambda: answers(f"http://127.0.0.1:{prom_port}/-/ready"), "Prometheus ready")
        until(lambda: answers(f"http://127.0.0.1:{service_port}/healthz"), "shiftsieve healthy")
        service = procs["service"]

        # Warm-up, normal data and the step: the incident opens and stays open while no more data comes.
        service.stdin.write(b"".join(data[:SHIFT_AT + SHIFT_LEN]))
        service.stdin.flush()
        [firing] = until(lambda: event_lines(events), "firing event")
        assert firing["state"] == "firing" and firing["entity"] == ENTITY and firing.get("onset") is True
        assert sorted(m["name"] for m in firing["metrics"]) == sorted(SHIFTED), firing
        assert all(m["shift_sigma"] > LAMBDA for m in firing["metrics"]), firing
        [notified] = until(receiver.received, "firing notification")

        # Normal data again: the incident resolves.
        service.stdin.write(b"".join(data[SHIFT_AT + SHIFT_LEN:]))
        service.stdin.flush()
        until(lambda: len(event_lines(events)) >= 2, "resolved event")
        until(lambda: len(receiver.received()) >= 2, "resolved notification")
        time.sleep(QUIET_S)
        notifications = receiver.received()

        service.stdin.close()                  # end of input: the service finishes and exits 0
        assert service.wait(timeout=DEADLINE_S) == 0, diagnosis()
    finally:
        for proc in procs.values():
            if proc.stdin is not None and not proc.stdin.closed:
                try:
                    proc.stdin.close()
                except OSError:
                    pass
            if proc.poll() is None:
                proc.terminate()
        for proc in procs.values():
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=5)
        receiver.close()

    # What the detector saw: exactly one incident, firing with both metrics, then resolved.
    found = event_lines(events)
    assert [e["state"] for e in found] == ["firing", "resolved"], found
    resolved = found[1]
    assert resolved["incident"] == firing["incident"] and sorted(m["name"] for m in resolved["metrics"]) == sorted(SHIFTED)
    at_firing = {m["name"]: m["shift_sigma"] for m in firing["metrics"]}
    peak = {m["name"]: m["shift_sigma"] for m in resolved["metrics"]}

    # What a person got: one notification when it fired, one when it resolved, grouped by entity.
    assert [n["status"] for n in notifications] == ["firing", "resolved"], notifications
    assert notifications[0] == notified
    for n in notifications:
        assert n["version"] == "4" and n["receiver"] == route["receiver"]
        assert n["groupLabels"].get("entity") == ENTITY
        assert n["commonLabels"]["alertname"] == "ShiftsieveShiftFiring" and n["commonLabels"]["severity"] == "info"
        assert {a["status"] for a in n["alerts"]} == {n["status"]}
        alerts = {a["labels"]["metric"]: a for a in n["alerts"]}
        assert sorted(alerts) == sorted(SHIFTED) and len(n["alerts"]) == len(SHIFTED)
        for metric, alert in alerts.items():
            assert alert["labels"]["entity"] == ENTITY
            # The shift in sigmas the detector measured: at least its size at firing, at most its peak.
            shift = float(alert["annotations"]["shift_sigma"])
            assert at_firing[metric] - 0.05 <= shift <= peak[metric] + 0.05, (metric, shift, at_firing, peak)
            assert f"{metric} on {ENTITY} shifted by {alert['annotations']['shift_sigma']} sigmas" in \
                alert["annotations"]["summary"]
            assert alert["annotations"]["description"].endswith("Check it before acting.")
    for alert in notifications[1]["alerts"]:   # resolved: ended after it started (not the zero time of a firing one)
        assert datetime.fromisoformat(alert["endsAt"]) > datetime.fromisoformat(alert["startsAt"]), alert
