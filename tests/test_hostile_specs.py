"""Hostile specs, bot filters, data and output paths, and TOML tricks, through the CLI.

Each is refused with one line naming the file and the key, or shown harmless. The canary
outside the data folder never shows up, and nothing is written anywhere but the output
folder (see tests/hostile_env.py). The rules for data and output paths are in the README
("Where data is read and results are written").
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Callable
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlglot.expressions as exp

from metricforge.compile.query import compile_plan
from metricforge.spec import load_plan
from tests.hostile_env import (
    Env,
    assert_harmless,
    assert_rejected,
    setup_env,
    snapshot,
    toml_str,
)


@pytest.fixture
def env(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Env:
    return setup_env(tmp_path, monkeypatch)


def release_filter(env: Env, rules: str, version: int = 9) -> None:
    """Release bots@<version> with ``rules`` in the test's library and use it."""
    folder = env.defs / "filters"
    body = f'name = "bots"\nversion = {version}\n{rules}'
    (folder / f"bots-v{version}.toml").write_text(body, encoding="utf-8")
    sha = hashlib.sha256(body.encode()).hexdigest()
    with (folder / "released.toml").open("a", encoding="utf-8") as fh:
        fh.write(f'\n[bots.{version}]\nsha256 = "{sha}"\nreleased = "2026-09-01"\n')
    env.edit_spec('bot_filter = "bots@1"', f'bot_filter = "bots@{version}"')


def tokens_rule(tokens: list[str]) -> str:
    return f'[[rule]]\nkind = "user_agent"\ntokens = [{", ".join(map(toml_str, tokens))}]\n'


def set_data(env: Env, key: str, value: str) -> None:
    default = {"events": '"events"', "exposures": '"exposures.parquet"'}[key]
    env.edit_spec(f"{key} = {default}", f"{key} = {toml_str(value)}")


def composites(env: Env, body: str, decision: str) -> None:
    env.define(body, decision=decision)


def chain(n: int) -> str:
    parts = ['[metric.c0]\nkind = "count"\nevent = "purchase"\n']
    parts += [
        f'[metric.c{i}]\nkind = "composite"\nterms = {{ c{i - 1} = 1.0 }}\n' for i in range(1, n)
    ]
    return "\n".join(parts)


def diamond(width: int, levels: int) -> str:
    parts = ['[metric.d0_0]\nkind = "count"\nevent = "purchase"\n']
    for level in range(1, levels + 1):
        terms = ", ".join(f"d{level - 1}_0 = {i + 1}.0" for i in range(1))
        if level > 1:
            terms = ", ".join(f"d{level - 1}_{i} = 1.0" for i in range(width))
        else:
            parts += [
                f'[metric.d0_{i}]\nkind = "count"\nevent = "purchase"\n' for i in range(1, width)
            ]
            terms = ", ".join(f"d0_{i} = 1.0" for i in range(width))
        parts += [
            f'[metric.d{level}_{i}]\nkind = "composite"\nterms = {{ {terms} }}\n'
            for i in range(width)
        ]
    return "\n".join(parts)


def symlinked_events(env: Env) -> None:
    os.symlink(env.canary_parquet, env.data / "events" / "part-9.parquet")


def big_definitions(env: Env) -> None:
    filler = "# " + "x" * 98 + "\n"
    (env.defs / "big.toml").write_text(filler * 10_500, encoding="utf-8")


