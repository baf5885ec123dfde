"""The reference: what "normal" looks like for every watched layer.

Pooled from the first ``K`` sampled training steps after warm-up (their summaries merged
exactly), or loaded from a file written by :meth:`ShiftMonitor.save_reference
<shiftwatch.monitor.ShiftMonitor.save_reference>`.

File formats (chosen by the extension; never pickle):

* ``.json``: ``{"schema": 1, "kind": "shiftwatch.reference", "shiftwatch": "<version>",
  "bins": B, "steps": [...], "layers": [{"name": ..., "summary": <Summary.to_dict()>}, ...]}``
  with the summary format of :meth:`shiftwatch.summary.Summary.to_dict` (infinities as
  the strings ``"inf"``/``"-inf"``).
* ``.npz``: the same content: the JSON header without the summaries under ``meta`` (a
  string array), and per layer ``i`` the arrays ``table_i``, ``extrema_i``, ``hist_i``,
  ``edges_i`` (float64; ``hist_i``/``edges_i`` absent for a layer without a histogram).
  Read with ``numpy.load(path, allow_pickle=False)``.
"""

from __future__ import annotations

import json
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from .errors import ConfigError
from .summary import Summary

__all__ = ["REFERENCE_KIND", "Reference", "load_reference_file", "save_reference_file"]

REFERENCE_KIND = "shiftwatch.reference"
_SCHEMA = 1


@dataclass
class Reference:
    """Reference pooling state: the merged host flat, the steps it covers, how many
    sampled steps it pools (``target``) and where it came from (``"pooled"``/``"file"``)."""

    target: int
    flat: np.ndarray | None = None
    steps: list[int] = field(default_factory=list)
    source: str = "pooled"
    path: str | None = None

    @property
    def ready(self) -> bool:
        return self.flat is not None and (self.source == "file" or len(self.steps) >= self.target)


def _format(path: str | os.PathLike) -> str:
    suffix = Path(path).suffix.lower()
    if suffix not in (".json", ".npz"):
        raise ConfigError(
            f"reference file '{os.fspath(path)}' must end in .json or .npz (got "
            f"{suffix or 'no extension'!r}); pick one of these formats"
        )
    return suffix[1:]


def save_reference_file(
    path: str | os.PathLike,
    names: Sequence[str],
    summaries: Sequence[Summary],
    *,
    bins: int,
    steps: Sequence[int],
    version: str,
) -> Path:
    """Write a reference (format in the module docstring); returns the path."""
    fmt = _format(path)
    path = Path(path)
    meta = {"schema": _SCHEMA, "kind": REFERENCE_KIND, "shiftwatch": version,
            "bins": int(bins), "steps": [int(s) for s in steps]}
    pairs = list(zip(names, summaries, strict=True))
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(path.name + ".tmp")
        if fmt == "json":
            meta["layers"] = [{"name": n, "summary": s.to_dict()} for n, s in pairs]
            tmp.write_text(json.dumps(meta, allow_nan=False), encoding="utf-8")
        else:
            meta["layers"] = [{"name": n, "channels": s.channels} for n, s in pairs]
            arrays = {"meta": np.array(json.dumps(meta))}
            for i, s in enumerate(summaries):
                arrays[f"table_{i}"] = s.table.cpu().numpy()
                arrays[f"extrema_{i}"] = s.extrema.cpu().numpy()
                if s.hist is not None:
                    arrays[f"hist_{i}"] = s.hist.cpu().numpy()
                    arrays[f"edges_{i}"] = s.edges.cpu().numpy()
            with open(tmp, "wb") as f:
                np.savez(f, **arrays)
        os.replace(tmp, path)
    except OSError as exc:
        raise ConfigError(
            f"cannot write the reference to '{path}' ({exc.strerror or exc}); choose a "
            "writable path"
        ) from None
    return path


def load_reference_file(path: str | os.PathLike) -> tuple[dict, dict[str, Summary]]:
    """Read a reference file: ``(meta, {layer name: Summary})``.

    Raises:
        ConfigError: missing file, wrong extension, not a shiftwatch reference, or
            malformed content (the message names the file and the problem).
    """
    fmt = _format(path)
    where = f"reference file '{os.fspath(path)}'"
    try:
        if fmt == "json":
            meta = json.loads(Path(path).read_text(encoding="utf-8"))
            _check_meta(meta, where)
            out = {}
            for item in meta["layers"]:
                out[str(item["name"])] = Summary.from_dict(item["summary"])
            return meta, out
        with np.load(path, allow_pickle=False) as z:
            meta = json.loads(str(z["meta"]))
            _check_meta(meta, where)
            out = {}
            for i, item in enumerate(meta["layers"]):
                c = int(item["channels"])
                table = torch.from_numpy(np.asarray(z[f"table_{i}"], np.float64).copy())
                if table.ndim != 2 or table.shape[0] != c + 1:
                    raise ConfigError(f"{where}: 'table_{i}' must have {c + 1} rows")
                ext = torch.from_numpy(np.asarray(z[f"extrema_{i}"], np.float64).copy())
                hist = edges = None
                if f"hist_{i}" in z.files:
                    hist = torch.from_numpy(np.asarray(z[f"hist_{i}"], np.float64).copy())
                    edges = torch.from_numpy(np.asarray(z[f"edges_{i}"], np.float64).copy())
                out[str(item["name"])] = Summary(table, ext, hist, edges)
            return meta, out
    except FileNotFoundError:
        raise ConfigError(f"{where} does not exist; pass the path save_reference() wrote") from None
    except ConfigError:
        raise
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise ConfigError(
            f"{where} cannot be read ({type(exc).__name__}: {exc}); it must be a file "
            "written by ShiftMonitor.save_reference()"
        ) from None


def _check_meta(meta: object, where: str) -> None:
    if not isinstance(meta, dict) or meta.get("kind") != REFERENCE_KIND:
        raise ConfigError(f"{where} is not a shiftwatch reference (no kind {REFERENCE_KIND!r})")
    if meta.get("schema") != _SCHEMA:
        raise ConfigError(
            f"{where}: 'schema' must be {_SCHEMA} (got {meta.get('schema')!r}); it was written "
            "by an incompatible shiftwatch version"
        )
    if not isinstance(meta.get("layers"), list) or not isinstance(meta.get("bins"), int):
        raise ConfigError(f"{where}: 'layers' (list) and 'bins' (int) are required")
