"""Publishing a result folder all or nothing, and the rules for where it may go.

Where: the output folder (``--out``) must not
  - pass through a symbolic link (no component of the path as given may be one),
  - be, or lie inside, an input folder (events, definitions, bot filters),
  - contain any input (events, exposures, definitions, filters, the spec),
  - be an existing file, or a non-empty folder that is not a previous result (a folder
    whose scorecard.json carries a stamp). A previous result is replaced as a whole.

How: the files are written into a hidden folder beside the target
(``.<name>.partial-<pid>``), each file flushed and fsynced, then the folder itself; the
previous result (if any) is renamed to ``.<name>.old-<pid>``, the new folder renamed into
place, the parent folder fsynced, and the old one removed. A reader therefore sees the
previous complete result, the new complete result, or (for an instant) none. Hidden
leftovers of killed runs (their process is gone) are never results: the next run removes
them, first restoring a previous result that a run killed between its two renames had
moved aside.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import shutil
import signal
from collections.abc import Iterable
from pathlib import Path

from metricforge.errors import OutputError
from metricforge.locations import Uri
from metricforge.spec.model import Plan

# Test hook: when this variable names a step below, the process kills itself (SIGKILL) right
# after that step. Unset (always, outside the test suite) it does nothing.
KILL_AT_ENV = "METRICFORGE_TEST_KILL_AT"
STEPS = ("created", "written", "synced", "moved-old", "moved-new", "removed-old")

_LEFTOVER = re.compile(r"^\.(?P<name>.+)\.(?P<kind>partial|old)-(?P<pid>[0-9]+)$")


def _step(name: str) -> None:
    if os.environ.get(KILL_AT_ENV) == name:
        os.kill(os.getpid(), signal.SIGKILL)


def protected_paths(plan: Plan) -> tuple[list[Path], list[Path]]:
    """(input folders, input files) of a run: the output may not touch them."""
    spec = plan.spec
    data = [
        p.local_path() if isinstance(p, Uri) else p for p in (spec.events_path, spec.exposures_path)
    ]
    candidates = [
        *[p for p in data if p is not None],  # a file:// URI is local; remote data is not
        spec.path,
        plan.bot_filter.path.parent,
        *spec.definition_paths,
    ]
    folders = [p.resolve() for p in candidates if p.is_dir()]
    files = [p.resolve() for p in candidates if not p.is_dir()]
    return folders, files


def is_result(folder: Path) -> bool:
    """Whether ``folder`` holds a previous metricforge output: a result (scorecard.json with
    a stamp) or a comparison (comparison.json with both stamps)."""
    for name, key in (("scorecard.json", "stamp"), ("comparison.json", "a")):
        try:
            card = json.loads((folder / name).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        if isinstance(card, dict) and isinstance(card.get(key), dict):
            return True
    return False


def _no_symlinks(out: Path) -> None:
    path = Path(out.anchor)
    for part in out.parts[1:]:
        path = path / part
        if path.is_symlink():
            raise OutputError(
                "the output path passes through a symbolic link; give the real path",
                file=str(path),
            )


def check_target(out: Path, folders: Iterable[Path], files: Iterable[Path]) -> Path:
    """The absolute output folder, after checking the rules above."""
    _no_symlinks(out.absolute())
    target = Path(os.path.abspath(out))
    for folder in folders:
        if folder in target.parents:
            raise OutputError(
                f"the output folder would be inside the input folder {folder}", file=str(target)
            )
    for item in [*folders, *files]:
        if target == item or target in item.parents:
            verb = "replace" if target == item else "contain"
            raise OutputError(f"the output folder would {verb} the input {item}", file=str(target))
    if target.exists():
        if not target.is_dir():
            raise OutputError("the output path exists and is not a folder", file=str(target))
        if any(target.iterdir()) and not is_result(target):
            raise OutputError(
                "the output folder is not empty and holds no previous metricforge result;"
                " choose another --out",
                file=str(target),
            )
    return target


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _remove(path: Path) -> None:
    if path.is_symlink() or not path.is_dir():
        path.unlink(missing_ok=True)
    else:
        shutil.rmtree(path)


def recover(target: Path) -> None:
    """Remove leftovers of killed runs beside ``target``; restore a result moved aside."""
    parent = target.parent
    if not parent.is_dir():
        return
    leftovers = []
    for entry in parent.iterdir():
        match = _LEFTOVER.match(entry.name)
        if match and match["name"] == target.name and not _alive(int(match["pid"])):
            leftovers.append((match["kind"], entry))
    for kind, entry in sorted(leftovers, key=lambda item: item[0] != "old"):
        if kind == "old" and not target.exists() and not entry.is_symlink() and is_result(entry):
            entry.rename(target)
        else:
            _remove(entry)


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write(path: Path, payload: bytes) -> None:
    with path.open("xb") as fh:
        fh.write(payload)
        fh.flush()
        os.fsync(fh.fileno())


def publish(target: Path, files: dict[str, bytes]) -> None:
    """Put exactly ``files`` (name → bytes) into the folder ``target``, all or nothing."""
    parent = target.parent
    pid = os.getpid()
    tmp = parent / f".{target.name}.partial-{pid}"
    old = parent / f".{target.name}.old-{pid}"
    try:
        parent.mkdir(parents=True, exist_ok=True)
        recover(target)
        for mine in (tmp, old):
            if mine.exists() or mine.is_symlink():
                _remove(mine)
        tmp.mkdir()
        _step("created")
        for name, payload in files.items():
            _write(tmp / name, payload)
        _step("written")
        _fsync_dir(tmp)
        _step("synced")
        if target.exists():
            target.rename(old)
            _step("moved-old")
        tmp.rename(target)
        _fsync_dir(parent)
        _step("moved-new")
        if old.exists():
            shutil.rmtree(old)
            _fsync_dir(parent)
        _step("removed-old")
    except OSError as err:
        with contextlib.suppress(OSError):
            if tmp.exists():
                shutil.rmtree(tmp)
            if old.exists() and not target.exists():
                old.rename(target)
        raise OutputError(
            f"cannot write results: {err.strerror or err}", file=str(target)
        ) from None
