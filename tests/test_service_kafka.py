"""`shiftsieve run` on a real Kafka-protocol broker: produce -> detect -> alert topic."""

import gzip
import json
import os
import signal
import subprocess
import sys
import time

from kafka import KafkaConsumer, KafkaProducer

from conftest import free_port
from shiftsieve.stream.demo import scenarios

API = (2, 5, 0)   # DEVELOPERS.md, Facts of this environment: consumer groups settle on this broker with it



def test_produce_detect_alert_topic_and_dead_letters(kafka_broker, kafka_topic, tmp_path):
    source, alerts, dead = kafka_topic(partitions=2), kafka_topic(), kafka_topic()
    producer = KafkaProducer(bootstrap_servers=kafka_broker, api_version=API)
    for line in gzip.open(scenarios()["single_shift"]):
        producer.send(source, key=json.loads(line)["entity"].encode(), value=line.rstrip(b"\n"))
    producer.send(source, key=b"x", value=b"{not json")
    producer.flush()
    producer.close()

    env = {**os.environ, "SHIFTSIEVE_KAFKA_API_VERSION": "2.5.0", "SHIFTSIEVE_KAFKA_SESSION_TIMEOUT_MS": "6000",
           "SHIFTSIEVE_KAFKA_ALERT_TOPIC": f'"{alerts}"', "SHIFTSIEVE_KAFKA_DEAD_LETTER_TOPIC": f'"{dead}"'}
    proc = subprocess.Popen([sys.executable, "-m", "shiftsieve.stream.cli", "run", "--listen",
                             f"127.0.0.1:{free_port()}", "--source", f"kafka://{kafka_broker}/{source}?group={source}-det"],
                            env=env, stderr=subprocess.PIPE)
    try:
        consumer = KafkaConsumer(alerts, dead, bootstrap_servers=kafka_broker, api_version=API,
                                 auto_offset_reset="earliest", consumer_timeout_ms=1000)
        got_alert = got_dead = None
        deadline = time.monotonic() + 180
        while time.monotonic() < deadline and not (got_alert and got_dead):
            for message in consumer:
                if message.topic == alerts and got_alert is None:
                    got_alert = message
                if message.topic == dead:
                    got_dead = message
        assert got_alert is not None, "no alert event on the alert topic"
        event = json.loads(got_alert.value)
        assert got_alert.key == b"booking-api-2"
        assert event["state"] == "firing" and event["metrics"][0]["name"] == "db_pool_wait_p99_ms"
        assert got_dead is not None and got_dead.value == b"{not json"
        assert dict(got_dead.headers)["reason"] == b"bad_json"
        consumer.close()
    finally:
        proc.send_signal(signal.SIGTERM)
        code = proc.wait(timeout=30)
    assert code == 0, proc.stderr.read().decode()[-2000:]
