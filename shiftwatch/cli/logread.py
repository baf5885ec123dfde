"""Streaming access to a run's event log (``events.jsonl``, schema 1, see README.md).

The reader never holds the whole log: it walks byte ranges line by line and hands every
decoded record to a callback.  Large logs are split into byte ranges read by several
processes (see :mod:`shiftwatch.cli.aggregate`); this module supplies the pieces:

* :func:`find_log` resolves a run directory or a file path to the log file;
* :func:`read_header` reads and checks the first record (``kind == "run"``);
* :func:`iter_records` decodes the lines that *start* inside ``[start, stop)``;
* :func:`step_range` reads a few records at the head and the tail to learn the first and
  last step without reading the middle.

Input rules (all failures raise :class:`LogError`, which the commands turn into exit code
2 with one message):

* A line that is not JSON, not an object, or has a ``schema`` other than 1 is an error
  naming its line number, except the *last* line of the file when it has no trailing
  newline: that is a record cut off by a run killed mid-write (or still being written) and
  is skipped with a note.
* Records without a ``schema`` key are read as schema 1 (the ``end`` example in the schema
  document has none).
* Blank lines are skipped.

JSON decoding uses ``orjson`` when it is installed (about 4x faster on step records) and
falls back to the standard library; a line orjson refuses is retried with the standard
library so both decoders accept exactly the same logs.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

try:  # optional accelerator; results are identical without it
    import orjson as _orjson
except ImportError:  # pragma: no cover - depends on the environment
    _orjson = None

__all__ = [
    "LOG_NAME",
    "SCHEMA",
    "LogError",
    "Record",
    "decoder",
    "find_log",
    "iter_records",
    "line_number",
    "read_header",
    "step_range",
]

#: File name the monitor writes inside its ``log_dir``.
LOG_NAME = "events.jsonl"
#: The schema version this reader understands.
SCHEMA = 1

Decoder = Callable[[bytes], Any]


class LogError(Exception):
    """The event log cannot be used. The message says what is wrong and what to do."""


@dataclass(frozen=True)
class Record:
    """One decoded line: ``offset`` is the byte offset of the line start in the file."""

    offset: int
    data: dict[str, Any]


def decoder(name: str | None = None) -> Decoder:
    """Return a ``bytes -> object`` JSON decoder.

    ``name`` is ``"orjson"``, ``"json"`` or ``None`` (orjson when installed, else json).
    """
    if name not in (None, "orjson", "json"):
        raise ValueError(f"'decoder' must be 'orjson', 'json' or None (got {name!r})")
    if name == "json" or (name is None and _orjson is None):
        return json.loads
    if _orjson is None:
        raise ValueError("'decoder' is 'orjson' but orjson is not installed: pip install orjson")
    fast = _orjson.loads

    def _decode(line: bytes) -> Any:
        try:
            return fast(line)
        except ValueError:  # e.g. a NaN literal: let the standard library decide
            return json.loads(line)

    return _decode


def find_log(path: str | os.PathLike[str]) -> Path:
    """Resolve ``path`` (a run directory or the log file itself) to the event log.

    Raises :class:`LogError` when there is nothing to read, listing logs found one or two
    levels below a directory so the user can pick one.
    """
    p = Path(path)
    if p.is_file():
        return p
    if p.is_dir():
        candidate = p / LOG_NAME
        if candidate.is_file():
            return candidate
        below = sorted({q.parent for pat in ("*/" + LOG_NAME, "*/*/" + LOG_NAME)
                        for q in p.glob(pat)})
        hint = ""
        if below:
            shown = ", ".join(str(q) for q in below[:5])
            more = f" and {len(below) - 5} more" if len(below) > 5 else ""
            hint = f"; logs found in sub-directories: {shown}{more}: pass one of them"
        raise LogError(
            f"no event log in {str(p)!r}: expected {str(candidate)!r}{hint or ''}"
            + ("" if hint else "; pass the monitor's log_dir or the path of its events.jsonl")
        )
    raise LogError(
        f"{str(p)!r} does not exist: pass a run directory (the monitor's log_dir) "
        f"or the path of its {LOG_NAME}"
    )


def line_number(path: Path, offset: int) -> int:
    """1-based line number of the line starting at byte ``offset`` (reads the prefix)."""
    count = 0
    with open(path, "rb") as f:
        left = offset
        while left > 0:
            block = f.read(min(left, 1 << 24))
            if not block:
                break
            count += block.count(b"\n")
            left -= len(block)
    return count + 1


def _check(data: Any, path: Path, offset: int) -> dict[str, Any]:
    if not isinstance(data, dict):
        raise LogError(
            f"{path}: line {line_number(path, offset)} is JSON but not an object "
            f"(got {type(data).__name__}): the log is corrupt; fix or remove that line"
        )
    schema = data.get("schema", SCHEMA)
    if schema != SCHEMA or isinstance(schema, bool):
        raise LogError(
            f"{path}: line {line_number(path, offset)} has schema version {schema!r}; this "
            f"shiftwatch reads schema {SCHEMA} only: read the log with the shiftwatch "
            f"version that wrote it (pip install -U shiftwatch)"
        )
    return data


def _corrupt(path: Path, offset: int, exc: Exception) -> LogError:
    return LogError(
        f"{path}: line {line_number(path, offset)} is not valid JSON ({exc}); the log is "
        f"corrupt in the middle (not just cut off at the end): fix or remove that line"
    )


def iter_records(
    path: Path,
    start: int,
    stop: int,
    *,
    decode: Decoder,
    notes: list[str],
    is_last: bool,
) -> Iterator[Record]:
    """Yield the records whose line starts at a byte offset in ``[start, stop)``.

    ``is_last`` says that ``stop`` is the end of the file as observed by the caller: the
    final line there may be cut off (no newline) and is then skipped with a note appended
    to ``notes``.  Lines appended after the caller looked at the file size are not read.
    """
    with open(path, "rb", buffering=1 << 20) as f:
        pos = start
        if start > 0:
            f.seek(start - 1)
            if f.read(1) != b"\n":  # inside a line: it belongs to the previous range
                pos = start + len(f.readline())
        else:
            f.seek(0)
        while pos < stop:
            line = f.readline()
            if not line:
                break
            offset, pos = pos, pos + len(line)
            terminated = line.endswith(b"\n")
            if is_last and pos > stop:  # written after the caller's snapshot: cut there
                line, terminated = line[: stop - offset], False
            if line.isspace() or not line:  # isspace does not copy a long line
                continue
            try:
                data = decode(line)
            except ValueError as exc:
                if not terminated and is_last:
                    notes.append(
                        f"the last line (byte {offset}, {len(line)} bytes) is cut off, "
                        "as when a run is killed mid-write or still writing: ignored"
                    )
                    break
                raise _corrupt(path, offset, exc) from None
            yield Record(offset, _check(data, path, offset))


def read_header(path: Path, *, decode: Decoder) -> tuple[dict[str, Any], int]:
    """Read the first record, which must be ``kind == "run"``; return it and the next offset."""
    with open(path, "rb") as f:
        line = f.readline()
    if not line.strip():
        raise LogError(
            f"{path} is empty: the run has not written its first record yet "
            "(or the monitor never started); wait for the run or check its log_dir"
        )
    try:
        data = decode(line)
    except ValueError as exc:
        if not line.endswith(b"\n"):
            raise LogError(
                f"{path}: the first record is incomplete (the run is starting or was killed "
                "while writing it): wait for the run or remove the log"
            ) from None
        raise _corrupt(path, 0, exc) from None
    data = _check(data, path, 0)
    if data.get("kind") != "run":
        raise LogError(
            f"{path}: the first record must have kind 'run' (got {data.get('kind')!r}): "
            "this is not a shiftwatch event log, or its start is missing"
        )
    for key, typ in (("layers", list), ("settings", dict), ("rules", list)):
        if key in data and not isinstance(data[key], typ):
            raise LogError(
                f"{path}: 'run.{key}' must be a JSON {typ.__name__} "
                f"(got {type(data[key]).__name__}): the log is corrupt"
            )
    return data, len(line)


def _step_of(data: Any) -> int | None:
    if isinstance(data, dict):
        step = data.get("step")
        if isinstance(step, int) and not isinstance(step, bool):
            return step
    return None


def step_range(path: Path, size: int, body_start: int, *, decode: Decoder) -> tuple[int, int]:
    """First and last step found near the head and the tail of the log (0, 0 if none).

    Reads at most a few records from each end; undecodable lines are left to the full pass,
    which reports them.
    """
    first: int | None = None
    with open(path, "rb") as f:
        f.seek(body_start)
        for _ in range(64):
            line = f.readline()
            if not line or f.tell() > size:
                break
            try:
                first = _step_of(decode(line))
            except ValueError:
                break
            if first is not None:
                break
        if first is None:
            return 0, 0
        last: int | None = None
        block = 1 << 20
        while last is None:
            begin = max(body_start, size - block)
            f.seek(begin)
            lines = f.read(size - begin).split(b"\n")
            if begin > body_start:
                lines = lines[1:]  # first piece may start mid-line
            found = []
            for line in reversed(lines[-32:]):
                try:
                    step = _step_of(decode(line)) if line.strip() else None
                except ValueError:
                    continue
                if step is not None:
                    found.append(step)
            if found:
                last = max(found)
            elif begin == body_start:
                last = first
            block *= 4
    return min(first, last), max(first, last)
