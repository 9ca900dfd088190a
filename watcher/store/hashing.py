"""The hash that links each row of a chain to the one before it (store/chain.py says what is
chained and why), and what `verify` reports when a link does not hold."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

READING_FIELDS = ("zone", "sensor", "signal", "ts", "value", "received_ts", "topic", "late")


def chain_hash(prev, *fields) -> str:
    """SHA-256 over the previous hash and the fields' exact text (repr keeps every float bit).

    A float is hashed as SQLite stores it: SQLite keeps -0.0 as 0.0, so hashing repr(-0.0) at
    insert broke the chain the moment verify read the row back (an alert cleared with a cost of
    -0.0 did it); adding 0.0 turns -0.0 into 0.0 and leaves every other value as it is. A float
    of a subclass (numpy's float64, whose repr is "np.float64(...)") is hashed as the plain
    float SQLite gives back."""
    text = "".join("\x1f" + repr(float(f) + 0.0 if isinstance(f, float) else f) for f in fields)
    return hashlib.sha256(((prev or "") + text).encode()).hexdigest()


class ReadingHasher:
    """chain_hash for readings rows, fast (verify's hot loop). A row's constant text (zone,
    sensor, signal; topic and flag) is rendered once and kept, and so is the text of the
    numbers seen lately (sensors read at the same moment share a time, a value at a sensor's
    resolution recurs): most rows then cost one SHA-256. A row of other types than a stored
    reading's goes the general way."""

    FLOATS_KEPT = 1 << 16

    def __init__(self):
        self._texts: dict[tuple, tuple[str, str]] = {}
        self.floats: dict[float, str] = {}  # a number's text, for the numbers seen lately

    def float_text(self, x: float) -> str:
        """A float's text as chain_hash writes it, kept in `floats`."""
        text = self.floats.get(x)
        if text is None:
            if len(self.floats) >= self.FLOATS_KEPT:
                self.floats.clear()
            text = self.floats[x] = repr(x + 0.0)  # -0.0 and 0.0 are one key and one text, as in chain_hash
        return text

    def parts(self, zone, sensor, signal, topic, late) -> tuple[str, str] | None:
        """The constant text before a row's numbers and after them (None: not all names are
        text, so the row goes the general way)."""
        texts = self._texts.get((zone, sensor, signal, topic, late))
        if texts is None:
            if not all(type(x) is str for x in (zone, sensor, signal, topic)) or type(late) is not int:
                return None
            texts = f"\x1f{zone!r}\x1f{sensor!r}\x1f{signal!r}\x1f", f"\x1f{topic!r}\x1f{late!r}"
            self._texts[(zone, sensor, signal, topic, late)] = texts
        return texts

    def numbers(self, prev, head: str, ts: float, value: float, received_ts: float, tail: str) -> str:
        """The hash of a row whose constant text is (head, tail) and whose numbers are floats."""
        f, n = self.floats.get, self.float_text
        text = (
            f"{prev or ''}{head}{f(ts) or n(ts)}\x1f{f(value) or n(value)}\x1f{f(received_ts) or n(received_ts)}{tail}"
        )
        return hashlib.sha256(text.encode()).hexdigest()

    def __call__(self, prev, zone, sensor, signal, ts, value, received_ts, topic, late) -> str:
        if type(ts) is float and type(value) is float and type(received_ts) is float:
            parts = self.parts(zone, sensor, signal, topic, late)
            if parts is not None:
                return self.numbers(prev, parts[0], ts, value, received_ts, parts[1])
        return chain_hash(prev, zone, sensor, signal, ts, value, received_ts, topic, late)


def register(conn) -> None:
    conn.create_function("chain_hash", -1, chain_hash, deterministic=True)


@dataclass(frozen=True)
class Finding:
    chain: str  # "readings/<zone>", "alert_log", ..., "chain_folds", "lots", "alerts", "outbox"
    row_id: int
    what: str
    kind: str = "MISMATCH"  # or "MISSING": rows, a zone or a record that should be there is not
    last_id: int = 0  # readings: the row with the next kept hash (the break lies in row_id..last_id)
