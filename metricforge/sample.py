"""A seeded, invented scenario: the online shop "Quillmoor Supply" and its experiments.

People browse, click, return to the previous page ("back"), buy, get refunds and
unsubscribe from the newsletter; bots crawl, scrape and click in bursts. Four
experiments run on all traffic at once, assigned by a salted hash of the cookie.
The same arguments give byte-identical files.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import shutil
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from metricforge.errors import InputDataError

DEFAULT_USERS = 10_000
PRE_DAYS = 14
START = dt.datetime(2026, 9, 1)
BOT_SHARE_TARGET = 0.40
SESSION_EVENT_LIMIT_HINT = 60
EXPERIMENTS = ("checkout_layout", "homepage_aa", "promo_banner", "image_autoload")
BROWSERS = (
    "Mozilla/5.0 (X11; Linux x86_64) Gecko/20100101 Firefox/131.0",
    "Mozilla/5.0 (Windows NT 10.0; Win64; x64) AppleWebKit/537.36 Chrome/130.0 Safari/537.36",
    "Mozilla/5.0 (iPhone; CPU iPhone OS 18_0 like Mac OS X) AppleWebKit/605.1.15 Mobile/15E148",
    "Mozilla/5.0 (Linux; Android 15) AppleWebKit/537.36 Chrome/130.0 Mobile Safari/537.36",
)
CRAWLERS = (
    "Mozilla/5.0 (compatible; QuillIndexBot/1.3)",
    "PriceCrawler/2.0 (+shop-prices.invalid)",
    "Mozilla/5.0 (compatible; LinkSpider/0.9)",
    "Mozilla/5.0 HeadlessBrowser/118.0",
)
COUNTRIES = ("DE", "FR", "NL", "PL", "ES", "SE")
DEVICES = ("desktop", "mobile", "tablet")
PAGES = ("home", "search", "product", "checkout")
TRUE_EFFECTS = {
    "checkout_layout": {
        "relative_effects": {
            "purchases": 0.10,
            "revenue": 0.10,
            "refunds": 0.10,
            "unsubscribes": 0.50,
        },
        "note": "treatment multiplies the per-session purchase probability by 1.10 and the"
        " unsubscribe probability by 1.50; visiting, clicks and latency are unchanged, so these"
        " are ratios of per-unit expectations (treatment/control - 1), whatever the number of"
        " sessions per unit and whatever share of non-purchasing bots remains",
    },
    "homepage_aa": {"relative_effects": {}, "note": "A/A: both variants identical"},
    "promo_banner": {
        "relative_effects": {},
        "note": "no behavioural effect; a logging bug drops every exposure row of about 10% of"
        " treatment cookies, so the observed split is not the planned 50/50",
    },
    "image_autoload": {
        "relative_effects": {},
        "note": "treatment adds 30 page_load events to about 15% of human sessions, pushing"
        f" them over a per-session limit of {SESSION_EVENT_LIMIT_HINT} events: a treatment"
        " that changes bot classification under a rate rule",
    },
}


def _hex(rng: np.random.Generator, n: int = 16) -> str:
    return rng.bytes(n // 2).hex()


def _bucket(experiment: str, unit: str) -> int:
    return int(hashlib.sha256(f"{experiment}:{unit}".encode()).hexdigest()[:8], 16)


def variant_of(experiment: str, unit: str) -> str:
    return "treatment" if _bucket(experiment, unit) % 2 else "control"


def _dropped_exposure(unit: str) -> bool:
    return variant_of("promo_banner", unit) == "treatment" and _bucket("log-bug", unit) % 10 == 0


@dataclass
class _Log:
    cols: dict[str, list[object]] = field(
        default_factory=lambda: {
            k: []
            for k in (
                "ts",
                "cookie_id",
                "account_id",
                "session_id",
                "event",
                "value",
                "latency_ms",
                "user_agent",
                "ip_hash",
                "page",
                "country",
                "device",
            )
        }
    )
    exposures: dict[str, list[object]] = field(
        default_factory=lambda: {k: [] for k in ("unit_id", "experiment", "variant", "ts")}
    )

    def add(self, **row: object) -> None:
        for key, values in self.cols.items():
            values.append(row.get(key))

    def __len__(self) -> int:
        return len(self.cols["ts"])


@dataclass
class _Who:
    cookie: str
    account: str | None
    ip: str
    ua: str
    country: str
    device: str


class _Session:
    """Appends one session's events at strictly increasing whole-millisecond times."""

    def __init__(self, log: _Log, rng: np.random.Generator, who: _Who, start: dt.datetime):
        self.log, self.rng, self.who, self.t = log, rng, who, start
        self.id = _hex(rng)
        self.n = 0

    def emit(self, event: str, gap_ms: int, **extra: object) -> dt.datetime:
        self.t += dt.timedelta(milliseconds=max(int(gap_ms), 1))
        w = self.who
        page = extra.pop("page", PAGES[int(self.rng.integers(len(PAGES)))])
        self.log.add(
            ts=self.t,
            cookie_id=w.cookie,
            account_id=w.account,
            session_id=self.id,
            event=event,
            user_agent=w.ua,
            ip_hash=w.ip,
            page=page,
            country=w.country,
            device=w.device,
            **extra,
        )
        self.n += 1
        return self.t


