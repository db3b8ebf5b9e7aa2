"""A seeded, invented scenario: the online shop "Quillmoor Supply" and its experiments.

People browse, click, return to the previous page ("back"), buy, get refunds and
unsubscribe from the newsletter; bots crawl, scrape and click in bursts (``sample_bots``).
A 14-day pre-period is followed by the experiment days, on which four experiments run on
all traffic at once, assigned per cookie by a salted hash of the cookie id. The same
arguments give byte-identical files.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
import re
import shutil
from pathlib import Path
from typing import Final

import numpy as np

from metricforge import sample_bots as sb
from metricforge.errors import InputDataError
from metricforge.sample_bots import Events, FloatArray, IntArray, Sessions

DEFAULT_USERS: Final = 34_000
PRE_DAYS: Final = 14
START: Final = dt.datetime(2026, 9, 1)
BOT_SHARE_TARGET: Final = 0.40
SESSION_EVENT_LIMIT_HINT: Final = 60
EXPERIMENTS: Final = ("checkout_layout", "homepage_aa", "promo_banner", "image_autoload")
VARIANTS: Final = ("control", "treatment")
OWNED: Final = frozenset({"events", "exposures.parquet", "TRUE_EFFECTS.json"})
_DATE_DIR: Final = r"date=\d{4}-\d{2}-\d{2}"
EVENT_SCHEMA: Final = sb.EVENT_SCHEMA
EXPOSURE_SCHEMA: Final = sb.EXPOSURE_SCHEMA

# people
ACCOUNT_SHARE: Final = 0.40
COOKIE_CHANGE_SHARE: Final = 0.05
VISIT_BETA: Final = (0.5, 9.0)  # daily visit probability, per person
CLICK_BETA: Final = (2.0, 5.0)  # click probability per impression, per person
BUY_BETA: Final = (1.2, 8.0)  # purchase probability per session, per person
UNSUBSCRIBE_P: Final = 0.01  # per session
REFUND_P: Final = 0.08  # per purchase; half of them in a later session of the same cookie
REVENUE_LOGNORMAL: Final = (3.51, 0.6)  # mean about 40
LATENCY_MEDIAN_MS: Final = (250.0, 380.0, 320.0)  # per device
PAGE_LOADS_POISSON, PAGE_LOADS_MAX = 0.9, 6  # 1 + Poisson, capped
IMPRESSIONS_POISSON, IMPRESSIONS_MAX = 3.0, 10
BAD_CLICK_SHARE, LATE_BACK_SHARE = 0.35, 0.30  # of clicks; the rest never go back
HOURS: Final = (1, 1, 1, 1, 1, 2, 3, 4, 5, 6, 6, 6, 6, 6, 6, 6, 7, 8, 9, 9, 8, 6)  # 00-22 h
# treatments
CHECKOUT_PURCHASE_LIFT, CHECKOUT_UNSUBSCRIBE_LIFT = 1.10, 1.50
AUTOLOAD_SHARE: Final = 0.15  # of treatment sessions
AUTOLOAD_EXTRA: Final = (60, 80)  # extra page_loads in such a session
PROMO_DROP_SHARE: Final = 0.10  # of promo_banner treatment cookies: exposures never logged

# blocks of a human session, in time order within a page slot: a page load, the autoloaded
# page loads, impressions (each with its click and back); then the end of the session
_PL, _AUTO, _IMP, _CARRIED, _BUY, _REFUND, _UNSUB = range(7)
_END_SLOT: Final = 99
_BLOCK_EVENT: Final = np.array(
    [sb.PAGE_LOAD, sb.PAGE_LOAD, sb.IMPRESSION, sb.REFUND, sb.PURCHASE, sb.REFUND, sb.UNSUBSCRIBE]
)
_BLOCK_GAP: Final = np.array([0, 1, 2, 6, 7, 8, 9])
_GAPS: Final = np.array(
    [
        (300, 4_000),  # 0 page_load
        (20, 400),  # 1 autoloaded page_load
        (400, 8_000),  # 2 impression
        (500, 6_000),  # 3 click
        (1_000, 29_000),  # 4 back after an unsuccessful click
        (31_000, 300_000),  # 5 back after a successful click
        (2_000, 60_000),  # 6 refund of a purchase made in an earlier session
        (5_000, 90_000),  # 7 purchase
        (60_000, 900_000),  # 8 refund in the purchase's session
        (1_000, 20_000),  # 9 unsubscribe
    ],
    dtype=np.int64,
)


def _unit_hash(salt: str, unit: str) -> float:
    digest = hashlib.sha256(f"quillmoor|{salt}|{unit}".encode()).digest()
    return int.from_bytes(digest[:8], "big") / 2.0**64


def variant_of(experiment: str, unit: str) -> str:
    """The variant a cookie is assigned to: a salted hash, independent across experiments."""
    return VARIANTS[_unit_hash(experiment, unit) >= 0.5]


def exposure_logged(experiment: str, unit: str) -> bool:
    """False for the promo_banner treatment cookies whose exposures the logging bug drops."""
    if experiment != "promo_banner" or variant_of(experiment, unit) == "control":
        return True
    return _unit_hash("promo_banner/logging-bug", unit) >= PROMO_DROP_SHARE


def _treated(cookies: list[str], experiment: str) -> IntArray:
    return np.array([variant_of(experiment, c) == "treatment" for c in cookies], dtype=np.int64)


def _people(
    rng: np.random.Generator, users: int, days: int
) -> tuple[Sessions, tuple[IntArray, FloatArray, FloatArray], dict[str, int]]:
    """Who visits on which day with which cookie, and the person's click and buy propensities."""
    total = PRE_DAYS + days
    cookies, accounts, ips = sb.hex_ids(rng, users), sb.hex_ids(rng, users), sb.hex_ids(rng, users)
    account = np.where(rng.random(users) < ACCOUNT_SHARE, np.arange(users), -1)
    device = rng.choice(3, users, p=[0.5, 0.4, 0.1])
    pick = rng.integers(0, 6, users)  # 6 is a multiple of every device's agent count
    agents = [sb.AGENTS_OF_DEVICE[d] for d in device]
    ua = np.array([a[k % len(a)] for a, k in zip(agents, pick, strict=True)])
    country = rng.choice(len(sb.COUNTRIES), users, p=[0.3, 0.2, 0.15, 0.12, 0.1, 0.08, 0.05])
    visit_p = rng.beta(*VISIT_BETA, users)
    click_p = rng.beta(*CLICK_BETA, users)
    buy_p = np.minimum(rng.beta(*BUY_BETA, users), 0.6)
    changer = np.flatnonzero(rng.random(users) < COOKIE_CHANGE_SHARE)
    switch_day = np.full(users, total + 1)
    switch_day[changer] = rng.integers(PRE_DAYS + 1, total, len(changer))  # mid-experiment
    second = np.full(users, -1)
    second[changer] = users + np.arange(len(changer))
    cookies += sb.hex_ids(rng, len(changer))
    person, day = (
        a.astype(np.int64) for a in np.nonzero(rng.random((users, total)) < visit_p[:, None])
    )
    cookie = np.where(day >= switch_day[person], second[person], person)
    kind = np.zeros(len(person), dtype=np.int64)
    logged_in = int((account >= 0).sum())
    facts = {"people": users, "logged_in": logged_in, "cookie_changes": len(changer)}
    account, ua, country, device = (a[person] for a in (account, ua, country, device))
    sessions = Sessions(cookie, account, person, ua, country, device, kind, cookies, accounts, ips)
    return sessions, (day, click_p[person], buy_p[person]), facts


