"""What an alert is about: a zone, a lot or the service itself. The alerts table keeps the
subject in its `zone` column as one key (a zone id, "lot:<id>", or "service"); this is the
only place that spells those keys, so the rest of the code handles subjects, not prefixes."""

from __future__ import annotations

from dataclasses import dataclass

SERVICE_KEY = "service"
LOT_PREFIX = "lot:"


@dataclass(frozen=True)
class Subject:
    kind: str  # "zone", "lot" or "service"
    id: str

    @property
    def key(self) -> str:
        """As stored in the alerts table."""
        if self.kind == "lot":
            return LOT_PREFIX + self.id
        return SERVICE_KEY if self.kind == "service" else self.id

    @classmethod
    def of(cls, key: str) -> Subject:
        if key.startswith(LOT_PREFIX):
            return cls("lot", key.removeprefix(LOT_PREFIX))
        return cls("service", SERVICE_KEY) if key == SERVICE_KEY else cls("zone", key)


def lot(lot_id: str) -> Subject:
    return Subject("lot", lot_id)


SERVICE = Subject("service", SERVICE_KEY)
