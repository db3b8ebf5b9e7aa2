"""The input contracts: columns of the event log and the exposure log.

Timestamps are naive ``timestamp[us]`` values meaning UTC.
"""

from __future__ import annotations

from typing import Final

# Event log columns and their logical types. ``ts``, ``event`` and the unit id
# column named by the experiment spec are required; the rest are optional and
# are needed only when a definition or bot filter refers to them.
EVENT_COLUMNS: Final[dict[str, str]] = {
    "ts": "timestamp",
    "cookie_id": "string",  # browser cookie: the usual randomisation unit
    "account_id": "string",  # logged-in account, null when logged out
    "session_id": "string",
    "event": "string",  # one of EVENT_TYPES
    "value": "double",  # revenue for purchase, refunded amount for refund
    "latency_ms": "double",  # page_load only
    "user_agent": "string",
    "ip_hash": "string",
    "page": "string",
    "country": "string",
    "device": "string",  # desktop | mobile | tablet
}

EVENT_TYPES: Final[tuple[str, ...]] = (
    "impression",
    "click",
    "back",  # return to the previous page
    "purchase",
    "refund",
    "unsubscribe",
    "page_load",
)

# Exposure log: which unit saw which variant of which experiment, and when.
EXPOSURE_COLUMNS: Final[dict[str, str]] = {
    "unit_id": "string",
    "experiment": "string",
    "variant": "string",
    "ts": "timestamp",
}

NUMERIC_TYPES: Final[frozenset[str]] = frozenset({"double"})