def _blocks(
    session: IntArray, kind: int, slot: IntArray | int, page: IntArray | int, *flags: IntArray
) -> IntArray:
    """Rows session, slot, kind, page, clicked, back kind (0 none, 1 within 30 s, 2 later)."""
    click, back = flags if flags else (0, 0)
    out: IntArray = np.stack(np.broadcast_arrays(session, slot, kind, page, click, back))
    return out.astype(np.int64)


def _humans(
    rng: np.random.Generator, people: Sessions, traits: tuple[IntArray, FloatArray, FloatArray]
) -> tuple[Events, IntArray]:
    """The events of every human session, vectorised over sessions; and the autoload flags."""
    (day, click_p, buy_p), cookie = traits, people.cookie
    n = len(day)
    in_exp = day >= PRE_DAYS
    checkout = in_exp & (_treated(people.cookies, "checkout_layout")[cookie] == 1)
    autoload = in_exp & (_treated(people.cookies, "image_autoload")[cookie] == 1)
    autoload &= rng.random(n) < AUTOLOAD_SHARE
    hour = rng.choice(len(HOURS), n, p=np.array(HOURS) / sum(HOURS))
    start = day * sb.DAY_MS + hour * sb.HOUR_MS + rng.integers(0, sb.HOUR_MS, n)
    loads = 1 + np.minimum(rng.poisson(PAGE_LOADS_POISSON, n), PAGE_LOADS_MAX - 1)
    imps = 1 + np.minimum(rng.poisson(IMPRESSIONS_POISSON, n), IMPRESSIONS_MAX - 1)
    extra = np.where(autoload, rng.integers(AUTOLOAD_EXTRA[0], AUTOLOAD_EXTRA[1] + 1, n), 0)
    buy = rng.random(n) < buy_p * np.where(checkout, CHECKOUT_PURCHASE_LIFT, 1.0)
    unsub = rng.random(n) < UNSUBSCRIBE_P * np.where(checkout, CHECKOUT_UNSUBSCRIBE_LIFT, 1.0)
    refund = buy & (rng.random(n) < REFUND_P)
    # a later refund lands in the cookie's next session of the same period, if there is one
    nxt = np.minimum(np.arange(n) + 1, n - 1)
    has_next = (np.arange(n) + 1 < n) & (cookie[nxt] == cookie) & (in_exp[nxt] == in_exp)
    later = refund & has_next & (rng.random(n) < 0.5)
    carried = np.r_[False, later[:-1]]
    revenue = np.maximum(np.round(np.exp(rng.normal(*REVENUE_LOGNORMAL, n)), 2), 1.0)
    share = np.where(rng.random(n) < 0.75, 1.0, rng.uniform(0.2, 0.9, n))
    refunded = np.maximum(np.round(revenue * share, 2), 0.01)

    first_load = np.cumsum(loads) - loads
    pl_sess = np.repeat(np.arange(n), loads)
    pl_slot = sb.ranks(loads)
    landing = rng.choice(3, len(pl_sess), p=[0.55, 0.30, 0.15])
    pl_page = np.where(
        pl_slot == 0, landing, rng.choice(4, len(pl_sess), p=[0.08, 0.32, 0.55, 0.05])
    )
    auto_sess = np.repeat(np.arange(n), extra)
    imp_sess = np.repeat(np.arange(n), imps)
    imp_slot = np.floor(rng.random(len(imp_sess)) * loads[imp_sess]).astype(np.int64)
    clicked = (rng.random(len(imp_sess)) < click_p[imp_sess]).astype(np.int64)
    u = rng.random(len(imp_sess))
    back = clicked * np.where(
        u < BAD_CLICK_SHARE, 1, np.where(u < BAD_CLICK_SHARE + LATE_BACK_SHARE, 2, 0)
    )
    account_page, checkout_page = sb.PAGES.index("account"), sb.PAGES.index("checkout")
    blocks = np.concatenate(
        [
            _blocks(pl_sess, _PL, pl_slot, pl_page),
            _blocks(auto_sess, _AUTO, 0, pl_page[first_load[auto_sess]]),
            _blocks(
                imp_sess, _IMP, imp_slot, pl_page[first_load[imp_sess] + imp_slot], clicked, back
            ),
            _blocks(np.flatnonzero(carried), _CARRIED, _END_SLOT, account_page),
            _blocks(np.flatnonzero(buy), _BUY, _END_SLOT, checkout_page),
            _blocks(np.flatnonzero(refund & ~later), _REFUND, _END_SLOT, account_page),
            _blocks(np.flatnonzero(unsub), _UNSUB, _END_SLOT, account_page),
        ],
        axis=1,
    )
    b_sess, _, b_kind, b_page, b_click, b_back = blocks[:, np.lexsort(blocks[2::-1])]
    size = 1 + b_click + (b_back > 0)
    block = np.repeat(np.arange(len(size)), size)
    pos, kind, session = sb.ranks(size), b_kind[block], b_sess[block]
    imp = kind == _IMP
    event = np.where(imp, np.array([sb.IMPRESSION, sb.CLICK, sb.BACK])[pos], _BLOCK_EVENT[kind])
    gap_class = np.where(
        imp, np.array([2, 3, 3])[pos] + (pos == 2) * b_back[block], _BLOCK_GAP[kind]
    )
    gaps = sb.uniform_ints(rng, _GAPS[gap_class, 0], _GAPS[gap_class, 1])
    value = np.select(
        [kind == _BUY, kind == _REFUND, kind == _CARRIED],
        [revenue[session], refunded[session], refunded[np.maximum(session - 1, 0)]],
        np.nan,
    )
    median = np.array(LATENCY_MEDIAN_MS)[people.device[session]]
    latency = np.where(event == sb.PAGE_LOAD, sb.lognormal_ms(rng, median, 0.45), np.nan)
    ts = sb.stamp(session, gaps, start)
    return Events(session, ts, event, b_page[block], value, latency), autoload.astype(np.int64)


