"""Bots of the invented shop, and the session/event layout shared with the human part.

Columns are index arrays into string tables until they are written; ``arrow_strings``,
``sort_rank`` and ``write_parquet`` turn them into deterministic Parquet files.

Three kinds: crawlers that announce themselves in the user agent, scrapers with a browser
user agent and hundreds of events per session, and click-burst bots with a browser user
agent whose every click is followed by a back within 300 ms. Bots never buy, get refunds or
unsubscribe. Some of them share a few IP hashes.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import hashlib
from dataclasses import dataclass
from pathlib import Path
from typing import Final

import numpy as np
import numpy.typing as npt
import pyarrow as pa
import pyarrow.parquet as pq

from metricforge.schema import EVENT_COLUMNS, EVENT_TYPES, EXPOSURE_COLUMNS

IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]

DAY_MS: Final = 86_400_000
HOUR_MS: Final = 3_600_000
EVENTS: Final = EVENT_TYPES
IMPRESSION, CLICK, BACK, PURCHASE, REFUND, UNSUBSCRIBE, PAGE_LOAD = (
    EVENTS.index(e)
    for e in ("impression", "click", "back", "purchase", "refund", "unsubscribe", "page_load")
)
PAGES: Final = ("home", "search", "product", "checkout", "account")
COUNTRIES: Final = ("DE", "FR", "NL", "PL", "ES", "SE", "GB")
DEVICES: Final = ("desktop", "mobile", "tablet")
BROWSER_AGENTS: Final = (
    "Mozilla/5.0 (Windows NT 10.0; Win64; x64) AppleWebKit/537.36 (KHTML, like Gecko)"
    " Chrome/131.0.0.0 Safari/537.36",
    "Mozilla/5.0 (Macintosh; Intel Mac OS X 14_6) AppleWebKit/605.1.15 (KHTML, like Gecko)"
    " Version/18.0 Safari/605.1.15",
    "Mozilla/5.0 (X11; Linux x86_64; rv:132.0) Gecko/20100101 Firefox/132.0",
    "Mozilla/5.0 (iPhone; CPU iPhone OS 18_0 like Mac OS X) AppleWebKit/605.1.15"
    " (KHTML, like Gecko) Version/18.0 Mobile/15E148 Safari/604.1",
    "Mozilla/5.0 (Linux; Android 14; K) AppleWebKit/537.36 (KHTML, like Gecko)"
    " Chrome/131.0.0.0 Mobile Safari/537.36",
    "Mozilla/5.0 (iPad; CPU OS 18_0 like Mac OS X) AppleWebKit/605.1.15 (KHTML, like Gecko)"
    " Version/18.0 Mobile/15E148 Safari/604.1",
    "Mozilla/5.0 (Linux; Android 14; Tablet) AppleWebKit/537.36 (KHTML, like Gecko)"
    " Chrome/131.0.0.0 Safari/537.36",
)
AGENTS_OF_DEVICE: Final = ((0, 1, 2), (3, 4), (5, 6))  # BROWSER_AGENTS indices per device
CRAWLER_AGENTS: Final = (
    "Mozilla/5.0 (compatible; QuillIndexBot/1.3; +https://crawl.quillmoor.invalid)",
    "ShelfWatchCrawler/2.1 (price monitoring)",
    "Mozilla/5.0 (compatible; Arborspider/0.9)",
    "Mozilla/5.0 (X11; Linux x86_64) AppleWebKit/537.36 (KHTML, like Gecko)"
    " HeadlessBrowser/121.0 Safari/537.36",
)
USER_AGENTS: Final = BROWSER_AGENTS + CRAWLER_AGENTS
BOT_UA_TOKENS: Final = ("bot", "crawler", "spider", "headless")  # case-insensitive substrings
SHARED_BOT_IPS: Final = tuple(
    hashlib.sha256(f"quillmoor-shared-ip-{k}".encode()).hexdigest()[:16] for k in range(4)
)
KINDS: Final = ("human", "crawler", "scraper", "click_burst")
BOT_EVENT_SHARES: Final = {"crawler": 0.35, "scraper": 0.45, "click_burst": 0.20}
CLICK_BURST_BACK_MS: Final = (1, 300)
ROW_GROUP_ROWS: Final = 1 << 20
_ARROW: Final = {"timestamp": pa.timestamp("us"), "string": pa.string(), "double": pa.float64()}
EVENT_SCHEMA: Final = pa.schema([(k, _ARROW[t]) for k, t in EVENT_COLUMNS.items()])
EXPOSURE_SCHEMA: Final = pa.schema([(k, _ARROW[t]) for k, t in EXPOSURE_COLUMNS.items()])


@dataclass(frozen=True)
class Sessions:
    """One row per session; the string columns are indices into the tables, -1 for null."""

    cookie: IntArray
    account: IntArray
    ip: IntArray
    ua: IntArray  # into USER_AGENTS
    country: IntArray  # into COUNTRIES
    device: IntArray  # into DEVICES
    kind: IntArray  # into KINDS
    cookies: list[str]
    accounts: list[str]
    ips: list[str]


@dataclass(frozen=True)
class Events:
    """One row per event, grouped by session and in time order within a session."""

    session: IntArray
    ts_ms: IntArray  # whole milliseconds since the start of the pre-period
    event: IntArray  # into EVENTS
    page: IntArray  # into PAGES
    value: FloatArray  # NaN for null
    latency: FloatArray  # NaN for null


def merge(a: tuple[Sessions, Events], b: tuple[Sessions, Events]) -> tuple[Sessions, Events]:
    """``a``'s sessions and events followed by ``b``'s, with ``b``'s indices shifted."""
    (sa, ea), (sb, eb) = a, b
    shift = {"cookie": len(sa.cookies), "ip": len(sa.ips), "session": len(sa.cookie)}
    shift["account"] = len(sa.accounts)

    def join(x: object, y: object, name: str) -> object:
        if isinstance(x, list) and isinstance(y, list):
            return x + y
        assert isinstance(x, np.ndarray) and isinstance(y, np.ndarray)
        return np.concatenate([x, np.where(y >= 0, y + shift[name], y) if name in shift else y])

    def both(cls: type[Sessions] | type[Events], x: object, y: object) -> dict[str, object]:
        names = [f.name for f in dataclasses.fields(cls)]
        return {n: join(getattr(x, n), getattr(y, n), n) for n in names}

    return Sessions(**both(Sessions, sa, sb)), Events(**both(Events, ea, eb))  # type: ignore[arg-type]


