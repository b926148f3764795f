"""The one pipeline every command runs: messages -> decode -> engine -> sinks, with dead letters.

    source (file records, stdin, Kafka) -> MessageDecoder (vector | sample | otlp)
        -> Pipeline.feed -> Engine (assemble -> model -> decide) -> event sinks
    every refusal on the way -> Pipeline.reject -> reject sinks (dead-letter file, topic, counters)

``replay`` feeds it the records of a file (decoded by the file's format, :mod:`.readers`);
``run`` feeds it the messages of its source (:mod:`.sources`), decoded in the configured
encoding.  Both count and dead-letter the same way: a rejection carries the message's
original bytes; only a vector assembled from many samples, which has no single message, is
written as the vector message it became.  A vector taken with invalid entries (treated as
missing) is counted per entry by reason (:attr:`Pipeline.invalid_values`) and its message goes
to the reject sinks once as a ``kept`` record (reason "invalid_values"), which is no rejection.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Iterable

from .config import Config
from .decode import DecodeError, Vector, decode_vector, encode_vector
from .engine import Engine
from .lines import Rejected
from .otlp import decode_otlp
from .reorder import refusal_detail
from .samples import SampleAssembler, decode_sample, encode_sample
from .sources import Message
from .values import describe_invalid

#: Receives every rejection with the partition it came from ("" for files and stdin).
RejectSink = Callable[[Rejected, str], None]
#: Asked before a vector enters its model (e.g. to restore the entity from a snapshot); False skips it.
Admit = Callable[[Vector, int, str], bool]
#: Told after a vector entered its model, with its position and partition.
Admitted = Callable[[Vector, int, str], None]


class MessageDecoder:
    """A message's complete vectors in the configured encoding (``source.encoding``).

    ``vector``: one message, one vector.  ``sample`` and ``otlp``: samples, assembled into one
    vector per entity and step (:class:`.samples.SampleAssembler`); a sample the assembler
    refuses is reported to ``reject`` and the rest go on.
    """

    def __init__(self, config: Config, reject: Callable[[int, bytes, str, str, str], None]) -> None:
        source = config.source
        self.encoding = source.encoding
        self.entity_labels = source.entity_labels
        self.limits = config.decode_limits()
        self.reject = reject
        self.skipped = 0   # OTLP points of kinds the detector does not read (histograms, ...)
        self.assembler = None if self.encoding == "vector" else SampleAssembler(
            source.entity_labels, source.step_seconds, source.allowed_lateness_seconds,
            max_entities=config.engine.max_entities, limits=self.limits)

    def vectors(self, message: Message) -> list[Vector]:
        """The vectors the message completes; DecodeError when the message is unusable."""
        if self.assembler is None:
            return [decode_vector(message.raw, self.limits)]
        if self.encoding == "sample":
            samples = [decode_sample(message.raw, self.limits)]
        else:
            # Resource attributes other than the entity's would land in every metric name.
            samples, skipped = decode_otlp(message.raw, self.limits, resource_labels=self.entity_labels)
            self.skipped += skipped
        vectors: list[Vector] = []
        for sample in samples:
            done, reason = self.assembler.add(sample, (message.partition, message.position))
            vectors.extend(done)
            if reason is not None:   # late, no entity label, over a cap: counted and kept
                self.reject(message.position, encode_sample(sample), reason,
                            f"sample {sample.name!r} at ts {sample.ts} refused: {reason}", message.partition)
        return vectors

    def flush(self) -> list[Vector]:
        """The vectors of every step still open (end of input)."""
        return self.assembler.flush() if self.assembler is not None else []

    def held_offsets(self) -> dict[str, int] | None:
        """Per partition, the oldest offset whose samples wait in an open step (None: vectors)."""
        return self.assembler.held_offsets() if self.assembler is not None else None


class Pipeline:
    """Vectors into the engine, refusals to the reject sinks, each exactly once, counted by reason."""

    def __init__(self, engine: Engine, config: Config, *, reject_sinks: Iterable[RejectSink] = (),
                 admit: Admit | None = None, admitted: Admitted | None = None) -> None:
        self.engine = engine
        self.reject_sinks = list(reject_sinks)
        self.admit = admit
        self.admitted = admitted
        self.decoder = MessageDecoder(config, self._reject_parts)
        self.rejected_by_reason: Counter[str] = Counter()
        self.invalid_values: Counter[str] = Counter()   # entries of taken vectors treated as missing, by reason

    @property
    def rejected(self) -> int:
        return sum(self.rejected_by_reason.values())

    def take(self, items: Iterable[Message | Rejected]) -> int:
        """A source's messages: decode and feed them; returns how many decoded."""
        decoded = 0
        for item in items:
            if isinstance(item, Rejected):
                self.reject(item)
                continue
            try:
                vectors = self.decoder.vectors(item)
            except DecodeError as exc:
                self._reject_parts(item.position, item.raw, exc.reason, str(exc), item.partition)
                continue
            decoded += 1
            self.feed(vectors, item.position, item.partition,
                      item.raw if self.decoder.assembler is None else None)
        return decoded

    def feed(self, vectors: Iterable[Vector], position: int, partition: str = "", raw: bytes | None = None) -> None:
        """Vectors of one message into the engine; ``raw`` is the message, for a refusal's dead letter
        (None: the vector has no message of its own and is written as one)."""
        engine = self.engine
        for vector in vectors:
            if self.admit is not None and not self.admit(vector, position, partition):
                continue
            refused = engine.feed(vector)
            if refused is not None:
                self._reject_parts(position, raw if raw is not None else encode_vector(vector), refused,
                                   refusal_detail(vector.entity, vector.ts, refused,
                                                  engine.last_accepted_ts(vector.entity)), partition)
                continue
            if vector.invalid:
                self._kept(vector, position, partition, raw)
            if self.admitted is not None:
                self.admitted(vector, position, partition)

    def close_steps(self) -> None:
        """End of input: the samples' steps still open are complete; feed their vectors."""
        self.feed(self.decoder.flush(), 0)

    def reject(self, record: Rejected, partition: str = "") -> None:
        self.rejected_by_reason[record.reason] += 1
        for sink in self.reject_sinks:
            sink(record, partition)

    def _kept(self, vector: Vector, position: int, partition: str, raw: bytes | None) -> None:
        """A vector taken with invalid entries: count them, and dead-letter its message as kept."""
        self.invalid_values.update(reason for _, reason in vector.invalid)
        record = Rejected(line=position, reason="invalid_values",
                          detail=describe_invalid(vector.invalid, vector.shown),
                          raw=raw if raw is not None else encode_vector(vector), kept=True)
        for sink in self.reject_sinks:
            sink(record, partition)

    def _reject_parts(self, position: int, raw: bytes, reason: str, detail: str, partition: str = "") -> None:
        self.reject(Rejected(line=position, reason=reason, detail=detail, raw=raw), partition)
