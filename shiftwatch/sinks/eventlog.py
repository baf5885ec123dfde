"""The event log: one JSON object per line, appended and flushed record by record.

The record format (schema 1) is documented in ``README.md``; this module only
writes lines, it does not decide what goes into them.  Standard library, plus ``orjson``
when it is installed (``pip install shiftwatch[fast]``): it encodes a monitor's step
record about 15x faster (36 us against 530 us for an 18 kB record here, most of it the
standard library's float formatting), with the same values; a record it refuses (a key
that is not a string, an integer beyond 64 bits, a type it does not know) goes through
the standard library, which also writes the error messages.

Durability: every record is handed to the operating system with one unbuffered
``os.write`` on a file opened with ``O_APPEND``, so when the *process* dies (crash,
``kill -9``) at most the line being written is lost.  ``fsync=True`` additionally asks the
OS to put each line on the disk, which also survives a machine crash or power loss but
costs a disk round trip per record (see ``benchmarks/tensorboard_write.py``).

Errors: a directory that cannot be created or written fails at construction with
:class:`~shiftwatch.errors.ConfigError`.  A write that fails later (disk full, file system
gone) emits one :class:`~shiftwatch.errors.ShiftWatchWarning` per log, makes
:meth:`EventLog.write` return ``False`` and leaves training running; later writes are
tried again, and if a failed write left part of a line behind, the next line starts on a
fresh line so readers skip only the damaged fragment.
"""

from __future__ import annotations

import json
import math
import os
import pathlib
import threading
import time
import warnings
from collections.abc import Mapping
from typing import Any

from ..errors import ConfigError, ShiftWatchWarning

try:  # optional accelerator; the standard library path below gives the same values
    import orjson as _orjson
except ImportError:  # pragma: no cover - depends on the environment
    _orjson = None
_ORJSON_OPTIONS = 0 if _orjson is None else (
    _orjson.OPT_PASSTHROUGH_DATACLASS | _orjson.OPT_PASSTHROUGH_DATETIME)

__all__ = ["SCHEMA_VERSION", "EventLog", "dumps_line", "to_json_value"]

#: Version written in every record's ``schema`` field.
SCHEMA_VERSION = 1

_HEAD = ("schema", "kind", "time")  # keys written first, in this order, for readability


def to_json_value(value: Any) -> Any:
    """Return ``value`` as plain JSON data: finite floats, ``None`` for NaN/inf.

    Handles ``dict`` (keys as ``json`` accepts them: ``str``, ``int``, ``float``,
    ``bool``, ``None``), ``list``/``tuple``, ``str``, ``int``, ``bool``, ``None``,
    ``float``, :class:`os.PathLike` (written as a string) and anything with a ``tolist()``
    method (NumPy scalars and arrays, PyTorch tensors; a tensor on a GPU is copied to the
    host).

    Raises:
        TypeError: a value of another type or a key of another type; the message names
            the path of the offending item inside the record.
    """
    try:
        return _convert(value, None)
    except _Unsupported:
        _convert(value, "record")  # again, tracking the path for the message
        raise AssertionError("unreachable") from None


class _Unsupported(TypeError):
    pass


_KEY_TYPES = (str, int, float, bool, type(None))