def hex_ids(rng: np.random.Generator, n: int, chars: int = 16) -> list[str]:
    """``n`` random lowercase hex strings of ``chars`` characters."""
    text = rng.bytes(n * chars // 2).hex()
    return [text[i : i + chars] for i in range(0, n * chars, chars)]


def scaled_ints(uniform: FloatArray, lo: IntArray, hi: IntArray) -> IntArray:
    """One integer in ``[lo, hi]`` (inclusive) per element, from uniforms in [0, 1)."""
    span = (hi - lo + 1).astype(np.float64)
    out: IntArray = lo + np.floor(uniform * span).astype(np.int64)
    return out


def ranks(sizes: IntArray) -> IntArray:
    """0, 1, ..., size - 1 for each group of ``sizes`` consecutive elements."""
    out: IntArray = np.arange(int(sizes.sum())) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    return out


def stamp(session: IntArray, gaps: IntArray, start_ms: IntArray) -> IntArray:
    """Times of events grouped by session: the session start plus the running sum of gaps."""
    total = np.cumsum(gaps)
    first = np.flatnonzero(np.r_[True, session[1:] != session[:-1]])
    before = np.repeat(total[first] - gaps[first], np.diff(np.r_[first, len(session)]))
    out: IntArray = start_ms[session] + total - before
    return out


def lognormal_ms(rng: np.random.Generator, median: FloatArray, sigma: float) -> FloatArray:
    """Latencies in whole milliseconds, at least 20."""
    raw = median * np.exp(rng.normal(0.0, sigma, len(median)))
    out: FloatArray = np.maximum(np.round(raw), 20.0)
    return out


def arrow_strings(index: IntArray, table: list[str] | tuple[str, ...]) -> pa.Array:
    """The strings ``table[index]`` as an Arrow string array; a negative index is null."""
    mask = index < 0
    codes = pa.array(np.where(mask, 0, index).astype(np.int32), mask=mask)
    strings = pa.array(list(table), pa.string())
    return pa.DictionaryArray.from_arrays(codes, strings).dictionary_decode()


def sort_rank(table: list[str] | tuple[str, ...]) -> IntArray:
    """Each string's position in sorted order, to sort rows by a string column."""
    out = np.empty(len(table), dtype=np.int64)
    out[np.argsort(np.array(table), kind="stable")] = np.arange(len(table))
    return out


def timestamps(ts_ms: IntArray, start: dt.datetime) -> pa.Array:
    """Milliseconds after the naive UTC ``start`` as an Arrow ``timestamp[us]`` array."""
    epoch_ms = (start - dt.datetime(1970, 1, 1)) // dt.timedelta(milliseconds=1)
    return pa.array((ts_ms + epoch_ms) * 1000, pa.timestamp("us"))


def write_parquet(table: pa.Table, path: Path) -> None:
    """zstd, one fixed row-group size, delta-encoded ``ts``: the same table, the same bytes."""
    pq.write_table(
        table,
        path,
        compression="zstd",
        compression_level=19,
        row_group_size=ROW_GROUP_ROWS,
        use_dictionary=[c for c in table.column_names if c != "ts"],
        column_encoding={"ts": "DELTA_BINARY_PACKED"},
    )


def write_events(
    folder: Path, s: Sessions, e: Events, session_ids: list[str], start: dt.datetime, days: int
) -> None:
    """One Parquet file per day under ``folder/date=YYYY-MM-DD``, rows by ts, cookie, event."""
    cookie_rank = sort_rank(s.cookies)
    order = np.lexsort((sort_rank(EVENTS)[e.event], cookie_rank[s.cookie[e.session]], e.ts_ms))
    of = e.session[order]
    columns = {
        "ts": timestamps(e.ts_ms[order], start),
        "cookie_id": arrow_strings(s.cookie[of], s.cookies),
        "account_id": arrow_strings(s.account[of], s.accounts),
        "session_id": arrow_strings(of, session_ids),
        "event": arrow_strings(e.event[order], EVENTS),
        "value": pa.array(e.value[order], pa.float64(), from_pandas=True),
        "latency_ms": pa.array(e.latency[order], pa.float64(), from_pandas=True),
        "user_agent": arrow_strings(s.ua[of], USER_AGENTS),
        "ip_hash": arrow_strings(s.ip[of], s.ips),
        "page": arrow_strings(e.page[order], PAGES),
        "country": arrow_strings(s.country[of], COUNTRIES),
        "device": arrow_strings(s.device[of], DEVICES),
    }
    table = pa.table(columns, schema=EVENT_SCHEMA)
    bounds = np.searchsorted(e.ts_ms[order] // DAY_MS, np.arange(days + 1))
    if bounds[-1] != len(order):
        raise AssertionError("a session ran past the last day")  # pragma: no cover
    for d in range(days):
        part = folder / f"date={start + dt.timedelta(days=d):%Y-%m-%d}"
        part.mkdir(parents=True)
        write_parquet(table.slice(bounds[d], bounds[d + 1] - bounds[d]), part / "part-0.parquet")


def write_exposures(
    path: Path,
    rows: IntArray,
    cookies: list[str],
    labels: tuple[tuple[str, ...], ...],
    start: dt.datetime,
) -> None:
    """The exposure log from rows (unit, experiment, variant, ts_ms), by ts, unit, experiment."""
    unit, experiment, variant, ts_ms = rows
    order = np.lexsort((experiment, sort_rank(cookies)[unit], ts_ms))
    columns = {
        "unit_id": arrow_strings(unit[order], cookies),
        "experiment": arrow_strings(experiment[order], labels[0]),
        "variant": arrow_strings(variant[order], labels[1]),
        "ts": timestamps(ts_ms[order], start),
    }
    write_parquet(pa.table(columns, schema=EXPOSURE_SCHEMA), path)


# kind: active days (lo, hi), sessions a day (lo, hi), page_load share, gap ms (lo, hi), latency
_PROFILE: Final = {
    "crawler": ((3, 12), (1, 3), 0.35, (150, 2500), 120.0),
    "scraper": ((1, 4), (1, 2), 0.30, (20, 400), 180.0),
    "click_burst": ((1, 5), (1, 3), 0.0, (40, 900), 300.0),
}
_SESSION_EVENTS: Final = {"crawler": (25, 150), "scraper": (220, 700)}
_BURST_PAIRS: Final = {"heavy": (31, 60), "light": (8, 27)}  # click+back pairs per session
_HEAVY_BURST_SHARE: Final = 0.65  # click-burst bots whose sessions exceed 60 events
_SHARED_IP_SHARE: Final = {"crawler": 0.0, "scraper": 0.4, "click_burst": 0.6}


def _sessions_of_kind(
    rng: np.random.Generator, kind: str, total_days: int, target: int
) -> tuple[IntArray, IntArray, IntArray, IntArray]:
    """Bots of one kind until ``target`` events: per session bot, start, size; heavy per bot."""
    (d_lo, d_hi), (s_lo, s_hi), _, _, _ = _PROFILE[kind]
    n = 8 + target // 60
    first = rng.integers(0, total_days, n)
    active = np.minimum(rng.integers(d_lo, d_hi + 1, n), total_days - first)
    heavy = (rng.random(n) < _HEAVY_BURST_SHARE).astype(np.int64)
    bot_day = np.repeat(np.arange(n), active)
    day = first[bot_day] + ranks(active)
    per_day = rng.integers(s_lo, s_hi + 1, len(day))
    bot = np.repeat(bot_day, per_day)
    slot = ranks(per_day)  # sessions of a day start in separate 7-hour windows
    start = np.repeat(day, per_day) * DAY_MS + slot * 7 * HOUR_MS
    start += rng.integers(0, 5 * HOUR_MS, len(bot))
    if kind == "click_burst":
        (h_lo, h_hi), (l_lo, l_hi) = _BURST_PAIRS["heavy"], _BURST_PAIRS["light"]
        many, few = rng.integers(h_lo, h_hi + 1, len(bot)), rng.integers(l_lo, l_hi + 1, len(bot))
        size = 2 + 2 * np.where(heavy[bot] == 1, many, few)
    else:
        size = rng.integers(_SESSION_EVENTS[kind][0], _SESSION_EVENTS[kind][1] + 1, len(bot))
    per_bot = np.bincount(bot, weights=size, minlength=n)
    kept = min(int(np.searchsorted(np.cumsum(per_bot), target)) + 1, n)
    keep = bot < kept
    return bot[keep], start[keep], size[keep], heavy[:kept]


def _events_of_kind(
    rng: np.random.Generator, kind: str, size: IntArray
) -> tuple[IntArray, IntArray, IntArray, FloatArray]:
    """Per event of the sessions of one kind: event, page, gap before it, latency."""
    _, _, load_share, (g_lo, g_hi), latency_median = _PROFILE[kind]
    pos = ranks(size)
    n = len(pos)
    gap = rng.integers(g_lo, g_hi + 1, n)
    if kind == "click_burst":
        pairs = np.where(pos % 2 == 0, CLICK, BACK)
        event = np.where(pos == 0, PAGE_LOAD, np.where(pos == 1, IMPRESSION, pairs))
        back_lo, back_hi = CLICK_BURST_BACK_MS
        gap = np.where(event == BACK, rng.integers(back_lo, back_hi + 1, n), gap)
        pause = (event == CLICK) & (rng.random(n) < 0.1)
        gap = np.where(pause, rng.integers(5_000, 40_001, n), gap)
        page = np.where(rng.random(n) < 0.7, PAGES.index("product"), PAGES.index("search"))
    else:
        event = np.where((pos == 0) | (rng.random(n) < load_share), PAGE_LOAD, IMPRESSION)
        page = rng.choice(3, n, p=[0.1, 0.3, 0.6])
    latency = lognormal_ms(rng, np.full(n, latency_median), 0.4)
    latency = np.where(event == PAGE_LOAD, latency, np.nan)
    return event.astype(np.int64), page.astype(np.int64), gap.astype(np.int64), latency


def bots(
    rng: np.random.Generator, total_days: int, target_events: int
) -> tuple[Sessions, Events, dict[str, object]]:
    """About ``target_events`` bot events over ``total_days`` days, and facts per kind."""
    cookies: list[str] = []
    ips: list[str] = list(SHARED_BOT_IPS)
    columns: dict[str, list[IntArray]] = {k: [] for k in ("cookie", "ip", "ua", "device")}
    columns.update(country=[], kind=[], start=[], size=[])
    events: list[tuple[IntArray, IntArray, IntArray, FloatArray]] = []
    facts: dict[str, object] = {
        "shared_ip_hashes": list(SHARED_BOT_IPS),
        "user_agent_tokens": list(BOT_UA_TOKENS),
        "crawler_user_agents": list(CRAWLER_AGENTS),
    }
    for kind, share in BOT_EVENT_SHARES.items():
        bot, start, size, heavy = _sessions_of_kind(
            rng, kind, total_days, round(target_events * share)
        )
        n_bots = len(heavy)
        shared = rng.random(n_bots) < _SHARED_IP_SHARE[kind]
        ip = np.where(
            shared, rng.integers(0, len(SHARED_BOT_IPS), n_bots), len(ips) + np.arange(n_bots)
        )
        ips += hex_ids(rng, n_bots)
        device = np.where(rng.random(n_bots) < 0.8, 0, 1) if kind == "click_burst" else 0 * ip
        browser = np.where(device == 0, rng.integers(0, 3, n_bots), rng.integers(3, 5, n_bots))
        crawler = len(BROWSER_AGENTS) + rng.integers(0, len(CRAWLER_AGENTS), n_bots)
        ua = crawler if kind == "crawler" else browser
        country = rng.integers(0, len(COUNTRIES), n_bots)
        columns["cookie"].append(len(cookies) + bot)
        cookies += hex_ids(rng, n_bots)
        for name, per_bot in (("ip", ip), ("ua", ua), ("device", device), ("country", country)):
            columns[name].append(per_bot[bot])
        columns["kind"].append(np.full(len(bot), KINDS.index(kind)))
        columns["start"].append(start)
        columns["size"].append(size)
        events.append(_events_of_kind(rng, kind, size))
        counts = {
            "cookies": n_bots,
            "sessions": len(bot),
            "events": int(size.sum()),
            "cookies_on_shared_ips": int(shared.sum()),
            "min_session_events": int(size.min()),
            "max_session_events": int(size.max()),
            "sessions_over_60_events": int((size > 60).sum()),
        }
        if kind == "click_burst":
            counts["cookies_with_sessions_over_60_events"] = int(heavy.sum())
        facts[kind] = counts
    flat = {k: np.concatenate(v) for k, v in columns.items()}
    session = np.repeat(np.arange(len(flat["size"])), flat["size"])
    event, page, gap, latency = (np.concatenate([e[i] for e in events]) for i in range(4))
    sessions = Sessions(
        **{k: flat[k] for k in ("cookie", "ip", "ua", "country", "device", "kind")},
        account=np.full(len(flat["size"]), -1, dtype=np.int64),
        cookies=cookies,
        accounts=[],
        ips=ips,
    )
    ts = stamp(session, gap, flat["start"])
    value = np.full(len(session), np.nan)
    return sessions, Events(session, ts, event, page, value, latency.astype(np.float64)), facts
