"""The one error tree of watcher.

    WatcherError                 base; every error the CLI turns into a message and an exit code
    +-- InputError               bad input from a person or a file (exit 2)
    |   +-- ProfileError         a product profile is impossible (names the field, value, range)
    |   +-- SeriesError          a temperature series cannot be used (names the row and column)
    |   +-- TrialError           a storage-trial table cannot be fitted
    |   +-- ConfigError          the service configuration is invalid
    +-- ModelError               the numerical core met a state it cannot continue from
    +-- Rejected                 an MQTT message that cannot become a reading (stored with the reason)
    |   +-- OutOfClock           its time disagrees with the service clock (held, not rejected)
    +-- NotFound                 an alert, lot or other record named by id that does not exist or
                                 is not in the state asked for
    +-- StoreError               the database cannot be opened or written (disk full, locked, I/O):
                                 the only failure the writer retries; anything else raised while
                                 handling a message is that message's fault and sets it aside
    +-- RecordRefused            the database refused a row for what it holds (a constraint, a
                                 value that cannot be bound): the data's fault, never retried

Library errors are translated at the boundary with ``raise ... from exc``.
"""

from __future__ import annotations


class WatcherError(Exception):
    """Base of every error watcher raises on purpose."""

    exit_code = 1


class InputError(WatcherError):
    """Bad input: a file, a field or a value that cannot be used as given."""

    exit_code = 2

    def __init__(self, where: str, value: object, expected: str) -> None:
        if hasattr(value, "item") and callable(value.item):
            value = value.item()  # numpy scalars print as plain numbers
        self.where = where
        self.value = value
        self.expected = expected
        super().__init__(f"{where}: got {value!r}, expected {expected}")


class ProfileError(InputError):
    """A product profile field is missing, of the wrong type or out of range."""


class SeriesError(InputError):
    """A temperature series has an unusable row or column."""


class TrialError(InputError):
    """A storage-trial table cannot be used for calibration."""


class ConfigError(InputError):
    """A service configuration key is invalid."""


class ModelError(WatcherError):
    """The numerical core reached a state it cannot continue from."""


class StoreError(WatcherError):
    """The database could not be opened or written. Raised at the store's boundary only (sqlite3
    and OS errors are translated there), so the writer can tell a storage fault, which it
    retries, from a message that cannot be handled, which it sets aside."""


class Rejected(WatcherError):
    """A message that cannot become a reading; the reason is short and stored with it."""


class OutOfClock(Rejected):
    """A reading whose own time lies outside the window around the service clock. It is held,
    not rejected: either clock may be the wrong one, and the reading is re-admitted when the
    two agree (watcher.engine.held)."""


class NotFound(WatcherError):
    """A record named by id that does not exist, or is not in the state the request needs."""


class RecordRefused(WatcherError):
    """The database refused what was written (a broken constraint, a value sqlite3 cannot bind):
    translated at the store's boundary like StoreError, but the data's fault, so not retried."""