def _expose(log: _Log, unit: str, at: dt.datetime) -> None:
    for name in EXPERIMENTS:
        if name == "promo_banner" and _dropped_exposure(unit):
            continue
        for key, value in zip(log.exposures, (unit, name, variant_of(name, unit), at), strict=True):
            log.exposures[key].append(value)


def _human_session(
    log: _Log,
    rng: np.random.Generator,
    who: _Who,
    start: dt.datetime,
    traits: tuple[float, float],
    in_experiment: bool,
) -> None:
    p_click, p_buy = traits
    treat_checkout = in_experiment and variant_of("checkout_layout", who.cookie) == "treatment"
    autoload = in_experiment and variant_of("image_autoload", who.cookie) == "treatment"
    s = _Session(log, rng, who, start)
    base = {"desktop": 5.6, "mobile": 6.0, "tablet": 5.8}[who.device]
    loads = 1 + int(rng.poisson(1.5))
    if autoload and rng.random() < 0.15:
        loads += 30
    for _ in range(loads):
        s.emit(
            "page_load",
            rng.integers(200, 3000),
            latency_ms=round(float(np.exp(rng.normal(base, 0.4))), 1),
        )
    for _ in range(2 + min(int(rng.poisson(4)), 12)):
        s.emit("impression", rng.integers(500, 8000))
        if rng.random() < p_click:
            clicked = s.emit("click", rng.integers(500, 5000))
            kind = rng.random()
            if kind < 0.35:  # unsuccessful click: back within 30 s
                s.t = clicked + dt.timedelta(milliseconds=int(rng.integers(1000, 29000)))
                s.emit("back", 1)
            elif kind < 0.60:
                s.t = clicked + dt.timedelta(milliseconds=int(rng.integers(31000, 300000)))
                s.emit("back", 1)
    if rng.random() < p_buy * (1.10 if treat_checkout else 1.0):
        s.emit(
            "purchase",
            rng.integers(5000, 60000),
            page="checkout",
            value=round(float(np.exp(rng.normal(3.55, 0.5))), 2),
        )
        if rng.random() < 0.08:
            s.emit(
                "refund",
                rng.integers(60000, 600000),
                page="checkout",
                value=round(float(np.exp(rng.normal(3.3, 0.5))), 2),
            )
    if rng.random() < 0.012 * (1.5 if treat_checkout else 1.0):
        s.emit("unsubscribe", rng.integers(1000, 10000), page="home")


def _day_start(day: int, rng: np.random.Generator) -> dt.datetime:
    return START + dt.timedelta(days=day, seconds=int(rng.integers(0, 80_000)))


def _humans(log: _Log, rng: np.random.Generator, users: int, days: int) -> dict[str, int]:
    total_days = PRE_DAYS + days
    changed = 0
    for _ in range(users):
        who = _Who(
            _hex(rng),
            _hex(rng) if rng.random() < 0.4 else None,
            _hex(rng, 12),
            BROWSERS[int(rng.integers(len(BROWSERS)))],
            COUNTRIES[int(rng.integers(len(COUNTRIES)))],
            DEVICES[int(rng.choice(3, p=[0.5, 0.4, 0.1]))],
        )
        visit = float(rng.beta(1.2, 8.0))
        traits = (float(rng.beta(2, 8)), float(rng.beta(1.5, 14)))
        switch = PRE_DAYS + int(rng.integers(1, days)) if rng.random() < 0.05 else None
        changed += switch is not None
        for day in range(total_days):
            if switch is not None and day == switch:
                who = _Who(_hex(rng), who.account, who.ip, who.ua, who.country, who.device)
            if rng.random() >= visit:
                continue
            start = _day_start(day, rng)
            in_experiment = day >= PRE_DAYS
            if in_experiment:
                _expose(log, who.cookie, start)
            _human_session(log, rng, who, start, traits, in_experiment)
    return {"humans": users, "cookie_changes": changed}


def _bot_sessions(kind: str, rng: np.random.Generator) -> Iterator[tuple[str, int]]:
    if kind == "crawler":
        for _ in range(int(rng.integers(15, 45))):
            yield ("page_load" if rng.random() < 0.4 else "impression"), int(rng.integers(50, 900))
    elif kind == "scraper":
        for _ in range(int(rng.integers(200, 400))):
            yield ("page_load" if rng.random() < 0.5 else "impression"), int(rng.integers(20, 400))
    else:  # click burst: every click followed by a back within 300 ms
        for _ in range(int(rng.integers(35, 80))):
            yield "click", int(rng.integers(50, 400))
            yield "back", int(rng.integers(1, 300))


