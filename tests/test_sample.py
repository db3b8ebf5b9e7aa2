"""The demo generator: reproducible bytes, the scenario's promised properties."""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import pytest

from metricforge.sample import generate
from tests.conftest import SAMPLE


def _files(folder: Path) -> dict[str, bytes]:
    return {
        p.relative_to(folder).as_posix(): p.read_bytes()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def test_same_seed_same_bytes_other_seed_other_bytes(tmp_path: Path) -> None:
    a = _files(generate(tmp_path / "a", users=200, days=3, seed=1))
    b = _files(generate(tmp_path / "b", users=200, days=3, seed=1))
    c = _files(generate(tmp_path / "c", users=200, days=3, seed=2))
    assert a == b
    assert a["exposures.parquet"] != c["exposures.parquet"]


@pytest.mark.slow
def test_committed_sample_is_the_default_regeneration(tmp_path: Path) -> None:
    assert _files(generate(tmp_path / "fresh")) == _files(SAMPLE)


def _query(sql: str) -> list[tuple[object, ...]]:
    con = duckdb.connect()
    events = f"read_parquet('{SAMPLE}/events/*/*.parquet')"
    exposures = f"read_parquet('{SAMPLE}/exposures.parquet')"
    return con.execute(sql.replace("EV", events).replace("EX", exposures)).fetchall()


def test_bot_share_is_between_30_and_50_percent() -> None:
    """Bots counted independently: bot user agents, huge sessions or sub-second backs."""
    (share,) = _query(
        """
        WITH e AS (SELECT * FROM EV),
        s AS (SELECT cookie_id, session_id, count(*) n FROM e GROUP BY ALL),
        clicks AS (SELECT cookie_id, ts, event,
                   lead(ts) OVER (PARTITION BY session_id ORDER BY ts) AS next_ts,
                   lead(event) OVER (PARTITION BY session_id ORDER BY ts) AS next_event FROM e),
        bots AS (
          SELECT cookie_id FROM e
          WHERE regexp_matches(lower(user_agent), 'bot|crawler|spider|headless')
          UNION SELECT cookie_id FROM s WHERE n > 200
          UNION SELECT cookie_id FROM clicks WHERE event = 'click' AND next_event = 'back'
                AND next_ts - ts < INTERVAL 1 SECOND)
        SELECT avg(CASE WHEN cookie_id IN (SELECT cookie_id FROM bots) THEN 1 ELSE 0 END) FROM e
        """
    )[0]
    assert 0.30 <= float(share) <= 0.50  # type: ignore[arg-type]
    facts = json.loads((SAMPLE / "TRUE_EFFECTS.json").read_text())
    assert 0.30 <= facts["events"]["bot_share"] <= 0.50


def test_pre_period_of_14_days_before_every_exposure() -> None:
    (first_event, first_exposure, days_before) = _query(
        """SELECT (SELECT min(ts) FROM EV),
                  (SELECT min(ts) FROM EX),
                  (SELECT count(DISTINCT date_trunc('day', ts)) FROM EV
                   WHERE ts < (SELECT min(ts) FROM EX))"""
    )[0]
    assert first_event < first_exposure  # type: ignore[operator]
    assert days_before == 14


def test_cookie_changes_and_repeated_exposures_exist() -> None:
    (accounts_with_two_cookies, repeated) = _query(
        """SELECT (SELECT count(*) FROM (SELECT account_id FROM EV
                   WHERE account_id IS NOT NULL GROUP BY 1 HAVING count(DISTINCT cookie_id) > 1)),
                  (SELECT count(*) FROM (SELECT unit_id, experiment FROM EX
                   GROUP BY ALL HAVING count(*) > 1))"""
    )[0]
    assert accounts_with_two_cookies > 0  # type: ignore[operator]
    assert repeated > 0  # type: ignore[operator]