# (id, edit of the case, needles in the one-line error)
SPEC_CASES: list[tuple[str, Callable[[Env], None], list[str]]] = [
    # names that would become SQL literals, or break the terminal
    (
        "experiment_newline",
        lambda e: e.edit_spec('name = "case"', 'name = "case\\nx"'),
        ["experiment.name", "printable"],
    ),
    (
        "variant_nul",
        lambda e: e.edit_spec("treatment = 50", '"tr\\u0000" = 50'),
        ["experiment.variants", "printable"],
    ),
    (
        "many_variants",
        lambda e: e.edit_spec("treatment = 50", ", ".join(f"v{i} = 1" for i in range(25))),
        ["experiment.variants", "at most 20 variants"],
    ),
    # bot filters
    (
        "token_nul",
        lambda e: release_filter(e, tokens_rule(["bot\u0000"])),
        ["bots-v9.toml", "rule.tokens", "printable"],
    ),
    (
        "too_many_tokens",
        lambda e: release_filter(e, tokens_rule([f"t{i}" for i in range(201)])),
        ["rule.tokens", "at most 200 tokens"],
    ),
    (
        "long_token",
        lambda e: release_filter(e, tokens_rule(["x" * 201])),
        ["rule.tokens", "at most 200 tokens"],
    ),
    (
        "registry_version_key",
        lambda e: (
            (e.defs / "filters" / "released.toml")
            .open("a")
            .write('\n[bots.x]\nsha256 = "0"\nreleased = "2026-01-01"\n')
        ),
        ["released.toml", "bots.x", "whole number"],
    ),
    (
        "filter_ref_traversal",
        lambda e: e.edit_spec('"bots@1"', '"../../secret/canary@1"'),
        ["experiment.bot_filter", "NAME@VERSION"],
    ),
    (
        "filters_folder_elsewhere",
        lambda e: e.edit_spec("[data]\n", '[data]\nfilters = "../secret"\n'),
        ["released.toml", "file not found"],
    ),
    # data locations
    (
        "events_folder_without_parquet",
        lambda e: set_data(e, "events", "defs/filters"),
        ["filters", "no .parquet files in folder"],
    ),
    (
        "events_is_text_file",
        lambda e: set_data(e, "events", str(e.canary)),
        ["canary.txt", "not a Parquet file"],
    ),
    (
        "events_traversal",
        lambda e: set_data(e, "events", "../../../../../../../.." + str(e.canary)),
        ["canary.txt", "not a Parquet file"],
    ),
    (
        "events_foreign_parquet",
        lambda e: set_data(e, "events", str(e.canary_parquet)),
        ["canary.parquet", "column 'ts' has type int64"],
    ),
    ("events_symlink_out", symlinked_events, ["part-9.parquet", "symbolic link", "outside"]),
    (
        "exposures_device",
        lambda e: set_data(e, "exposures", "/dev/zero"),
        ["/dev/zero", "neither a regular file nor a folder"],
    ),
    (
        "events_nul_path",
        lambda e: set_data(e, "events", "events\u0000x"),
        ["data.events", "printable"],
    ),
    (
        "definitions_text_file",
        lambda e: e.edit_spec(
            f'definitions = ["{e.defs.as_posix()}"]', f'definitions = ["{e.canary.as_posix()}"]'
        ),
        ["canary.txt", "malformed TOML"],
    ),
    # TOML tricks
    (
        "duplicate_key",
        lambda e: e.edit_spec('name = "case"', 'name = "case"\nname = "other"'),
        ["spec.toml", "malformed TOML"],
    ),
    (
        "dotted_redefinition",
        lambda e: e.spec.write_text('experiment.name = "x"\n' + e.spec.read_text()),
        ["spec.toml", "malformed TOML"],
    ),
    (
        "deep_arrays",
        lambda e: e.edit_spec("[data]", "x = " + "[" * 3000 + "]" * 3000 + "\n[data]"),
        ["spec.toml", "malformed TOML"],
    ),
    (
        "byte_order_mark",
        lambda e: e.spec.write_bytes(b"\xef\xbb\xbf" + e.spec.read_bytes()),
        ["spec.toml", "malformed TOML"],
    ),
    (
        "not_utf8",
        lambda e: e.spec.write_bytes(e.spec.read_bytes() + b"# \xff\xfe\n"),
        ["spec.toml", "not valid UTF-8"],
    ),
    ("huge_definitions", big_definitions, ["big.toml", "larger than 1000000 bytes"]),
    (
        "where_not_a_string",
        lambda e: e.define('[metric.hostile]\nkind = "count"\nwhere = 42\n'),
        ["metric.hostile.where", "expected a string"],
    ),
    (
        "huge_window",
        lambda e: e.edit_spec("window_days = 14", "window_days = 1000000000000000000"),
        ["experiment.window_days", "between 1 and 366"],
    ),
    (
        "far_future",
        lambda e: e.edit_spec("end = 2026-09-29T00:00:00Z", "end = 9999-12-31T23:59:59Z"),
        ["experiment.end", "year must be between"],
    ),
    (
        "alpha_nan",
        lambda e: e.edit_spec("alpha = 0.05", "alpha = nan"),
        ["experiment.alpha", "between 0 and 0.5"],
    ),
    (
        "share_inf",
        lambda e: e.edit_spec("treatment = 50", "treatment = inf"),
        ["experiment.variants.treatment", "positive number"],
    ),
    (
        "weight_inf",
        lambda e: e.define('[metric.hostile]\nkind = "composite"\nterms = { revenue = inf }\n'),
        ["metric.hostile.terms.revenue", "finite"],
    ),
    (
        "unknown_key",
        lambda e: e.edit_spec("window_days", "windw_days"),
        ["windw_days", "did you mean 'window_days'"],
    ),
    (
        "metric_cycle",
        lambda e: composites(
            e,
            '[metric.a]\nkind = "composite"\nterms = { b = 1.0 }\n'
            '[metric.b]\nkind = "composite"\nterms = { a = 1.0 }\n',
            "a",
        ),
        ["cycle"],
    ),
    ("metric_chain", lambda e: composites(e, chain(13), "c12"), ["levels deep"]),
    (
        "metric_diamond",
        lambda e: composites(e, diamond(25, 2), "d2_0"),
        ["more than 500 per-unit parts"],
    ),
]


@pytest.mark.parametrize(
    ("edit", "needles"), [c[1:] for c in SPEC_CASES], ids=[c[0] for c in SPEC_CASES]
)
def test_hostile_spec_is_refused(env: Env, edit: Callable[[Env], None], needles: list[str]) -> None:
    edit(env)
    before = snapshot(env.root)
    assert_rejected(env, env.run(), needles, before)