def _bots(log: _Log, rng: np.random.Generator, days: int, target: int) -> dict[str, int]:
    counts = {"crawler": 0, "scraper": 0, "click_burst": 0}
    shared_ips = [_hex(rng, 12) for _ in range(4)]
    kinds = ("crawler", "scraper", "click_burst")
    events = 0
    while events < target:
        kind = kinds[sum(counts.values()) % 3]
        counts[kind] += 1
        ua = CRAWLERS[int(rng.integers(len(CRAWLERS)))] if kind == "crawler" else BROWSERS[0]
        ip = shared_ips[int(rng.integers(4))] if rng.random() < 0.3 else _hex(rng, 12)
        who = _Who(_hex(rng), None, ip, ua, COUNTRIES[0], "desktop")
        first = int(rng.integers(0, PRE_DAYS + days))
        for day in range(first, min(first + int(rng.integers(1, 6)), PRE_DAYS + days)):
            start = _day_start(day, rng)
            if day >= PRE_DAYS:
                _expose(log, who.cookie, start)
            s = _Session(log, rng, who, start)
            for event, gap in _bot_sessions(kind, rng):
                s.emit(event, gap)
            events += s.n
    counts["bot_events"] = events
    counts["shared_ip_hashes"] = len(shared_ips)
    return counts


EVENT_SCHEMA = pa.schema(
    [
        ("ts", pa.timestamp("us")),
        ("cookie_id", pa.string()),
        ("account_id", pa.string()),
        ("session_id", pa.string()),
        ("event", pa.string()),
        ("value", pa.float64()),
        ("latency_ms", pa.float64()),
        ("user_agent", pa.string()),
        ("ip_hash", pa.string()),
        ("page", pa.string()),
        ("country", pa.string()),
        ("device", pa.string()),
    ]
)
EXPOSURE_SCHEMA = pa.schema(
    [
        ("unit_id", pa.string()),
        ("experiment", pa.string()),
        ("variant", pa.string()),
        ("ts", pa.timestamp("us")),
    ]
)


def _write(table: pa.Table, path: Path) -> None:
    pq.write_table(table, path, compression="zstd", row_group_size=200_000)


def generate(out: Path, *, users: int = DEFAULT_USERS, days: int = 14, seed: int = 7) -> Path:
    """Write events (hive-partitioned by day), exposures and TRUE_EFFECTS.json into ``out``."""
    if users < 10 or days < 2:
        raise InputDataError("need at least 10 users and 2 experiment days", key="users")
    if out.exists() and any(out.iterdir()) and not (out / "TRUE_EFFECTS.json").exists():
        raise InputDataError("folder exists and is not a sample folder", file=str(out))
    rng = np.random.default_rng(seed)
    log = _Log()
    people = _humans(log, rng, users, days)
    human_events = len(log)
    bots = _bots(log, rng, days, int(human_events * BOT_SHARE_TARGET / (1 - BOT_SHARE_TARGET)))
    events = pa.Table.from_pydict(log.cols, schema=EVENT_SCHEMA).sort_by(
        [("ts", "ascending"), ("cookie_id", "ascending"), ("event", "ascending")]
    )
    if (out / "events").exists():
        shutil.rmtree(out / "events")
    out.mkdir(parents=True, exist_ok=True)
    day_of = pc.floor_temporal(events["ts"], unit="day")
    for day in range(PRE_DAYS + days):
        date = START + dt.timedelta(days=day)
        mask = pc.equal(day_of, pa.scalar(date, pa.timestamp("us")))
        folder = out / "events" / f"date={date:%Y-%m-%d}"
        folder.mkdir(parents=True)
        _write(events.filter(mask), folder / "part-0.parquet")
    exposures = pa.Table.from_pydict(log.exposures, schema=EXPOSURE_SCHEMA).sort_by(
        [("ts", "ascending"), ("unit_id", "ascending"), ("experiment", "ascending")]
    )
    _write(exposures, out / "exposures.parquet")
    total = len(log)
    facts = {
        "scenario": "Quillmoor Supply, an invented online shop; all people and bots are invented",
        "generator": {
            "seed": seed,
            "users": users,
            "days": days,
            "pre_period_days": PRE_DAYS,
            "pre_period_start": START.date().isoformat(),
            "experiments_start": (START + dt.timedelta(days=PRE_DAYS)).date().isoformat(),
        },
        "experiments": TRUE_EFFECTS,
        "people": people,
        "bots": bots,
        "events": {
            "total": total,
            "human": human_events,
            "bot_share": round(bots["bot_events"] / total, 4),
        },
        "unsuccessful_click": "a back within 30 s of a click; about 35% of human clicks",
    }
    text = json.dumps(facts, indent=2, sort_keys=True) + "\n"
    (out / "TRUE_EFFECTS.json").write_text(text, encoding="utf-8")
    return out
