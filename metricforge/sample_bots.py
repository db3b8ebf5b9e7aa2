"""Bots of the invented shop, and the batch layout shared with the human part of the generator.

Three kinds: crawlers that announce themselves in the user agent, scrapers with a browser
user agent and hundreds of events per session, and click-burst bots with a browser user
agent whose every click is followed by a back within 300 ms. Bots never buy, get refunds or
unsubscribe. Some of them share a few IP hashes.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import Final

import numpy as np
import numpy.typing as npt

IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]

DAY_MS: Final = 86_400_000
HOUR_MS: Final = 3_600_000
EVENTS: Final = ("impression", "click", "back", "purchase", "refund", "unsubscribe", "page_load")
IMPRESSION, CLICK, BACK, PURCHASE, REFUND, UNSUBSCRIBE, PAGE_LOAD = range(7)
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
DEVICE_AGENTS: Final = ((0, 1, 2), (3, 4), (5, 6))  # BROWSER_AGENTS indices per device
CRAWLER_AGENTS: Final = (
    "Mozilla/5.0 (compatible; QuillIndexBot/1.3; +https://crawl.quillmoor.invalid)",
    "ShelfWatchCrawler/2.1 (price monitoring)",
    "Mozilla/5.0 (compatible; Arborspider/0.9)",
    "Mozilla/5.0 (X11; Linux x86_64) AppleWebKit/537.36 (KHTML, like Gecko)"
    " HeadlessBrowser/121.0 Safari/537.36",
)
USER_AGENTS: Final = BROWSER_AGENTS + CRAWLER_AGENTS
BOT_UA_TOKENS: Final = ("bot", "crawler", "spider", "headless")  # case-insensitive
SHARED_BOT_IPS: Final = tuple(
    hashlib.sha256(f"quillmoor-shared-ip-{k}".encode()).hexdigest()[:16] for k in range(4)
)
KINDS: Final = ("human", "crawler", "scraper", "click_burst")
BOT_EVENT_SHARES: Final = {"crawler": 0.35, "scraper": 0.45, "click_burst": 0.20}


@dataclass(frozen=True)
class Batch:
    """Sessions and their events; string columns are indices into the batch's tables."""

    cookie: IntArray  # per session, index into cookies
    account: IntArray  # per session, index into accounts, -1 when logged out
    ip: IntArray  # per session, index into ips
    ua: IntArray  # per session, index into USER_AGENTS
    country: IntArray  # per session
    device: IntArray  # per session
    kind: IntArray  # per session, index into KINDS
    session: IntArray  # per event, index of its session; events grouped by session in time order
    ts_ms: IntArray  # per event, whole milliseconds since the start of the pre-period
    event: IntArray  # per event, index into EVENTS
    page: IntArray  # per event, index into PAGES
    value: FloatArray  # per event, NaN when null
    latency: FloatArray  # per event, NaN when null
    cookies: list[str]
    accounts: list[str]
    ips: list[str]


