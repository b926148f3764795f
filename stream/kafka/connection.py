"""What the consumer and the producer share: the lazy kafka-python import, one-line error
descriptions and `ConnectionState` (their ``connected`` / ``last_error``; the failure model is in the
package docstring)."""

from __future__ import annotations

import logging
import threading
import time
from types import ModuleType
from typing import Any

log = logging.getLogger(__package__)   # records are named "shiftsieve.stream.kafka"


def import_kafka() -> ModuleType:
    """The kafka-python package, imported on first use: importing shiftsieve.stream stays cheap."""
    import kafka  # noqa: PLC0415
    return kafka


def describe_error(exc: BaseException) -> str:
    """A short one-line description of an error (never contains settings)."""
    name = type(exc).__name__
    text = " ".join(str(exc).split())
    if text.startswith(name):
        text = text[len(name):].lstrip(": ")
    if text in ("", "None"):
        text = ""
    if len(text) > 300:
        text = text[:297] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


class ConnectionState:
    """Whether a client's last broker interaction worked, and its last error (thread-safe: delivery
    callbacks report from kafka-python's IO thread)."""

    _LOG_EVERY_S = 10.0

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.last_error: str | None = None
        self.last_error_at: float | None = None
        self.errors_total = 0
        self._ok = False
        self._logged_at = float("-inf")
        self._suppressed = 0

    @property
    def is_ok(self) -> bool:
        """True after a success, until the next failure."""
        return self._ok

    def ok(self) -> None:
        """Record a successful broker interaction."""
        with self._lock:
            self._ok = True

    def fail(self, what: str, exc: BaseException | str) -> None:
        """Record a failure of ``what`` (e.g. "poll") and log it, at most once per ``_LOG_EVERY_S`` when
        it repeats (an outage repeats the same error for every poll or message)."""
        text = exc if isinstance(exc, str) else describe_error(exc)
        message = f"{what}: {text}"
        now = time.monotonic()
        with self._lock:
            self._ok = False
            repeated = message == self.last_error and now - self._logged_at < self._LOG_EVERY_S
            self.last_error = message
            self.last_error_at = time.time()
            self.errors_total += 1
            if repeated:
                self._suppressed += 1
                return
            suppressed, self._suppressed, self._logged_at = self._suppressed, 0, now
        more = f" (and {suppressed} more like the previous one)" if suppressed else ""
        log.warning("kafka %s failed: %s%s", what, text, more)


def client_connected(client: Any, closed: bool, state: ConnectionState) -> bool:
    """Whether a kafka-python ``client`` is usable: open, its last interaction worked, and (when
    kafka-python tells) a broker connection is up."""
    if client is None or closed or not state.is_ok:
        return False
    try:   # internal API of kafka-python; without it, our own state decides
        brokers = client._client.cluster.brokers()
        return any(client._client.connected(b.node_id) for b in brokers)
    except Exception:  # noqa: BLE001
        return True
