"""Kafka client layer for `shiftsieve run`, built on kafka-python 3.x. The service never sees
kafka-python objects:

- `settings`: `KafkaSettings` (everything the clients need, as kafka-python keyword arguments;
  ``repr()`` masks the SASL password), `parse_kafka_url` for
  ``kafka://HOST:PORT[,HOST:PORT]/TOPIC?group=NAME``, and `check_topic`.
- `consumer`: `KafkaSource`, a group member that commits offsets only when told, and `Record`.
- `producer`: `KafkaSink`, alert events and dead letters.
- `connection`: the lazy kafka-python import and the connection state both clients keep.
- `redact`: keeps SASL passwords out of kafka-python's own DEBUG records.

Failure model: an unreachable or failing broker never raises out of `KafkaSource.poll`,
`KafkaSource.commit`, `KafkaSource.lag`, `KafkaSink.send_event`, `KafkaSink.send_dead_letter` or
`KafkaSink.flush`. They return an empty result / ``False``, and the client exposes ``connected``
and ``last_error`` (a one-line string) so the service can report not-ready and retry on its next
call. Programming errors (bad arguments, bad settings) still raise.
"""

from .connection import describe_error, import_kafka
from .consumer import KafkaSource, Record
from .producer import KafkaSink
from .settings import SASL_MECHANISMS, SECURITY_PROTOCOLS, KafkaSettings, check_topic, parse_kafka_url

__all__ = [
    "KafkaSettings",
    "KafkaSink",
    "KafkaSource",
    "Record",
    "parse_kafka_url",
    "check_topic",
    "describe_error",
    "import_kafka",
    "SECURITY_PROTOCOLS",
    "SASL_MECHANISMS",
]