def _symlink_out(env: Env) -> Path:
    (env.root / "elsewhere").mkdir()
    os.symlink(env.root / "elsewhere", env.root / "link")
    return env.root / "link"


def _below_symlink(env: Env) -> Path:
    return _symlink_out(env) / "out"


def _not_a_result(env: Env) -> Path:
    folder = env.root / "notes"
    folder.mkdir()
    (folder / "thesis.txt").write_text("mine", encoding="utf-8")
    return folder


def _a_file(env: Env) -> Path:
    path = env.root / "file.txt"
    path.write_text("mine", encoding="utf-8")
    return path


OUTPUT_CASES: list[tuple[str, Callable[[Env], Path], list[str]]] = [
    ("events_folder", lambda e: e.data / "events", ["would replace the input"]),
    ("inside_events", lambda e: e.data / "events" / "results", ["inside the input folder"]),
    ("over_data", lambda e: e.data, ["would contain the input"]),
    ("filters_folder", lambda e: e.defs / "filters", ["inside the input folder"]),
    ("spec_file", lambda e: e.spec, ["would replace the input"]),
    ("traversal", lambda e: e.root / "results" / ".." / "data", ["would contain the input"]),
    ("symlink", _symlink_out, ["symbolic link"]),
    ("below_symlink", _below_symlink, ["symbolic link"]),
    ("foreign_folder", _not_a_result, ["not empty", "no previous metricforge result"]),
    ("existing_file", _a_file, ["not a folder"]),
]


@pytest.mark.parametrize(
    ("where", "needles"), [c[1:] for c in OUTPUT_CASES], ids=[c[0] for c in OUTPUT_CASES]
)
def test_hostile_output_path_is_refused(
    env: Env, where: Callable[[Env], Path], needles: list[str]
) -> None:
    out = where(env)
    before = snapshot(env.root)
    assert_rejected(env, env.run(out=out), needles, before)


def test_sql_in_experiment_name_stays_a_literal(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    name = "case'); COPY events TO 'stolen.csv'; --"
    env = setup_env(tmp_path, monkeypatch, experiment=name)
    env.edit_spec('name = "case"', f"name = {toml_str(name)}")
    literals = [x.this for x in compile_plan(load_plan(env.spec)).unit_rows.find_all(exp.Literal)]
    assert name in literals
    card = assert_harmless(env, env.run(), snapshot(env.root))
    assert card["stamp"]["experiment"] == name
    assert [v["units"] for v in card["variants"]] == [10, 10]


def test_unicode_and_quoted_variant_names_work(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    arms = ("contr\u00f4le \u2713", "it's; --")
    env = setup_env(tmp_path, monkeypatch, variants=arms)
    env.edit_spec(
        'control = "control"\nvariants = { control = 50, treatment = 50 }',
        f"control = {toml_str(arms[0])}\n"
        f"variants = {{ {toml_str(arms[0])} = 50, {toml_str(arms[1])} = 50 }}",
    )
    card = assert_harmless(env, env.run(), snapshot(env.root))
    assert [v["variant"] for v in card["variants"]] == list(arms)
    assert card["metrics"][0]["variant"] == arms[1]


def test_wildcards_in_bot_tokens_are_plain_text(env: Env) -> None:
    """'%' and '_' are substrings, not patterns: only the agent that contains '%' is a bot."""
    release_filter(env, tokens_rule(["%", "_", "'"]))
    path = env.data / "events" / "part-0.parquet"
    table = pq.read_table(path)
    agents = [
        "Agent 100%" if u == "u000" else a
        for u, a in zip(
            table["cookie_id"].to_pylist(), table["user_agent"].to_pylist(), strict=True
        )
    ]
    column = table.schema.get_field_index("user_agent")
    pq.write_table(table.set_column(column, "user_agent", pa.array(agents, pa.string())), path)
    before = snapshot(env.root)
    card = assert_harmless(env, env.run(), before)
    assert [v["bot_units"] for v in card["variants"]] == [1, 0]  # u000 is in control


def test_many_long_bot_tokens_are_bounded_and_harmless(env: Env) -> None:
    """The limit (200 tokens of 200 characters) runs: substring tests are linear."""
    release_filter(env, tokens_rule([("a" * 198 + f"{i:02d}")[:200] for i in range(200)]))
    card = assert_harmless(env, env.run(), snapshot(env.root))
    assert sum(v["bot_units"] for v in card["variants"]) == 0


def test_absolute_data_paths_outside_the_spec_folder_work(env: Env) -> None:
    set_data(env, "events", str((env.data / "events").resolve()))
    set_data(env, "exposures", str((env.data / "exposures.parquet").resolve()))
    card = assert_harmless(env, env.run(), snapshot(env.root))
    assert [v["units"] for v in card["variants"]] == [10, 10]


def test_a_previous_result_is_replaced(env: Env) -> None:
    assert env.run().exit_code == 0
    (env.out / "stale.txt").write_text("from before", encoding="utf-8")
    assert env.run().exit_code == 0
    assert sorted(p.name for p in env.out.iterdir()) == [
        "manifest.json",
        "scorecard.json",
        "scorecard.parquet",
    ]
