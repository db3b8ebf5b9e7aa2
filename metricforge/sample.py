"""A seeded, invented scenario: the online shop "Quillmoor Supply" and its experiments.

People browse, click, return to the previous page ("back"), buy, get refunds and
unsubscribe from the newsletter; bots crawl, scrape and click in bursts (``sample_bots``).
A 14-day pre-period is followed by the experiment days, on which five experiments run on
all traffic at once, assigned per cookie by a salted hash of the cookie id; one of them,
``product_cards``, is a 2×2 factorial design. The same arguments give byte-identical files.
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
import numpy.typing as npt

from metricforge import sample_bots as sb
from metricforge.errors import InputDataError
from metricforge.sample_bots import Events, FloatArray, IntArray, Sessions

BoolArray = npt.NDArray[np.bool_]

DEFAULT_USERS: Final = 34_000
PRE_DAYS: Final = 14
START: Final = dt.datetime(2026, 9, 1)
BOT_SHARE_TARGET: Final = 0.40
SESSION_EVENT_LIMIT_HINT: Final = 60
EXPERIMENTS: Final = (
    "checkout_layout",
    "homepage_aa",
    "promo_banner",
    "image_autoload",
    "product_cards",
)
CARDS: Final = ("control", "wide_photo", "price_badge", "wide_photo_badge")
ARMS: Final = {
    name: CARDS if name == "product_cards" else ("control", "treatment") for name in EXPERIMENTS
}
VARIANTS: Final = ("control", "treatment", *CARDS[1:])  # the exposure log's variant names
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
# product_cards, a 2×2 design: a wider product photo (factor photo) and a price badge
# (factor badge) on the listing cards. Per CARDS arm, the share of clicks followed by a back
# within 30 s (the rest of BAD_CLICK_SHARE goes back later): the photo shows what the click
# leads to, so fewer clicks end in a quick return; the badge helps less, and it covers part
# of the wide photo, so both together do worse than the wide photo alone.
QUICK_BACK_SHARE: Final = (BAD_CLICK_SHARE, 0.20, 0.27, 0.24)
CARD_FACTORS: Final = {
    "photo": dict(zip(CARDS, ("standard", "wide", "standard", "wide"), strict=True)),
    "badge": dict(zip(CARDS, ("none", "none", "shown", "shown"), strict=True)),
}
DWELL_MS: Final = 30_000  # a back at most this long after a click makes it unsuccessful

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


def _arm_of(experiment: str, unit: str) -> int:
    arms = ARMS[experiment]
    return int(_unit_hash(experiment, unit) * len(arms))  # equal shares of the hash range


def variant_of(experiment: str, unit: str) -> str:
    """The variant a cookie is assigned to: a salted hash, independent across experiments."""
    return ARMS[experiment][_arm_of(experiment, unit)]


def exposure_logged(experiment: str, unit: str) -> bool:
    """False for the promo_banner treatment cookies whose exposures the logging bug drops."""
    if experiment != "promo_banner" or variant_of(experiment, unit) == "control":
        return True
    return _unit_hash("promo_banner/logging-bug", unit) >= PROMO_DROP_SHARE


def _arms(cookies: list[str], experiment: str) -> IntArray:
    """Each cookie's arm: its variant's position in ``ARMS[experiment]``."""
    return np.array([_arm_of(experiment, c) for c in cookies], dtype=np.int64)


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


def _back_kind(u: FloatArray, quick: FloatArray | float) -> IntArray:
    """Per click: 1 a back within 30 s (with probability ``quick``), 2 a later back, 0 none."""
    late = BAD_CLICK_SHARE + LATE_BACK_SHARE
    out: IntArray = np.where(u < quick, 1, np.where(u < late, 2, 0))
    return out


def _gaps(draws: FloatArray, back: IntArray, kind: IntArray, pos: IntArray) -> IntArray:
    """Per event the milliseconds since the previous one; ``back``: the back kind of its block."""
    impression = np.array([2, 3, 3])[pos] + (pos == 2) * back
    gap_class = np.where(kind == _IMP, impression, _BLOCK_GAP[kind])
    return sb.scaled_ints(draws, _GAPS[gap_class, 0], _GAPS[gap_class, 1])


def _successful(session: IntArray, event: IntArray, ts: IntArray, n: int) -> BoolArray:
    """Per session: a click with no back within ``DWELL_MS`` after it (session_success)."""
    clicks, backs = np.flatnonzero(event == sb.CLICK), np.flatnonzero(event == sb.BACK)
    nxt = np.r_[backs, len(event)][np.searchsorted(backs, clicks)]  # next back, or none
    same = np.r_[session, -1][nxt] == session[clicks]
    quick = same & (np.r_[ts, 0][nxt] - ts[clicks] <= DWELL_MS)
    out: BoolArray = np.bincount(session[clicks[~quick]], minlength=n) > 0
    return out


def _humans(
    rng: np.random.Generator, people: Sessions, traits: tuple[IntArray, FloatArray, FloatArray]
) -> tuple[Events, IntArray, list[float]]:
    """The events of every human session, vectorised over sessions; the autoload flags; and
    the session_success of the experiment days under each product_cards arm."""
    (day, click_p, buy_p), cookie = traits, people.cookie
    n = len(day)
    in_exp = day >= PRE_DAYS
    checkout = in_exp & (_arms(people.cookies, "checkout_layout")[cookie] == 1)
    autoload = in_exp & (_arms(people.cookies, "image_autoload")[cookie] == 1)
    cards = np.where(in_exp, _arms(people.cookies, "product_cards")[cookie], 0)
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
    back = clicked * _back_kind(u, np.array(QUICK_BACK_SHARE)[cards[imp_sess]])
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
    order = np.lexsort(blocks[2::-1])
    b_sess, _, b_kind, b_page, b_click, b_back = blocks[:, order]
    size = 1 + b_click + (b_back > 0)
    block = np.repeat(np.arange(len(size)), size)
    pos, kind, session = sb.ranks(size), b_kind[block], b_sess[block]
    imp = kind == _IMP
    event = np.where(imp, np.array([sb.IMPRESSION, sb.CLICK, sb.BACK])[pos], _BLOCK_EVENT[kind])
    draws = rng.random(len(event))
    ts = sb.stamp(session, _gaps(draws, b_back[block], kind, pos), start)
    # every experiment-day session under each product_cards arm: the same draws, only the
    # share of quick backs switched; a session of the arm it was assigned gives what it gave
    where_imp = np.argsort(order)[len(pl_sess) + len(auto_sess) + np.arange(len(imp_sess))]
    success = []
    actual = _successful(session, event, ts, n)
    for arm, quick in enumerate(QUICK_BACK_SHARE):
        backs = np.zeros(len(order), dtype=np.int64)
        backs[where_imp] = clicked * _back_kind(u, quick)
        good = _successful(
            session, event, sb.stamp(session, _gaps(draws, backs[block], kind, pos), start), n
        )
        if not np.array_equal(good[cards == arm], actual[cards == arm]):
            raise AssertionError("counterfactual sessions disagree")  # pragma: no cover
        success.append(float(good[in_exp].mean()))
    value = np.select(
        [kind == _BUY, kind == _REFUND, kind == _CARRIED],
        [revenue[session], refunded[session], refunded[np.maximum(session - 1, 0)]],
        np.nan,
    )
    median = np.array(LATENCY_MEDIAN_MS)[people.device[session]]
    latency = np.where(event == sb.PAGE_LOAD, sb.lognormal_ms(rng, median, 0.45), np.nan)
    events = Events(session, ts, event, b_page[block], value, latency)
    return events, autoload.astype(np.int64), success


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
    human_events, autoload, success = _humans(rng, people, traits)
    bot_target = round(len(human_events.event) * BOT_SHARE_TARGET / (1 - BOT_SHARE_TARGET))
    bot_sessions, bot_events, bot_facts = sb.bots(rng, PRE_DAYS + days, bot_target)
    s, e = sb.merge((people, human_events), (bot_sessions, bot_events))
    if len(set(s.cookies)) != len(s.cookies):
        raise InputDataError(f"seed {seed} drew one cookie id twice; use another seed", key="seed")
    session_ids = sb.hex_ids(rng, len(s.cookie))
    first_ts = e.ts_ms[np.flatnonzero(np.r_[True, e.session[1:] != e.session[:-1]])]
    sb.write_events(out / "events", s, e, session_ids, START, PRE_DAYS + days)
    exposed = np.flatnonzero(first_ts >= PRE_DAYS * sb.DAY_MS)
    arms = {name: _arms(s.cookies, name) for name in EXPERIMENTS}
    parts: list[IntArray] = []
    for k, name in enumerate(EXPERIMENTS):
        logged = np.array([exposure_logged(name, c) for c in s.cookies])[s.cookie[exposed]]
        sess = exposed[logged]
        label = np.array([VARIANTS.index(v) for v in ARMS[name]])
        parts.append(np.stack([sess, label[arms[name][s.cookie[sess]]], np.full(len(sess), k)]))
    sess, arm, experiment = np.concatenate(parts, axis=1)
    rows = np.stack([s.cookie[sess], experiment, arm, first_ts[sess]])
    labels = (EXPERIMENTS, VARIANTS)
    sb.write_exposures(out / "exposures.parquet", rows, s.cookies, labels, START)
    facts = _facts(s, e, arms, first_ts, autoload, success)
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


def _split(cookies: IntArray, arm: IntArray, names: tuple[str, ...]) -> dict[str, int]:
    unique = np.unique(cookies)
    return {name: int((arm[unique] == k).sum()) for k, name in enumerate(names)}


def _contrasts(by_arm: list[float]) -> dict[str, float]:
    """product_cards' main effects and interaction of per-arm values, as the scorecard names
    them: a main effect is the mean at the factor's second level minus the mean at its first,
    the interaction (both − badge only) − (photo only − control)."""
    control, photo, badge, both = by_arm
    return {
        "main:photo": round((photo + both) / 2 - (control + badge) / 2, 10),
        "main:badge": round((badge + both) / 2 - (control + photo) / 2, 10),
        "interaction:photo*badge": round((both - badge) - (photo - control), 10),
    }


def _cards_truth(success: list[float]) -> dict[str, object]:
    quick, good = list(QUICK_BACK_SHARE), [round(x, 10) for x in success]
    return {
        "factors": CARD_FACTORS,
        "quick_back_share_of_clicks": dict(zip(CARDS, quick, strict=True)),
        "session_success": dict(zip(CARDS, good, strict=True)),
        "contrasts": {
            "quick_back_share_of_clicks": _contrasts(quick),
            "session_success": _contrasts(good),
        },
        "session_success_definition": "share of all human sessions of the experiment days"
        " that have a click with no back within 30 s after it, each session computed under"
        " every variant from the same random draws (only the share of quick backs switched;"
        " in the variant a session was assigned, exactly what the data shows): the values and"
        " contrasts of the metric session_success for these people, bots left out",
    }


_NOTES: Final = {
    "checkout_layout": "treatment multiplies the per-session purchase probability by 1.10 and"
    " the per-session unsubscribe probability by 1.50; revenue per purchase, refunds per"
    " purchase, visiting, clicks and latency are unchanged: every other effect is 0",
    "homepage_aa": "A/A: both variants are identical; every true effect is 0",
    "promo_banner": "no behavioural effect (every true effect is 0), but a logging bug drops"
    " every exposure row of about 10% of treatment cookies: a sample-ratio mismatch",
    "product_cards": "a 2x2 design on the listing cards: factor photo (standard, wide) and"
    " factor badge (none, a price badge shown), one variant per combination, 25% each. It"
    " changes only what follows a click: the share of clicks followed by a back within 30 s"
    f" is {QUICK_BACK_SHARE[0]:.0%} (control), {QUICK_BACK_SHARE[1]:.0%} (wide_photo),"
    f" {QUICK_BACK_SHARE[2]:.0%} (price_badge) and {QUICK_BACK_SHARE[3]:.0%}"
    " (wide_photo_badge, not the sum of both: the badge covers part of the photo); those"
    " clicks go back later instead. Clicks, visiting, purchases, revenue, refunds,"
    " unsubscribes and latency are unchanged: every other effect is 0",
    "image_autoload": f"treatment autoloads images: {AUTOLOAD_SHARE:.0%} of treatment human"
    f" sessions get {AUTOLOAD_EXTRA[0]}-{AUTOLOAD_EXTRA[1]} extra page_load events, which puts"
    f" them over a per-session limit of {SESSION_EVENT_LIMIT_HINT} events: a treatment that"
    " changes bot classification under a rate rule. No effect on purchases, revenue, refunds"
    " or unsubscribes; the latency distribution per page load is unchanged",
}


def _facts(
    s: Sessions,
    e: Events,
    arms: dict[str, IntArray],
    first_ts: IntArray,
    autoload: IntArray,
    success: list[float],
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
        names = ARMS[name]
        experiments[name] = {
            "variants": list(names),
            "planned_split": dict.fromkeys(names, 100 // len(names)),
            "relative_effects": {**zero, **(lift if name == "checkout_layout" else {})},
            "note": _NOTES[name],
            "assigned_cookies": {k: _split(s.cookie[v], arms[name], names) for k, v in exp.items()},
        }
    experiments["product_cards"].update(_cards_truth(success))
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
        " and unsubscribe from the newsletter; bots crawl, scrape and click in bursts. Five"
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