def _convert(value: Any, where: str | None) -> Any:
    # ``where`` (the path, for error messages) is only tracked on the second pass: it
    # costs a string format per item.  Floats inside dicts are handled inline (speed).
    kind = type(value)
    if kind is float:
        return value if value - value == 0.0 else None  # nan - nan, inf - inf are nan
    if kind is str or kind is int or kind is bool or value is None:
        return value
    if kind is dict or isinstance(value, Mapping):
        out = {}
        for key, item in value.items():
            if type(key) is not str and not isinstance(key, _KEY_TYPES):
                if where is None:
                    raise _Unsupported
                raise TypeError(
                    f"{where} has a key {key!r} of type {type(key).__name__}; JSON keys must "
                    "be str, int, float, bool or None: convert the key to str before logging"
                )
            kind = type(item)
            if kind is float:
                out[key] = item if item - item == 0.0 else None
            elif kind is str or kind is int or item is None:
                out[key] = item
            else:
                out[key] = _convert(item, None if where is None else f"{where}[{key!r}]")
        return out
    if kind is list or kind is tuple or isinstance(value, (list, tuple)):
        if where is None:
            return [_convert(item, None) for item in value]
        return [_convert(item, f"{where}[{i}]") for i, item in enumerate(value)]
    if isinstance(value, float):  # float subclasses (numpy.float64)
        value = float(value)
        return value if math.isfinite(value) else None
    if isinstance(value, (str, int)):  # subclasses (IntEnum; NumPy ints are not)
        return value
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    tolist = getattr(value, "tolist", None)
    if callable(tolist):
        return _convert(tolist(), where)
    if where is None:
        raise _Unsupported
    raise TypeError(
        f"{where} has type {type(value).__name__}, which JSON cannot hold; convert it to "
        "str, int, float, bool, None, list or dict before logging"
    )


def _default(value: Any) -> Any:
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    tolist = getattr(value, "tolist", None)
    if callable(tolist):
        return tolist()
    raise TypeError(type(value).__name__)


def dumps_line(record: Any) -> str:
    """``record`` as one line of compact JSON, NaN and infinities written as ``null``.

    Parses to the same values as ``json.dumps(to_json_value(record))`` (the text of a
    float may differ, e.g. ``0.00001`` for ``1e-05``, when orjson writes it).

    Raises:
        TypeError: a value JSON cannot hold (the message names where it is).
    """
    return _encode(record).decode("utf-8")


def _encode(record: Any) -> bytes:
    """:func:`dumps_line` as UTF-8 bytes (what the file gets)."""
    if _orjson is not None:
        try:
            # orjson writes NaN and infinities as null itself; dataclasses and datetimes
            # go to ``default`` (which refuses them) so that both paths accept the same
            # records
            return _orjson.dumps(record, default=_default, option=_ORJSON_OPTIONS)
        except TypeError:  # orjson.JSONEncodeError: let the standard path decide/explain
            pass
    return _dumps_std(record).encode("utf-8")


def _dumps_std(record: Any) -> str:
    """The standard-library encoder.  Records without non-finite numbers go straight
    through json's C encoder; the others (it refuses NaN) are converted first."""
    try:
        return json.dumps(
            record, ensure_ascii=False, separators=(",", ":"), allow_nan=False, default=_default
        )
    except (TypeError, ValueError):  # NaN/inf, or a value the slow path explains
        return json.dumps(
            to_json_value(record), ensure_ascii=False, separators=(",", ":"), allow_nan=False
        )


