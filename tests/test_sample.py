"""The seeded sample generator and the committed demo set.

Facts about the committed set are checked from the files themselves (user-agent tokens,
session sizes, click-to-back gaps), not from the generator's own labels.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from pathlib import Path
from typing import Any

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from metricforge.errors import InputDataError
from metricforge.sample import SESSION_EVENT_LIMIT_HINT, generate
from metricforge.schema import EVENT_COLUMNS, EXPOSURE_COLUMNS
from tests.conftest import SAMPLE

SMALL: dict[str, Any] = {"users": 300, "days": 3}
PRE_START, EXP_START = dt.datetime(2026, 9, 1), dt.datetime(2026, 9, 15)
TOKENS = ("bot", "crawler", "spider", "headless")
ARROW = {"timestamp": pa.timestamp("us"), "string": pa.string(), "double": pa.float64()}

# cookies that look like bots from the data alone: a bot token in the user agent, a session of
# more than 200 events, or a back less than a second after a click
BOT_COOKIES = f"""
with ordered as (
    select cookie_id, session_id, event, ts,
           lead(event) over w as next_event, lead(ts) over w as next_ts
    from e window w as (partition by session_id order by ts)
),
sizes as (select cookie_id, session_id, count(*) as n from e group by all)
select cookie_id from e
where {" or ".join(f"contains(lower(user_agent), '{t}')" for t in TOKENS)}
union select cookie_id from sizes where n > 200
union select cookie_id from ordered
where event = 'click' and next_event = 'back' and next_ts - ts < interval 1 second
"""


def _digests(root: Path) -> dict[str, str]:
    return {
        p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(root.rglob("*"))
        if p.is_file()
    }


def _connect(root: Path) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    con.execute(
        f"create view e as select * from read_parquet('{root.as_posix()}/events/*/*.parquet',"
        " hive_partitioning = false)"
    )
    con.execute(
        f"create view x as select * from read_parquet('{root.as_posix()}/exposures.parquet')"
    )
    con.execute(f"create table bots as {BOT_COOKIES}")
    return con


def _one(con: duckdb.DuckDBPyConnection, sql: str) -> Any:
    return con.execute(sql).fetchall()[0][0]


@pytest.fixture(scope="module")
def small(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return generate(tmp_path_factory.mktemp("small") / "out", **SMALL)


@pytest.fixture(scope="module")
def committed() -> duckdb.DuckDBPyConnection:
    assert (SAMPLE / "TRUE_EFFECTS.json").is_file(), "the committed sample_data is missing"
    return _connect(SAMPLE)


@pytest.fixture(scope="module")
def truth() -> dict[str, Any]:
    result: dict[str, Any] = json.loads((SAMPLE / "TRUE_EFFECTS.json").read_text())
    return result


@pytest.mark.parametrize("seed", [7, 123])
def test_same_arguments_give_the_same_bytes(tmp_path: Path, seed: int) -> None:
    first = _digests(generate(tmp_path / "a", seed=seed, **SMALL))
    second = _digests(generate(tmp_path / "b", seed=seed, **SMALL))
    assert len(first) == 2 + 14 + SMALL["days"]
    assert first == second


def test_regenerating_into_a_previous_sample_replaces_it(tmp_path: Path, small: Path) -> None:
    target = generate(tmp_path / "out", **{**SMALL, "days": 5, "seed": 99})
    assert len(list((target / "events").iterdir())) == 19
    generate(target, **SMALL)
    assert _digests(target) == _digests(small)


@pytest.mark.parametrize(
    "name", ["TRUE_EFFECTS.json", "exposures.parquet", "events/date=2026-09-02/part-0.parquet"]
)
def test_another_seed_gives_other_data(tmp_path: Path, small: Path, name: str) -> None:
    other = generate(tmp_path / "other", seed=8, **SMALL)
    assert (other / name).read_bytes() != (small / name).read_bytes()


@pytest.mark.parametrize(
    "foreign", ["notes.txt", "events/readme.md", "events/date=2026-09-01/part-1.parquet", "x/y"]
)
def test_refuses_a_folder_with_files_it_does_not_own(tmp_path: Path, foreign: str) -> None:
    target = generate(tmp_path / "out", **SMALL) if foreign.startswith("events") else tmp_path
    (target / foreign).parent.mkdir(parents=True, exist_ok=True)
    (target / foreign).write_text("keep me")
    with pytest.raises(InputDataError, match="not a file of a generated sample"):
        generate(target, **SMALL)
    assert (target / foreign).read_text() == "keep me"


def test_files_follow_the_input_contract(small: Path) -> None:
    expected = pa.schema([(k, ARROW[t]) for k, t in EVENT_COLUMNS.items()])
    parts = sorted((small / "events").iterdir())
    for part in parts:
        assert [p.name for p in part.iterdir()] == ["part-0.parquet"]
        table = pq.read_table(part / "part-0.parquet")
        assert table.schema.remove_metadata() == expected
        rows = table.select(["ts", "cookie_id", "event"]).to_pylist()
        keys = [(r["ts"], r["cookie_id"], r["event"]) for r in rows]
        assert keys == sorted(keys), part.name
        assert {r["ts"].date().isoformat() for r in rows} == {part.name.removeprefix("date=")}
        assert (
            pq.ParquetFile(part / "part-0.parquet").metadata.row_group(0).column(0).compression
            == "ZSTD"
        )
    exposures = pq.read_table(small / "exposures.parquet")
    assert exposures.schema.remove_metadata() == pa.schema(
        [(k, ARROW[t]) for k, t in EXPOSURE_COLUMNS.items()]
    )


def test_timestamps_strictly_increase_within_a_session(small: Path) -> None:
    con = _connect(small)
    gaps = con.execute(
        "select min(d), count(*) filter (where epoch_us(d) % 1000 <> 0) from"
        " (select ts - lag(ts) over (partition by session_id order by ts) as d from e)"
        " where d is not null"
    ).fetchall()[0]
    assert gaps[0] >= dt.timedelta(milliseconds=1)
    assert gaps[1] == 0


def test_bot_share_is_reported_and_matches_an_independent_count(
    committed: duckdb.DuckDBPyConnection, truth: dict[str, Any]
) -> None:
    reported = truth["events"]["bot_share"]
    assert 0.30 <= reported <= 0.50
    share = _one(
        committed,
        "select avg(case when cookie_id in (select cookie_id from bots) then 1.0 else 0 end)"
        " from e",
    )
    assert 0.30 <= share <= 0.50
    assert share == pytest.approx(reported, abs=0.01)


@pytest.mark.parametrize("which", ["small", "committed"])
def test_a_14_day_pre_period_precedes_every_exposure(
    which: str, small: Path, committed: duckdb.DuckDBPyConnection
) -> None:
    root = small if which == "small" else SAMPLE
    con = committed if which == "committed" else _connect(small)
    days = json.loads((root / "TRUE_EFFECTS.json").read_text())["generator"]["days"]
    dates = [p.name.removeprefix("date=") for p in sorted((root / "events").iterdir())]
    expected = [(PRE_START + dt.timedelta(days=d)).date().isoformat() for d in range(14 + days)]
    assert dates == expected
    first_exposure = _one(con, "select min(ts) from x")
    assert first_exposure >= EXP_START
    assert _one(con, "select max(ts) from e where ts < timestamp '2026-09-15'") < first_exposure
    assert _one(con, "select count(*) from e where ts < timestamp '2026-09-15'") > 0


def test_cookie_changes_and_repeated_exposures_exist(
    committed: duckdb.DuckDBPyConnection, truth: dict[str, Any]
) -> None:
    people = truth["people"]
    assert 0.03 <= people["cookie_changes"] / people["people"] <= 0.07
    # logged-in people seen with two cookies, the second one only after the first one
    changed = committed.execute(
        "select account_id, cookie_id, min(ts) as first, max(ts) as last from e"
        " where account_id is not null group by account_id, cookie_id"
        " qualify count(*) over (partition by account_id) > 1"
        " order by account_id, first"
    ).fetchall()
    assert len(changed) >= 40
    pairs = [changed[i : i + 2] for i in range(0, len(changed), 2)]
    assert all(a[0] == b[0] and a[3] < b[2] >= EXP_START for a, b in pairs)
    new_cookies = [b[1] for _, b in pairs]
    exposed_new = _one(
        committed,
        "select count(distinct unit_id) from x where list_contains($cookies, unit_id)".replace(
            "$cookies", repr(new_cookies)
        ),
    )
    assert exposed_new == len(new_cookies)
    rows, units = committed.execute(
        "select count(*), count(distinct (unit_id, experiment)) from x"
    ).fetchall()[0]
    assert rows > 1.3 * units
    assert (
        _one(committed, "select count(*) from x where unit_id in (select cookie_id from bots)") > 0
    )


def test_built_in_scenarios_show_in_the_data(
    committed: duckdb.DuckDBPyConnection, truth: dict[str, Any]
) -> None:
    split = dict(
        committed.execute(
            "select experiment, avg(case when variant = 'treatment' then 1.0 else 0 end)"
            " from (select distinct unit_id, experiment, variant from x) group by all"
        ).fetchall()
    )
    assert 0.48 < split["homepage_aa"] < 0.52
    assert 0.48 < split["checkout_layout"] < 0.52
    assert split["promo_banner"] < 0.485  # the logging bug
    assert "logging_bug" in truth["experiments"]["promo_banner"]
    over = dict(
        committed.execute(
            f"""select variant, count(*) filter (where n > {SESSION_EVENT_LIMIT_HINT}) from (
                select s.session_id, any_value(s.n) as n, any_value(x.variant) as variant
                from (select cookie_id, session_id, count(*) as n from e
                      where cookie_id not in (select cookie_id from bots) group by all) as s
                join x on x.unit_id = s.cookie_id and x.experiment = 'image_autoload'
                group by s.session_id) group by all"""
        ).fetchall()
    )
    assert over["control"] == 0
    assert over["treatment"] > 500
    ordinary = _one(
        committed,
        "select max(n) from (select session_id, count(*) as n from e where ts < '2026-09-15'"
        " and cookie_id not in (select cookie_id from bots) group by all)",
    )
    assert ordinary <= SESSION_EVENT_LIMIT_HINT // 2
    assert truth["experiments"]["checkout_layout"]["relative_effects"] == {
        "purchases": 0.1,
        "refunds": 0.1,
        "revenue": 0.1,
        "unsubscribes": 0.5,
    }
    for name in ("homepage_aa", "promo_banner", "image_autoload"):
        assert set(truth["experiments"][name]["relative_effects"].values()) == {0.0}


def test_the_factorial_experiment_changes_quick_backs_as_stated(
    committed: duckdb.DuckDBPyConnection, truth: dict[str, Any]
) -> None:
    """product_cards: four variants of about a quarter each; per variant, the share of human
    clicks followed by their back within 30 s is the stated one (about 7,000 clicks per
    variant; allowed: 4 times the largest binomial standard error, √(0.25/n)), and the
    stated contrasts are those of the stated shares."""
    cards = truth["experiments"]["product_cards"]
    assert cards["planned_split"] == dict.fromkeys(cards["variants"], 25)
    arms = "(select distinct unit_id, variant from x where experiment = 'product_cards')"
    split = dict(committed.execute(f"select variant, count(*) from {arms} group by all").fetchall())
    assert set(split) == set(cards["variants"])
    assert all(0.23 < n / sum(split.values()) < 0.27 for n in split.values())
    quick = committed.execute(
        f"""with ordered as (
            select cookie_id, event, ts, lead(event) over w as next_event,
                   lead(ts) over w as next_ts
            from e where ts >= timestamp '2026-09-15'
                   and cookie_id not in (select cookie_id from bots)
            window w as (partition by session_id order by ts))
        select a.variant, count(*), avg(case when next_event = 'back'
                   and next_ts - ts <= interval 30 second then 1.0 else 0.0 end)
        from ordered join {arms} as a on a.unit_id = ordered.cookie_id
        where event = 'click' group by all"""
    ).fetchall()
    stated = cards["quick_back_share_of_clicks"]
    for variant, clicks, share in quick:
        assert clicks > 1000
        assert share == pytest.approx(stated[variant], abs=4 * (0.25 / clicks) ** 0.5), variant
    c, p, b, both = (stated[v] for v in cards["variants"])
    assert cards["contrasts"]["quick_back_share_of_clicks"] == pytest.approx(
        {
            "main:photo": (p + both - c - b) / 2,
            "main:badge": (b + both - c - p) / 2,
            "interaction:photo*badge": both - b - p + c,
        },
        abs=1e-9,
    )


@pytest.mark.slow
def test_committed_sample_is_a_fresh_default_regeneration(tmp_path: Path) -> None:
    """Byte-identical under the pyarrow that wrote the committed files; same rows otherwise."""
    fresh_dir = generate(tmp_path / "fresh")
    written_by = pq.read_metadata(SAMPLE / "exposures.parquet").created_by
    if written_by == pq.read_metadata(fresh_dir / "exposures.parquet").created_by:
        assert _digests(fresh_dir) == _digests(SAMPLE)
        return
    for path in sorted(SAMPLE.rglob("*.parquet")):
        again = fresh_dir / path.relative_to(SAMPLE)
        assert pq.read_table(again).equals(pq.read_table(path)), path