def _prepare(out: Path) -> None:
    """Create ``out``, or clear a previous sample there; refuse a folder holding anything else."""
    if out.is_dir():
        events = out / "events"
        days = list(events.iterdir()) if events.is_dir() else []
        bad = [p for p in out.iterdir() if p.name not in OWNED or p.is_dir() != (p == events)]
        bad += [p for p in days if not p.is_dir() or not re.fullmatch(_DATE_DIR, p.name)]
        bad += [f for p in days if p.is_dir() for f in p.iterdir() if f.name != "part-0.parquet"]
        if bad:
            raise InputDataError(
                f"'{bad[0].name}' is not a file of a generated sample; choose an empty or new"
                " folder",
                file=str(out),
            )
        if events.is_dir():
            shutil.rmtree(events)
    elif out.exists():
        raise InputDataError("not a folder", file=str(out))
    out.mkdir(parents=True, exist_ok=True)


def generate(out: Path, *, users: int = DEFAULT_USERS, days: int = 14, seed: int = 7) -> Path:
    """Write events (hive-partitioned by day), exposures and TRUE_EFFECTS.json into ``out``."""
    if users < 10 or days < 2:
        raise InputDataError("need at least 10 users and 2 experiment days", key="users")
    _prepare(out)
    rng = np.random.default_rng(seed)
    people, traits, people_facts = _people(rng, users, days)
    human_events, autoload = _humans(rng, people, traits)
    bot_target = round(len(human_events.event) * BOT_SHARE_TARGET / (1 - BOT_SHARE_TARGET))
    bot_sessions, bot_events, bot_facts = sb.bots(rng, PRE_DAYS + days, bot_target)
    s, e = sb.merge((people, human_events), (bot_sessions, bot_events))
    if len(set(s.cookies)) != len(s.cookies):
        raise InputDataError(f"seed {seed} drew one cookie id twice; use another seed", key="seed")
    session_ids = sb.hex_ids(rng, len(s.cookie))
    first_ts = e.ts_ms[np.flatnonzero(np.r_[True, e.session[1:] != e.session[:-1]])]
    sb.write_events(out / "events", s, e, session_ids, START, PRE_DAYS + days)
    exposed = np.flatnonzero(first_ts >= PRE_DAYS * sb.DAY_MS)
    arms = {name: _treated(s.cookies, name) for name in EXPERIMENTS}
    parts: list[IntArray] = []
    for k, name in enumerate(EXPERIMENTS):
        logged = np.array([exposure_logged(name, c) for c in s.cookies])[s.cookie[exposed]]
        sess = exposed[logged]
        parts.append(np.stack([sess, arms[name][s.cookie[sess]], np.full(len(sess), k)]))
    sess, arm, experiment = np.concatenate(parts, axis=1)
    rows = np.stack([s.cookie[sess], experiment, arm, first_ts[sess]])
    labels = (EXPERIMENTS, VARIANTS)
    sb.write_exposures(out / "exposures.parquet", rows, s.cookies, labels, START)
    facts = _facts(s, e, arms, first_ts, autoload)
    facts["generator"] = {"seed": seed, "users": users, "days": days, **_timeline(days)}
    facts["people"] = people_facts
    facts["bots"] = bot_facts
    text = json.dumps(facts, indent=2, sort_keys=True) + "\n"
    (out / "TRUE_EFFECTS.json").write_text(text, encoding="utf-8")
    return out