def hex_ids(rng: np.random.Generator, n: int, chars: int = 16) -> list[str]:
    """``n`` random lowercase hex strings of ``chars`` characters."""
    text = rng.bytes(n * chars // 2).hex()
    return [text[i : i + chars] for i in range(0, n * chars, chars)]


def uniform_ints(rng: np.random.Generator, lo: IntArray, hi: IntArray) -> IntArray:
    """One integer in ``[lo, hi]`` (inclusive) per element."""
    span = (hi - lo + 1).astype(np.float64)
    return lo + np.floor(rng.random(len(lo)) * span).astype(np.int64)


def stamp(session: IntArray, gaps: IntArray, start_ms: IntArray) -> IntArray:
    """Times of events grouped by session: the session start plus the running sum of gaps."""
    total = np.cumsum(gaps)
    first = np.flatnonzero(np.r_[True, session[1:] != session[:-1]])
    sizes = np.diff(np.r_[first, len(session)])
    before = np.repeat(total[first] - gaps[first], sizes)
    result: IntArray = start_ms[session] + total - before
    return result


def lognormal_ms(rng: np.random.Generator, median: FloatArray, sigma: float) -> FloatArray:
    """Latencies in whole milliseconds, at least 20."""
    raw = median * np.exp(rng.normal(0.0, sigma, len(median)))
    out: FloatArray = np.maximum(np.round(raw), 20.0)
    return out


# kind: (active days lo, hi), (sessions a day lo, hi), page_load share, gap ms lo, hi, latency
_PROFILE: Final = {
    "crawler": ((3, 12), (1, 3), 0.35, 150, 2500, 120.0),
    "scraper": ((1, 4), (1, 2), 0.30, 20, 400, 180.0),
    "click_burst": ((1, 5), (1, 3), 0.0, 40, 900, 300.0),
}
_SESSION_SIZE: Final = {"crawler": (25, 150), "scraper": (220, 700)}
_HEAVY_BURST_SHARE: Final = 0.65  # click-burst bots whose sessions exceed 60 events
_SHARED_IP_SHARE: Final = {"crawler": 0.0, "scraper": 0.4, "click_burst": 0.6}


def _kind_sessions(
    rng: np.random.Generator, kind: str, total_days: int, target: int
) -> tuple[IntArray, IntArray, IntArray, IntArray, int]:
    """Bots of one kind until ``target`` events: per session (bot, start ms, size), bot heavy."""
    (d_lo, d_hi), (s_lo, s_hi), _, _, _, _ = _PROFILE[kind]
    n = 8 + target // 60
    span = rng.integers(d_lo, d_hi + 1, n)
    first = rng.integers(0, total_days, n)
    heavy = (rng.random(n) < _HEAVY_BURST_SHARE).astype(np.int64)
    days_per_bot = np.minimum(span, total_days - first)
    bot_of_day = np.repeat(np.arange(n), days_per_bot)
    day_rank = np.arange(len(bot_of_day)) - np.repeat(np.cumsum(days_per_bot) - days_per_bot, days_per_bot)
    day = first[bot_of_day] + day_rank
    per_day = rng.integers(s_lo, s_hi + 1, len(day))
    bot = np.repeat(bot_of_day, per_day)
    slot = np.arange(len(bot)) - np.repeat(np.cumsum(per_day) - per_day, per_day)
    start = np.repeat(day, per_day) * DAY_MS + slot * 7 * HOUR_MS + rng.integers(0, 5 * HOUR_MS, len(bot))
    if kind == "click_burst":
        pairs = np.where(heavy[bot] == 1, rng.integers(31, 61, len(bot)), rng.integers(8, 28, len(bot)))
        size = 2 + 2 * pairs
    else:
        size = rng.integers(_SESSION_SIZE[kind][0], _SESSION_SIZE[kind][1] + 1, len(bot))
    per_bot = np.bincount(bot, weights=size, minlength=n)
    keep_bots = int(np.searchsorted(np.cumsum(per_bot), target)) + 1
    if keep_bots > n:
        raise AssertionError("bot pool too small")  # pragma: no cover - sized generously
    keep = bot < keep_bots
    return bot[keep], start[keep], size[keep], heavy[:keep_bots], keep_bots


def _kind_events(
    rng: np.random.Generator, kind: str, session: IntArray, size: IntArray
) -> tuple[IntArray, IntArray, IntArray, FloatArray]:
    """Per event of sessions of one kind: event, page, gap before it, latency."""
    _, _, load_share, g_lo, g_hi, latency_median = _PROFILE[kind]
    n = len(session)
    pos = np.arange(n) - np.repeat(np.cumsum(size) - size, size)
    gap = rng.integers(g_lo, g_hi + 1, n)
    if kind == "click_burst":
        event = np.where(pos == 0, PAGE_LOAD, np.where(pos == 1, IMPRESSION, CLICK + (pos % 2 == 1)))
        gap = np.where(event == BACK, rng.integers(1, 301, n), gap)
        pause = (event == CLICK) & (rng.random(n) < 0.1)
        gap = np.where(pause, rng.integers(5_000, 40_001, n), gap)
        page = np.where(rng.random(n) < 0.7, PAGES.index("product"), PAGES.index("search"))
    else:
        event = np.where((pos == 0) | (rng.random(n) < load_share), PAGE_LOAD, IMPRESSION)
        page = rng.choice(3, n, p=[0.1, 0.3, 0.6])
    med = np.full(n, latency_median)
    latency = np.where(event == PAGE_LOAD, lognormal_ms(rng, med, 0.4), np.nan)
    return event.astype(np.int64), page.astype(np.int64), gap.astype(np.int64), latency


def bots(rng: np.random.Generator, total_days: int, target_events: int) -> tuple[Batch, dict[str, object]]:
    """About ``target_events`` bot events over ``total_days`` days, and counts per kind."""
    parts: list[tuple[str, IntArray, IntArray, IntArray, IntArray]] = []
    cookies: list[str] = []
    ips: list[str] = list(SHARED_BOT_IPS)
    cookie_parts, ip_parts, ua_parts, country_parts, device_parts, kind_parts = [], [], [], [], [], []
    facts: dict[str, object] = {}
    for kind, share in BOT_EVENT_SHARES.items():
        bot, start, size, heavy, n_bots = _kind_sessions(rng, kind, total_days, int(target_events * share))
        offset = len(cookies)
        cookies += hex_ids(rng, n_bots)
        shared = rng.random(n_bots) < _SHARED_IP_SHARE[kind]
        own_ip = len(ips) + np.arange(n_bots)
        ips += hex_ids(rng, n_bots)
        ip = np.where(shared, rng.integers(0, len(SHARED_BOT_IPS), n_bots), own_ip)
        if kind == "crawler":
            ua = len(BROWSER_AGENTS) + rng.integers(0, len(CRAWLER_AGENTS), n_bots)
            device = np.zeros(n_bots, dtype=np.int64)
        else:
            device = np.where(rng.random(n_bots) < 0.8, 0, 1) if kind == "click_burst" else np.zeros(n_bots, dtype=np.int64)
            ua = np.where(device == 0, rng.integers(0, 3, n_bots), rng.integers(3, 5, n_bots))
        country = rng.integers(0, len(COUNTRIES), n_bots)
        cookie_parts.append(offset + bot)
        ip_parts.append(ip[bot])
        ua_parts.append(ua[bot])
        device_parts.append(device[bot])
        country_parts.append(country[bot])
        kind_parts.append(np.full(len(bot), KINDS.index(kind)))
        parts.append((kind, start, size, bot, shared))
        facts[kind] = {
            "cookies": n_bots,
            "sessions": len(bot),
            "events": int(size.sum()),
            "cookies_on_shared_ips": int(shared.sum()),
            "sessions_over_60_events": int((size > 60).sum()),
            "max_session_events": int(size.max()),
            "min_session_events": int(size.min()),
        }
        if kind == "click_burst":
            facts[kind] = {**facts[kind], "cookies_with_sessions_over_60": int(heavy.sum())}
    starts = np.concatenate([p[1] for p in parts])
    sizes = np.concatenate([p[2] for p in parts])
    session = np.repeat(np.arange(len(sizes)), sizes)
    events, pages, gaps, latencies = [], [], [], []
    offset = 0
    for kind, _, size, _, _ in parts:
        local = np.repeat(np.arange(len(size)), size)
        e, p, g, lat = _kind_events(rng, kind, local + offset, size)
        events.append(e)
        pages.append(p)
        gaps.append(g)
        latencies.append(lat)
        offset += len(size)
    gap = np.concatenate(gaps)
    batch = Batch(
        cookie=np.concatenate(cookie_parts),
        account=np.full(len(sizes), -1, dtype=np.int64),
        ip=np.concatenate(ip_parts),
        ua=np.concatenate(ua_parts),
        country=np.concatenate(country_parts),
        device=np.concatenate(device_parts),
        kind=np.concatenate(kind_parts),
        session=session,
        ts_ms=stamp(session, gap, starts),
        event=np.concatenate(events),
        page=np.concatenate(pages),
        value=np.full(len(session), np.nan),
        latency=np.concatenate(latencies),
        cookies=cookies,
        accounts=[],
        ips=ips,
    )
    return batch, facts
