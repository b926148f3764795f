"""Keeps SASL passwords out of kafka-python's own log records.

kafka-python 3.0.12 logs every request it sends at DEBUG: ``kafka.net.connection`` ("Request N:
SaslAuthenticateRequest(... auth_bytes=b'user\\x00user\\x00PASSWORD')") and ``kafka.protocol.parser``
(the raw bytes, "Send: ..."). With SASL PLAIN that is the password in clear text for anyone who
turns on DEBUG logging, so every secret handed to a client is masked there as ``***``.
"""

from __future__ import annotations

import logging

#: loggers known to log request payloads; every other kafka.* logger that exists when a client is
#: built gets the filter too
PAYLOAD_LOGGERS = ("kafka", "kafka.net.connection", "kafka.protocol.parser")


class _RedactSecrets(logging.Filter):
    """Replaces registered secrets in log records by ``***``.

    It sits on the ``kafka.*`` loggers (a logger's filters see the records created on it), so it
    costs nothing unless DEBUG is on.
    """

    def __init__(self) -> None:
        super().__init__("shiftsieve.redact")
        self.forms: tuple[str, ...] = ()   # longest first; replaced whole, as records come from IO threads

    def add(self, secret: str) -> None:
        # as the text, inside a str repr, and inside a bytes/bytearray repr (escaped, e.g. non-ASCII;
        # a repr holding both quote characters also escapes ')
        in_bytes = repr(secret.encode("utf-8"))[2:-1]
        forms = set(self.forms) | {secret, repr(secret)[1:-1], in_bytes, in_bytes.replace("'", "\\'")}
        self.forms = tuple(sorted(forms - {""}, key=len, reverse=True))

    def filter(self, record: logging.LogRecord) -> bool:
        if not self.forms:
            return True
        try:
            message = record.getMessage()
        except Exception:  # noqa: BLE001  (a malformed record: leave it to logging's own handling)
            return True
        redacted = message
        for form in self.forms:
            redacted = redacted.replace(form, "***")
        if redacted != message:
            record.msg, record.args = redacted, None
        return True


_REDACT = _RedactSecrets()


def redact_in_kafka_logs(secret: str) -> None:
    """Mask ``secret`` in the records of kafka-python's loggers (call it after ``import kafka``,
    so that its loggers exist)."""
    _REDACT.add(secret)
    names = set(PAYLOAD_LOGGERS) | {n for n in logging.root.manager.loggerDict if n.startswith("kafka.")}
    for name in names:
        logger = logging.getLogger(name)
        if _REDACT not in logger.filters:
            logger.addFilter(_REDACT)