def _timeline(days: int) -> dict[str, object]:
    start = START + dt.timedelta(days=PRE_DAYS)
    return {
        "pre_period_days": PRE_DAYS,
        "pre_period": [f"{START:%Y-%m-%d}", f"{start - dt.timedelta(days=1):%Y-%m-%d}"],
        "experiment_period": [
            f"{start:%Y-%m-%d}",
            f"{start + dt.timedelta(days=days - 1):%Y-%m-%d}",
        ],
        "timestamps": "naive timestamp[us] meaning UTC, whole milliseconds",
        "bot_share_target": BOT_SHARE_TARGET,
        "session_event_limit_hint": SESSION_EVENT_LIMIT_HINT,
    }


def _split(cookies: IntArray, arm: IntArray) -> dict[str, int]:
    unique = np.unique(cookies)
    return {"control": int((arm[unique] == 0).sum()), "treatment": int((arm[unique] == 1).sum())}


_NOTES: Final = {
    "checkout_layout": "treatment multiplies the per-session purchase probability by 1.10 and"
    " the per-session unsubscribe probability by 1.50; revenue per purchase, refunds per"
    " purchase, visiting, clicks and latency are unchanged: every other effect is 0",
    "homepage_aa": "A/A: both variants are identical; every true effect is 0",
    "promo_banner": "no behavioural effect (every true effect is 0), but a logging bug drops"
    " every exposure row of about 10% of treatment cookies: a sample-ratio mismatch",
    "image_autoload": f"treatment autoloads images: {AUTOLOAD_SHARE:.0%} of treatment human"
    f" sessions get {AUTOLOAD_EXTRA[0]}-{AUTOLOAD_EXTRA[1]} extra page_load events, which puts"
    f" them over a per-session limit of {SESSION_EVENT_LIMIT_HINT} events: a treatment that"
    " changes bot classification under a rate rule. No effect on purchases, revenue, refunds"
    " or unsubscribes; the latency distribution per page load is unchanged",
}


