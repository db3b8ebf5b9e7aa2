"""Versioned bot filters (``metric_defs/filters/<name>-v<N>.toml``) and their release registry.

A released version is immutable: its file's SHA-256 is recorded in
``metric_defs/filters/released.toml`` and a file that no longer matches is refused.
"""

from __future__ import annotations

import re
from pathlib import Path

from metricforge.errors import FilterRegistryError, SpecError, closest
from metricforge.spec.model import BotFilter, BotRule, RuleKind
from metricforge.spec.tomlfile import Section, read_toml

REGISTRY_NAME = "released.toml"
_REF = re.compile(r"^(?P<name>[a-z][a-z0-9_]*)@(?P<version>[0-9]+)$")
_FILE = re.compile(r"^(?P<name>[a-z][a-z0-9_]*)-v(?P<version>[0-9]+)\.toml$")
MAX_TOKENS = 200
MAX_TOKEN_LENGTH = 200


def parse_ref(ref: str, *, file: str, key: str) -> tuple[str, int]:
    match = _REF.match(ref)
    if not match:
        raise SpecError(f"bot filter must be written NAME@VERSION, got '{ref}'", file=file, key=key)
    return match.group("name"), int(match.group("version"))


def released_versions(folder: Path) -> list[dict[str, str | int]]:
    """The registry's entries, one per released version, sorted by name and version."""
    registry = read_toml(folder / REGISTRY_NAME)
    out: list[dict[str, str | int]] = []
    for name, versions in sorted(registry.data.items()):
        sec = Section(registry, (name,), versions)
        for version, entry in sec.table.items():
            ver = Section(registry, (name, version), entry)
            if not (version.isascii() and version.isdigit()) or len(version) > 9:
                raise ver.error("a released version is a whole number, e.g. [bots.3]")
            out.append(
                {
                    "name": name,
                    "version": int(version),
                    "sha256": ver.req_str("sha256"),
                    "released": ver.req_str("released"),
                }
            )
    out.sort(key=lambda e: (str(e["name"]), int(e["version"])))
    return out


def load_filter(folder: Path, ref: str, *, spec_file: str) -> BotFilter:
    """Load a released filter version, refusing one whose file changed after release."""
    name, version = parse_ref(ref, file=spec_file, key="experiment.bot_filter")
    path = folder / f"{name}-v{version}.toml"
    entries = released_versions(folder)
    known = [f"{e['name']}@{e['version']}" for e in entries]
    entry = next((e for e in entries if e["name"] == name and e["version"] == version), None)
    if entry is None:
        raise SpecError(
            f"bot filter '{ref}' is not released (see {folder / REGISTRY_NAME})",
            file=spec_file,
            key="experiment.bot_filter",
            suggestion=closest(ref, known),
        )
    if not path.exists():
        raise SpecError(
            f"released bot filter file is missing: {path}",
            file=spec_file,
            key="experiment.bot_filter",
        )
    toml = read_toml(path)
    if toml.sha256 != entry["sha256"]:
        raise FilterRegistryError(
            f"released filter {ref} was changed after release (sha256 {toml.sha256[:12]}…,"
            f" released {str(entry['sha256'])[:12]}…); release the change as a new version",
            file=str(path),
            key="sha256",
        )
    return _parse_filter(toml, name, version, str(entry["released"]))


def _parse_filter(toml: object, name: str, version: int, released: str) -> BotFilter:
    from metricforge.spec.tomlfile import TomlFile

    assert isinstance(toml, TomlFile)
    top = Section(toml, (), toml.data)
    top.check_keys({"name", "version", "description", "rule"})
    if top.req_str("name") != name:
        raise top.error(f"name must be '{name}' to match the file name", "name")
    if top.integer("version") != version:
        raise top.error(f"version must be {version} to match the file name", "version")
    rules_raw = toml.data.get("rule", [])
    if not isinstance(rules_raw, list) or not rules_raw:
        raise top.error("a filter needs at least one [[rule]]", "rule")
    rules = tuple(_parse_rule(Section(toml, ("rule",), r)) for r in rules_raw)
    return BotFilter(
        name=name,
        version=version,
        path=toml.path,
        sha256=toml.sha256,
        released=released,
        rules=rules,
        text=toml.text,
    )


def _parse_rule(sec: Section) -> BotRule:
    kind = sec.choice("kind", RuleKind, "rule kind")
    if kind is RuleKind.SESSION_EVENTS:
        sec.check_keys({"kind", "max", "description"})
        limit = sec.integer("max")
        if limit is None or not 1 <= limit <= 1_000_000_000:
            raise sec.error("max must be a whole number from 1 to 1000000000", "max")
        return BotRule(kind=kind, max_events=limit)
    sec.check_keys({"kind", "tokens", "description"})
    tokens = sec.str_list("tokens")
    if not tokens:
        raise sec.error("tokens must be a non-empty list of strings", "tokens")
    if len(tokens) > MAX_TOKENS or any(
        not t or len(t) > MAX_TOKEN_LENGTH or not t.isprintable() for t in tokens
    ):
        raise sec.error(
            f"at most {MAX_TOKENS} tokens of 1 to {MAX_TOKEN_LENGTH} printable characters each",
            "tokens",
        )
    if kind is RuleKind.USER_AGENT:
        tokens = [t.lower() for t in tokens]
    return BotRule(kind=kind, tokens=tuple(tokens))


def filter_files(folder: Path) -> list[Path]:
    return sorted(p for p in folder.glob("*.toml") if _FILE.match(p.name))