class EventLog:
    """Append-only JSON Lines file, one record per line (see ``README.md``).

    Args:
        path: the file to append to (usually ``<log_dir>/events.jsonl``).  Missing parent
            directories are created.  An existing file is appended to, never truncated.
        fsync: also ``os.fsync`` after every line (survives OS crashes; slower).

    Attributes:
        path: the file, as an absolute :class:`pathlib.Path`.
        records_written: number of records written successfully.
        write_errors: number of records that could not be written.

    Raises:
        ConfigError: the file cannot be created or opened for appending; the message
            names the path, the reason and the fix.

    Thread-safe: records written from several threads never interleave within a line.
    Usable as a context manager (closes on exit).
    """

    def __init__(self, path: str | os.PathLike, *, fsync: bool = False) -> None:
        if not isinstance(path, (str, os.PathLike)):
            raise ConfigError(
                f"'path' must be a str or os.PathLike (got {type(path).__name__}); pass "
                "the file name of the event log, e.g. 'runs/exp1/events.jsonl'"
            )
        if not isinstance(fsync, bool):
            raise ConfigError(f"'fsync' must be True or False (got {fsync!r})")
        self.path = pathlib.Path(path).expanduser().absolute()
        self.fsync = fsync
        self.records_written = 0
        self.write_errors = 0
        self._lock = threading.Lock()
        self._warned = False
        self._partial = False  # a failed write left an unterminated fragment behind
        self._fd: int | None = None
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o666)
        except OSError as exc:
            raise ConfigError(
                "'path' of the event log must be a file this process can create and "
                f"append to (got '{self.path}': {type(exc).__name__}: {exc.strerror or exc}); "
                "choose another log_dir or fix the permissions of its directories"
            ) from exc
        try:
            # a file that ends without a newline (the previous run was killed mid-line):
            # start our first record on a fresh line
            size = os.fstat(fd).st_size
            if size:
                with open(self.path, "rb") as existing:
                    existing.seek(size - 1)
                    self._partial = existing.read(1) != b"\n"
        except OSError:
            pass
        self._fd = fd

    @property
    def closed(self) -> bool:
        """``True`` after :meth:`close`."""
        return self._fd is None

    def write(self, record: Mapping[str, Any]) -> bool:
        """Append one record as one line; return ``True`` when it reached the OS.

        ``schema`` (1) and ``time`` (Unix seconds, now) are added when absent; the
        caller's mapping is not modified.  NaN and infinities become ``null``; NumPy and
        PyTorch scalars become plain numbers.

        Returns:
            ``False`` when the write failed (the first failure of this log emits a
            :class:`~shiftwatch.errors.ShiftWatchWarning`) or the log is closed.

        Raises:
            TypeError: ``record`` is not a mapping, or holds a value JSON cannot represent
                (a programming error, reported at once rather than written wrongly).
            ValueError: ``record["schema"]`` is present and is not 1.
        """
        if not isinstance(record, Mapping):
            raise TypeError(
                f"'record' must be a dict (got {type(record).__name__}); build the record "
                "as documented in README.md"
            )
        schema = record.get("schema", SCHEMA_VERSION)
        if schema != SCHEMA_VERSION:
            raise ValueError(
                f"'schema' must be {SCHEMA_VERSION} (got {schema!r}); this writer only "
                "writes schema 1, leave 'schema' out to have it filled in"
            )
        ordered: dict[str, Any] = {"schema": SCHEMA_VERSION}
        if "kind" in record:
            ordered["kind"] = record["kind"]
        ordered["time"] = record["time"] if "time" in record else time.time()
        for key, value in record.items():
            if key not in _HEAD:
                ordered[key] = value
        data = _encode(ordered) + b"\n"
        with self._lock:
            if self._fd is None:
                self._fail(OSError("the event log is closed"))
                return False
            if self._partial:
                data = b"\n" + data
            written = 0
            try:
                while written < len(data):
                    written += os.write(self._fd, data[written:])
                if self.fsync:
                    os.fsync(self._fd)
            except OSError as exc:
                if written:
                    self._partial = True
                self._fail(exc)
                return False
            self._partial = False
            self.records_written += 1
            return True

    def _fail(self, exc: OSError) -> None:
        self.write_errors += 1
        if not self._warned:
            self._warned = True
            warnings.warn(
                f"shiftwatch could not write to the event log '{self.path}' "
                f"({type(exc).__name__}: {exc}); training continues, this record is lost "
                "and later records are tried again. Free disk space or check the file "
                "system to keep the log complete. (Shown once per log.)",
                ShiftWatchWarning,
                stacklevel=3,
            )

    def close(self) -> None:
        """Close the file.  Safe to call more than once."""
        with self._lock:
            fd, self._fd = self._fd, None
        if fd is not None:
            try:
                os.close(fd)
            except OSError:  # nothing buffered on our side; the data already went out
                pass

    def __del__(self) -> None:  # do not leak the descriptor of a log nobody closed
        if getattr(self, "_fd", None) is not None:
            self.close()

    def __enter__(self) -> EventLog:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self.closed else "open"
        return f"EventLog('{self.path}', {state}, records_written={self.records_written})"