def _facts(
    s: Sessions, e: Events, arms: dict[str, IntArray], first_ts: IntArray, autoload: IntArray
) -> dict[str, object]:
    """What was built in, and what came out, for TRUE_EFFECTS.json."""
    n_human = len(autoload)
    size = np.bincount(e.session, minlength=len(s.cookie))
    human = s.kind[e.session] == 0
    exp = {"human": np.flatnonzero(first_ts[:n_human] >= PRE_DAYS * sb.DAY_MS)}
    exp["bot"] = n_human + np.flatnonzero(first_ts[n_human:] >= PRE_DAYS * sb.DAY_MS)
    ordinary, inflated = size[:n_human][autoload == 0], size[:n_human][autoload == 1]
    nxt = np.minimum(np.arange(len(e.event)) + 1, len(e.event) - 1)
    clicks = human & (e.event == sb.CLICK)
    backed = clicks & (e.event[nxt] == sb.BACK) & (e.session[nxt] == e.session)
    dwell = e.ts_ms[nxt] - e.ts_ms
    over = size[exp["human"]] > SESSION_EVENT_LIMIT_HINT
    auto_arm = arms["image_autoload"][s.cookie[exp["human"]]]
    lam, cap = PAGE_LOADS_POISSON, PAGE_LOADS_MAX - 1
    mean_loads = 1 + sum(
        min(k, cap) * lam**k * math.exp(-lam) / math.factorial(k) for k in range(60)
    )
    zero = dict.fromkeys(("purchases", "revenue", "refunds", "unsubscribes"), 0.0)
    lift = {"purchases": 0.10, "revenue": 0.10, "refunds": 0.10, "unsubscribes": 0.50}
    dropped = np.flatnonzero([not exposure_logged("promo_banner", c) for c in s.cookies])
    exposed = np.unique(s.cookie[np.r_[exp["human"], exp["bot"]]])
    experiments: dict[str, dict[str, object]] = {}
    for name in EXPERIMENTS:
        experiments[name] = {
            "variants": list(VARIANTS),
            "planned_split": {"control": 50, "treatment": 50},
            "relative_effects": {**zero, **(lift if name == "checkout_layout" else {})},
            "note": _NOTES[name],
            "assigned_cookies": {k: _split(s.cookie[v], arms[name]) for k, v in exp.items()},
        }
    experiments["promo_banner"]["logging_bug"] = {
        "dropped_share_of_treatment_cookies": PROMO_DROP_SHARE,
        "expected_observed_treatment_share": round(0.45 / 0.95, 4),
        "cookies_never_logged": int(np.isin(exposed, dropped).sum()),
    }
    experiments["image_autoload"]["other_effects"] = {
        "page_loads_relative_per_human_unit": round(
            AUTOLOAD_SHARE * sum(AUTOLOAD_EXTRA) / 2 / mean_loads, 4
        ),
        "share_of_human_sessions_over_limit": {"control": 0.0, "treatment": AUTOLOAD_SHARE},
        "human_sessions_over_limit": {
            "control": int(over[auto_arm == 0].sum()),
            "treatment": int(over[auto_arm == 1].sum()),
        },
    }
    total, bot_events = len(e.event), int((~human).sum())
    return {
        "scenario": "Quillmoor Supply, an invented online shop (no real company, person or"
        " data set). People browse pages, see impressions, click, go back, buy, get refunds"
        " and unsubscribe from the newsletter; bots crawl, scrape and click in bursts. Four"
        " experiments run at once on all traffic from the first experiment day, assigned per"
        " cookie by a salted hash of the cookie id; every session in the experiment period"
        " writes one exposure row per experiment at its first event",
        "effect_definition": "relative effect = E[metric per unit | treatment] /"
        " E[metric per unit | control] - 1 over the experiment period: a ratio of per-unit"
        " expectations. It holds for any distribution of sessions per unit and any share of"
        " (never buying) bots among the units, since no treatment changes visiting, as long"
        " as units are not selected by something a treatment changes (see image_autoload)",
        "experiments": experiments,
        "events": {
            "total": total,
            "human": total - bot_events,
            "bot": bot_events,
            "bot_share": round(bot_events / total, 4),
        },
        "humans": {
            "sessions": n_human,
            "cookies": len(np.unique(s.cookie[:n_human])),
            "median_session_events": float(np.median(ordinary)),
            "max_ordinary_session_events": int(ordinary.max()),
            "min_autoloaded_session_events": int(inflated.min()) if len(inflated) else None,
            "max_autoloaded_session_events": int(inflated.max()) if len(inflated) else None,
            "unsuccessful_click": "a back within 30 s of the click (dwell 1-29 s)",
            "unsuccessful_click_share": round(
                float((backed & (dwell < 30_000)).sum() / clicks.sum()), 4
            ),
            "min_click_to_back_ms": int(dwell[backed].min()),
        },
    }
