"""ShiftMonitor: capture -> reduce -> compare -> judge -> emit, once per sampled step.

Three lines in a training loop::

    monitor = ShiftMonitor(model, log_dir="runs/exp1", every_n_steps=50)
    for x, y in loader:
        ...; opt.step(); opt.zero_grad()
        monitor.step()                    # once per optimizer step
        if monitor.should_stop: break
    monitor.close()                       # or: with ShiftMonitor(...) as monitor:

Schedule: steps are numbered from 0 (``step()`` counts its calls unless the caller passes
``global_step``); step ``s`` is *sampled* when ``s >= warmup_steps`` and
``(s - warmup_steps) % every_n_steps == 0``.  The hooks are armed right after the
``step()`` call that precedes a sampled step, so that step's forwards are summarised and the
next ``step()`` call processes them.

Per sampled step and phase (``"train"``, ``"val"`` for eval-mode forwards): every layer's
summary is packed into one flat tensor, passed through :meth:`ShiftMonitor._reduce` (the one
seam for merging across processes; identity unless a ``reducer`` is given), moved to the
host in one transfer, compared with the previous sample of the phase and with the
reference (a ``"val"`` sample also with the latest training sample: ``vs_train``, the
train/eval mismatch plus the sampling difference of the two batches; README, event-log
schema), judged by the rules and written to the event log, TensorBoard and ``logging``.

Under ``torch.distributed`` (issue 4; :mod:`shiftwatch.distributed`): when no ``reducer`` is
given and a process group of more than one rank is initialised, every sampled step merges
all ranks' summaries of both phases with one collective before any metric is computed, so
all ranks compute the same numbers and take the same decisions; histogram edges come from
rank 0; only global rank 0 writes files and log lines.  Every rank must call ``step()``
with the same step numbers (and ``observe()`` together).

The reference pools the first ``reference_steps`` sampled training steps (exact merge), or
comes from ``reference=path``.  Histogram edges of each layer are fixed from its first
sample (``mean +- 4 std`` clipped to ``[min, max]``), so the first sample has no histogram.
"""

from __future__ import annotations

import logging
import os
import warnings
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import Tensor, nn

from . import __version__
from .capture import PHASES, Capture
from .compare import Layout, compare_all, edges_from_sample, layer_stats, merge_flats, observation
from .distributed import PackLayout, SummaryReducer, rank_and_world
from .errors import ConfigError, ShiftAlertError, ShiftWatchWarning
from .judge import Alert, Judge, Observation, with_action
from .outputs import TensorBoardOutput, step_record
from .reference import Reference, load_reference_file, save_reference_file
from .rules import Rule, default_rules, load_rules
from .sinks.eventlog import EventLog
from .summary import Summary

__all__ = ["Decision", "ShiftMonitor"]

logger = logging.getLogger("shiftwatch")
ON_ALERT = ("record", "stop", "raise")
_STATE_FORMAT = "shiftwatch.ShiftMonitor"
_STATE_VERSION = 1


@dataclass(frozen=True)
class Decision:
    """What a sampled step calls for: its alerts (with the action taken), whether training
    should stop, and the alert to raise (``on_alert="raise"``), if any."""

    alerts: tuple[Alert, ...]
    stop: bool
    raise_alert: Alert | None


def decide(alerts: Sequence[Alert], on_alert: str) -> Decision:
    """Pure: map alerts to actions.  Failing alerts stop or raise per ``on_alert``;
    warnings are recorded."""
    out = [with_action(a, on_alert if a.severity == "fail" else "record") for a in alerts]
    fails = [a for a in out if a.severity == "fail"]
    return Decision(
        tuple(out),
        stop=bool(fails) and on_alert in ("stop", "raise"),
        raise_alert=fails[0] if fails and on_alert == "raise" else None,
    )


def _pos_int(name: str, value: Any, low: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise ConfigError(f"'{name}' must be an integer >= {low} (got {value!r})")
    return value


class ShiftMonitor:
    """Watch the input distributions of a model's layers during training.

    Args:
        model: the model.
        log_dir: directory for ``events.jsonl`` and the TensorBoard event files;
            ``None`` writes no files (alerts and results stay in memory and ``logging``).
        every_n_steps: sample every N optimizer steps.
        warmup_steps: steps before the first sample.
        reference_steps: sampled training steps pooled into the reference.
        layers, exclude, types, outputs: what to watch (see :mod:`shiftwatch.capture`).
        rules: ``None`` (the built-in :func:`~shiftwatch.rules.default_rules`), a list of
            :class:`~shiftwatch.rules.Rule`, or the path of a TOML rules file.
        on_alert: what a failing alert does: ``"record"`` (log only), ``"stop"`` (set
            :attr:`should_stop`) or ``"raise"`` (raise :class:`ShiftAlertError`).
        reference: path of a reference saved with :meth:`save_reference` (``.json`` or
            ``.npz``) to compare with instead of pooling one.
        bins: histogram bins per layer (default 64; taken from ``reference`` if given).
        max_hist_values: values per layer and call that go into histograms (device-side
            strided subsample); moments always use every value.
        check_finite_every_step: also count NaN/inf in the watched inputs on unsampled
            steps (one extra pass over each input, one host sync per step).
        tensorboard: ``None``: write TensorBoard events when ``log_dir`` is set and
            TensorBoard is installed; ``True``: require it; ``False``: never; or a
            ``SummaryWriter`` to share.
        reducer: ``reducer(flat, layout) -> flat`` merging the packed summaries across
            processes before the host transfer (see :meth:`_reduce`); ``None``: a
            :class:`~shiftwatch.distributed.SummaryReducer`, which merges across the ranks
            of ``torch.distributed`` when it is initialised and is the identity otherwise.

    Raises:
        ConfigError: a bad option (named in the message), a pattern that matches no
            module, or a ``log_dir`` that cannot be written.
    """

    def __init__(
        self,
        model: nn.Module,
        log_dir: str | os.PathLike | None = None,
        *,
        every_n_steps: int = 50,
        warmup_steps: int = 0,
        reference_steps: int = 5,
        layers: str | Iterable[str] | None = None,
        exclude: str | Iterable[str] | None = None,
        types: Sequence[type | str] | None = None,
        outputs: bool = False,
        rules: Sequence[Rule] | str | os.PathLike | None = None,
        on_alert: str = "record",
        reference: str | os.PathLike | None = None,
        bins: int | None = None,
        max_hist_values: int | None = 16384,
        check_finite_every_step: bool = False,
        tensorboard: Any = None,
        reducer: Callable[[Tensor, Layout], Tensor] | None = None,
    ) -> None:
        if log_dir is not None and not isinstance(log_dir, (str, os.PathLike)):
            raise ConfigError(
                f"'log_dir' must be a directory path or None (got {type(log_dir).__name__})"
            )
        self.every_n_steps = _pos_int("every_n_steps", every_n_steps)
        self.warmup_steps = _pos_int("warmup_steps", warmup_steps, 0)
        self.reference_steps = _pos_int("reference_steps", reference_steps)
        if on_alert not in ON_ALERT:
            raise ConfigError(
                f"'on_alert' must be one of {', '.join(map(repr, ON_ALERT))} (got {on_alert!r})"
            )
        self.on_alert = on_alert
        if bins is not None:
            _pos_int("bins", bins, 2)
        if not isinstance(check_finite_every_step, bool):
            raise ConfigError(
                f"'check_finite_every_step' must be True or False (got {check_finite_every_step!r})"
            )
        if reducer is not None and not callable(reducer):
            raise ConfigError(f"'reducer' must be callable or None (got {reducer!r})")
        # distributed (issue 4): the default reducer merges across ranks when a process
        # group is initialised and costs one is_initialized() check otherwise
        self.reducer = SummaryReducer() if reducer is None else reducer
        self._rank = rank_and_world()[0]  # only rank 0 writes files and log lines
        if rules is None:
            rule_list = default_rules()
        elif isinstance(rules, (str, os.PathLike)):
            rule_list = load_rules(rules)
        else:
            rule_list = list(rules)
        self._judge = Judge(rule_list)
        ref_meta, ref_layers = (None, None) if reference is None else load_reference_file(reference)
        if ref_meta is not None:
            if bins is not None and bins != ref_meta["bins"]:
                raise ConfigError(
                    f"'bins' must match the reference file's {ref_meta['bins']} (got {bins}); "
                    "leave bins unset to take it from the file"
                )
            bins = ref_meta["bins"]
        self.bins = 64 if bins is None else bins
        self._capture = Capture(model, layers=layers, exclude=exclude, types=types,
                                outputs=outputs, max_hist_values=max_hist_values)
        try:
            self._judge.bind([t.name for t in self._capture.taps])
            self._settings = {
                "every_n_steps": self.every_n_steps, "warmup_steps": self.warmup_steps,
                "reference_steps": self.reference_steps, "bins": self.bins,
                "max_hist_values": max_hist_values, "on_alert": on_alert,
                "outputs": outputs, "check_finite_every_step": check_finite_every_step,
                "reference": None if reference is None else os.fspath(reference),
            }
            self._init_state(reference, ref_layers)
            self.log_dir = None if log_dir is None else Path(log_dir)
            writes = self._rank == 0  # distributed (issue 4): other ranks write nothing
            self._events = None if log_dir is None or not writes else _open_event_log(
                self.log_dir)
            self._tb = self._open_tensorboard(tensorboard) if writes else None
        except BaseException:
            self._capture.close()
            raise
        self._capture.check_finite = check_finite_every_step
        self._write({"kind": "run", "shiftwatch": __version__, "settings": self._settings,
                     "layers": [{"name": t.name, "type": t._module_type, "channels": t.channels}
                                for t in self._capture.taps],
                     "rules": [r.to_dict() for r in self._judge.rules]})
        if self._ref.ready:
            self._write_reference_record(None)
        self._schedule(self._step)

    # ------------------------------------------------------------------ setup
    def _init_state(self, reference, ref_layers: dict[str, Summary] | None) -> None:
        self._step = 0
        self._samples = {p: 0 for p in PHASES}
        self._prev: dict[str, np.ndarray] = {}
        self._prev_step: dict[str, int] = {}  # step of each phase's previous sample
        self._ref = Reference(target=self.reference_steps)
        self._layout: Layout | None = None
        self._ranges: np.ndarray | None = None
        self._entry: list[str] | None = None
        self.alerts: list[Alert] = []
        self.should_stop = False
        self.stop_reason: str | None = None
        self._closed = False
        if ref_layers is not None:
            self._adopt_reference(reference, ref_layers)
        elif all(t.channels is not None for t in self._capture.taps):
            self._make_layout()

    def _adopt_reference(self, path, ref_layers: dict[str, Summary]) -> None:
        where = f"reference file '{os.fspath(path)}'"
        taps = self._capture.taps
        missing = [t.name for t in taps if t.name not in ref_layers]
        if missing:
            raise ConfigError(
                f"{where} has no summary for watched layer(s) {', '.join(missing)}; save a "
                "reference from a run that watches the same layers, or exclude them"
            )
        extra = [n for n in ref_layers if n not in {t.name for t in taps}]
        if extra:
            warnings.warn(f"{where}: layers {', '.join(extra)} are not watched and are ignored",
                          ShiftWatchWarning, stacklevel=4)
        for t in taps:
            c = ref_layers[t.name].channels
            if t.channels is not None and t.channels != c:
                raise ConfigError(
                    f"{where}: layer {t.name!r} has {c} channels there but {t.channels} here; "
                    "the reference belongs to another model"
                )
            t.channels = c
        self._make_layout()
        summaries = [ref_layers[t.name] for t in taps]
        for i, s in enumerate(summaries):
            if s.edges is not None:
                e = s.edges.double()
                if e.numel() != self.bins + 1:
                    raise ConfigError(
                        f"{where}: layer {taps[i].name!r} edges must have bins + 1 values"
                    )
                self._set_edges(i, float(e[0]), float(e[-1]), e)
        flat = self._layout.pack(summaries, torch.device("cpu")).numpy().copy()
        self._ref = Reference(target=self.reference_steps, flat=flat, source="file",
                              path=os.fspath(path))
        self._ref.steps = []

    def _make_layout(self) -> None:
        taps = self._capture.taps
        self._layout = Layout(tuple(t.name for t in taps), tuple(t.channels for t in taps),
                              self.bins)
        self._ranges = np.full((len(taps), 2), np.nan)

    def _open_tensorboard(self, option: Any):
        if option is False or (option is None and self.log_dir is None):
            return None
        from .sinks.tensorboard import TensorBoardSink

        if option is None or option is True:
            if self.log_dir is None:
                raise ConfigError("'tensorboard=True' needs a 'log_dir'; pass log_dir=...")
            try:
                return TensorBoardOutput(TensorBoardSink(self.log_dir))
            except ImportError:
                if option is True:
                    raise
                logger.info("shiftwatch: TensorBoard is not installed; writing events.jsonl only "
                            "(pip install shiftwatch[tensorboard] to get TensorBoard logs)")
                return None
        return TensorBoardOutput(TensorBoardSink(writer=option))

    # ------------------------------------------------------------------ schedule
    def is_sampled(self, step: int) -> bool:
        """Whether optimizer step ``step`` (0-based) is sampled."""
        s = step - self.warmup_steps
        return s >= 0 and s % self.every_n_steps == 0

    def _schedule(self, step: int) -> None:
        if self._closed:
            return
        if self.is_sampled(step):
            self._capture.arm()
        else:
            self._capture.disarm()

    def arm(self, phase: str | None = None) -> None:
        """Summarise the coming forwards (``phase`` forces their label; ``None`` labels by
        ``module.training``).  For callers that drive sampling themselves, e.g. a
        validation loop: ``arm("val")``, run batches, then :meth:`observe`."""
        self._check_open()
        self._capture.arm(phase)

    def disarm(self) -> None:
        """Stop summarising until the schedule (or :meth:`arm`) arms again."""
        self._capture.disarm()

    @property
    def global_step(self) -> int:
        """The step the monitor is waiting for (number of ``step()`` calls so far, or
        one past the last ``global_step`` passed)."""
        return self._step

    @property
    def layers(self) -> list[str]:
        """Names of the watched layers (``":out"`` marks outputs)."""
        return [t.name for t in self._capture.taps]

    @property
    def layout(self) -> Layout | None:
        """Order and sizes of the packed flat tensor (``None`` until known)."""
        return self._layout

    @property
    def entry_layers(self) -> list[str] | None:
        """The layers fed by the model's input, known after the first training sample."""
        return None if self._entry is None else list(self._entry)

    @property
    def reference_ready(self) -> bool:
        return self._ref.ready

    # ------------------------------------------------------------------ the loop
    def step(self, global_step: int | None = None) -> list[Alert]:
        """Call once per optimizer step, after it.  Processes what the hooks captured
        during this step (when it was sampled) and arms them for the next sampled step.

        Args:
            global_step: the 0-based number of the step that just finished; default: the
                number of earlier ``step()`` calls (plus any offset set by earlier
                ``global_step`` values).

        Returns:
            The alerts raised by this step (also appended to :attr:`alerts`).

        Raises:
            ShiftAlertError: a failing alert with ``on_alert="raise"``.
        """
        self._check_open()
        s = self._step if global_step is None else _pos_int("global_step", global_step, 0)
        self._step = s + 1
        try:
            # distributed (issue 4): observe() is a collective, so every rank calls it at
            # every sampled step, whatever this rank captured
            due = self.is_sampled(s) if self._all_ranks() else self._capture.phases()
            new = self.observe(s) if due else []
            if self._capture.check_finite:
                new += self._check_finite(s)
        finally:
            self._schedule(self._step)
        return new

    def observe(self, step: int | None = None) -> list[Alert]:
        """Reduce, compare, judge and emit whatever the armed hooks captured since the
        last call, one record per phase.  ``step()`` calls this on sampled steps; call it
        yourself after :meth:`arm` (e.g. at the end of a validation loop)."""
        self._check_open()
        step = self._step if step is None else _pos_int("step", step, 0)
        if self._all_ranks():
            return self._observe_all_ranks(step)
        new: list[Alert] = []
        for phase in self._capture.phases():
            summaries = self._capture.take(phase)
            if self._layout is None:
                self._learn_layout(summaries)  # may drop taps (and their summaries)
            flat = self._to_host(self._reduce(self._pack(summaries)))
            obs, record, scored = self._analyse(phase, step, flat)
            decision = self.judge(obs)
            self._emit(phase, step, flat, record, scored, decision)
            new += self._apply(decision)
        return new

    # ------------------------------------------------------------------ distributed (issue 4)
    def _all_ranks(self) -> bool:
        """Whether summaries are merged across torch.distributed ranks (default reducer,
        initialised process group of more than one rank)."""
        return isinstance(self.reducer, SummaryReducer) and self.reducer.active

    def _observe_all_ranks(self, step: int) -> list[Alert]:
        """:meth:`observe` across ranks: both phases are packed (a phase this rank did not
        see as placeholders) and merged in one collective, so every rank makes the same
        call whatever it captured; a phase no rank saw is skipped on every rank."""
        if self._layout is None:
            self._learn_layout([None] * len(self._capture.taps))  # may drop taps
        lay = self._layout
        taken = {p: self._capture.take(p) for p in PHASES}
        device = next((s.device for p in PHASES for s in taken[p] if s is not None),
                      torch.device("cpu"))
        both = torch.cat([lay.pack(taken[p], device) for p in PHASES])
        twice = PackLayout(tuple(lay.channels) * len(PHASES), lay.hist_sizes * len(PHASES))
        host = self._to_host(self.reducer(both, twice))
        new: list[Alert] = []
        for k, phase in enumerate(PHASES):
            flat = host[k * lay.size:(k + 1) * lay.size].copy()
            stats = layer_stats(lay.split(flat), lay)
            if not (stats["count"].any() or stats["nonfinite"].any()):
                continue
            obs, record, scored = self._analyse(phase, step, flat)
            decision = self.judge(obs)
            self._emit(phase, step, flat, record, scored, decision)
            new += self._apply(decision)
        return new

    def _pack(self, summaries: list[Summary | None]) -> Tensor:
        device = next((s.device for s in summaries if s is not None), torch.device("cpu"))
        return self._layout.pack(summaries, device)

    def _reduce(self, flat: Tensor) -> Tensor:
        """The seam where the packed summaries of all layers are merged across processes
        (before the single host transfer).  Identity without a ``reducer``; with one,
        ``reducer(flat, self.layout)`` must return a flat of the same layout."""
        if self.reducer is None:
            return flat
        return self.reducer(flat, self._layout)

    @staticmethod
    def _to_host(flat: Tensor) -> np.ndarray:
        return flat.detach().to("cpu", torch.float64).numpy()

    def _learn_layout(self, summaries: list[Summary | None]) -> None:
        taps = self._capture.taps
        unknown = [t.name for t in taps if t.channels is None]
        if unknown:
            warnings.warn(
                f"shiftwatch: layer(s) {', '.join(unknown)} did not run during the first "
                "sampled step, so their channel count is unknown; they are not watched",
                ShiftWatchWarning, stacklevel=4)
            keep = [s for t, s in zip(taps, summaries, strict=True) if t.channels is not None]
            self._capture.drop(unknown)
            summaries[:] = keep
            self._judge.bind(self.layers, self._entry)
        self._make_layout()

    def _check_finite(self, step: int) -> list[Alert]:
        counts = self._capture.take_finite()
        everywhere = self._all_ranks()  # distributed (issue 4): a collective on every rank
        if self._layout is None or (all(c is None for c in counts) and not everywhere):
            return []
        dev = next((c.device for c in counts if c is not None), torch.device("cpu"))
        zero = torch.zeros((), dtype=torch.int64, device=dev)
        table = torch.stack([torch.stack([zero if c is None else c.to(dev) for c in counts]),
                             torch.tensor([c is not None for c in counts], device=dev).long()])
        if everywhere:  # rank-local counts would let ranks decide differently
            table = self.reducer.sum(table)
        vals, seen = table.tolist()  # 1 sync
        if not any(vals):
            return []
        nf = np.asarray(vals, float)
        obs = Observation(step=step, phase="train", layers=self._layout.names,
                          present=np.array(seen) > 0, nonfinite=nf)
        decision = self.judge(obs)
        for a in decision.alerts:
            self._write(a.to_record())
        return self._apply(decision)

    # ------------------------------------------------------------------ compare
    def _analyse(
        self, phase: str, step: int, flat: np.ndarray
    ) -> tuple[Observation, dict, tuple]:
        """Score one host sample and update the state; returns the observation for the
        rules, the event-log record and ``(stats, results)`` for the TensorBoard writes."""
        lay = self._layout
        cur = lay.split(flat)
        stats = layer_stats(cur, lay)
        if phase == "train" and self._entry is None:
            self._entry = self._capture.entry_names()
            self._capture.stop_entry_detection()
            self._judge.bind(lay.names, self._entry)
        ref = lay.split(self._ref.flat) if self._ref.flat is not None else None
        others = {}
        if phase in self._prev:
            others["previous"] = lay.split(self._prev[phase])
        if self._ref.ready:
            others["reference"] = ref
        if phase == "val" and "train" in self._prev:
            # train/eval mismatch: an eval-mode sample against the latest training sample
            # (of this step when both were captured: PHASES puts train first)
            others["train"] = lay.split(self._prev["train"])
        results = {}
        if others:
            scored = compare_all(cur, list(others.values()), lay, self._ranges, pool=ref)
            results = dict(zip(others, scored, strict=True))
        obs = observation(step, phase, lay, stats, results)
        record = step_record(lay.names, phase, step, stats, results,
                             train_step=self._prev_step.get("train"))
        # state updates: previous sample, reference pooling, histogram edges
        self._prev[phase] = flat
        self._prev_step[phase] = step
        self._samples[phase] += 1
        if phase == "train":
            if not self._ref.ready and self._ref.source == "pooled":
                self._ref.flat = flat.copy() if self._ref.flat is None else merge_flats(
                    self._ref.flat, flat, lay)
                self._ref.steps.append(step)
                if self._ref.ready:
                    self._write_reference_record(step)
            need = np.isnan(self._ranges[:, 0]) & (stats["count"] > 0)
            if need.any():
                lo, hi = edges_from_sample(stats)
                if self._all_ranks():  # distributed (issue 4): every rank uses rank 0's edges
                    lo, hi = self.reducer.broadcast(torch.from_numpy(np.stack([lo, hi]))).numpy()
                for i in np.flatnonzero(need).tolist():
                    self._set_edges(i, float(lo[i]), float(hi[i]))
        return obs, record, (stats, results)

    def _set_edges(self, i: int, lo: float, hi: float, edges: Tensor | None = None) -> None:
        tap = self._capture.taps[i]
        if edges is None:
            edges = torch.linspace(lo, hi, self.bins + 1, dtype=torch.float64)
        self._ranges[i] = (lo, hi)
        tap.edges = edges

    # ------------------------------------------------------------------ judge / effect
    def judge(self, obs: Observation) -> Decision:
        """Decide: the alerts of ``obs`` and what they call for.  Advances the rules'
        patience/cooldown counters; applies nothing (see :meth:`_apply`)."""
        return decide(self._judge.evaluate(obs), self.on_alert)

    def _apply(self, decision: Decision) -> list[Alert]:
        """Effect of a decision: record, log, set :attr:`should_stop`, raise."""
        for a in decision.alerts:
            self.alerts.append(a)
            if self._rank == 0:  # distributed (issue 4): one log line per alert, not per rank
                logger.log(logging.ERROR if a.severity == "fail" else logging.WARNING,
                           "%s", a.message)
        if decision.stop and not self.should_stop:
            self.should_stop = True
            first = next(a for a in decision.alerts if a.severity == "fail")
            self.stop_reason = first.message
        if decision.raise_alert is not None:
            a = decision.raise_alert
            raise ShiftAlertError(
                f"shiftwatch stopped the run: {a.message}", step=a.step, layer=a.layer,
                metric=a.metric, value=a.value, threshold=a.threshold, alert=a,
            )
        return list(decision.alerts)

    # ------------------------------------------------------------------ emit
    def _write(self, record: Mapping[str, Any]) -> None:
        if self._events is not None:
            self._events.write(record)

    def _write_reference_record(self, step: int | None) -> None:
        self._write({"kind": "reference", "step": step, "source": self._ref.source,
                     "steps": list(self._ref.steps), "path": self._ref.path,
                     "entry": self._entry})

    def _emit(self, phase, step, flat, record, scored, decision: Decision) -> None:
        self._write(record)
        for a in decision.alerts:
            self._write(a.to_record())
        if self._tb is not None:
            stats, results = scored
            self._tb.write(phase, step, self._layout, [t.edges for t in self._capture.taps],
                           flat, stats, results, decision.alerts)

    # ------------------------------------------------------------------ reference file
    def save_reference(self, path: str | os.PathLike) -> Path:
        """Save the current reference (``.json`` or ``.npz``; never pickle) so another run
        can compare with it via ``reference=path``.

        Raises:
            ConfigError: the reference is not ready yet, or the path is not writable.
        """
        if not self._ref.ready:
            got = len(self._ref.steps)
            raise ConfigError(
                f"the reference is not ready yet ({got} of {self.reference_steps} sampled "
                "steps pooled); call save_reference() once reference_ready is True"
            )
        edges = [t.edges for t in self._capture.taps]
        summaries = self._layout.unpack(self._ref.flat, edges)
        return save_reference_file(path, self._layout.names, summaries, bins=self.bins,
                                   steps=self._ref.steps, version=__version__)

    # ------------------------------------------------------------------ state
    def state_dict(self) -> dict[str, Any]:
        """Everything a resumed run needs, as tensors and plain Python values (loads
        with ``torch.load(..., weights_only=True)``)."""
        def t(a):
            return None if a is None else torch.from_numpy(np.array(a, np.float64))

        lay = self._layout
        return {
            "format": _STATE_FORMAT, "version": _STATE_VERSION,
            "step": self._step, "samples": dict(self._samples),
            "should_stop": self.should_stop, "stop_reason": self.stop_reason,
            "layers": None if lay is None else list(lay.names),
            "channels": None if lay is None else list(lay.channels),
            "bins": self.bins,
            "ranges": None if self._ranges is None else self._ranges.tolist(),
            "entry": self._entry,
            "previous": {p: t(f) for p, f in self._prev.items()},
            "previous_steps": dict(self._prev_step),
            "reference": {"flat": t(self._ref.flat), "steps": list(self._ref.steps),
                          "source": self._ref.source, "path": self._ref.path},
            "judge": self._judge.state_dict(),
            "alerts": [a.to_record() for a in self.alerts],
            "settings": dict(self._settings),
        }

    def load_state_dict(self, state: Mapping[str, Any]) -> None:
        """Restore :meth:`state_dict` output; the watched layers must be the same."""
        if not isinstance(state, Mapping) or state.get("format") != _STATE_FORMAT:
            raise ConfigError("'state' must be a ShiftMonitor.state_dict() (no 'format' key)")
        if state.get("version", 0) > _STATE_VERSION:
            raise ConfigError(f"'state' version {state['version']} is newer than this shiftwatch")
        if state["layers"] is not None:
            if list(state["layers"]) != self.layers or state["bins"] != self.bins:
                raise ConfigError(
                    "'state' was saved for other layers or bins "
                    f"({state['layers']}, bins={state['bins']}); watch the same layers "
                    f"({self.layers}, bins={self.bins}) to resume"
                )
            for tap, c in zip(self._capture.taps, state["channels"], strict=True):
                tap.channels = int(c)
            self._make_layout()
            for i, (lo, hi) in enumerate(state["ranges"]):
                if lo == lo:
                    self._set_edges(i, lo, hi)
        changed = [k for k, v in state.get("settings", {}).items() if self._settings.get(k) != v]
        if changed:
            warnings.warn(f"shiftwatch: resuming with changed settings {', '.join(changed)}",
                          ShiftWatchWarning, stacklevel=2)
        def arr(x):
            return None if x is None else x.detach().cpu().double().numpy().copy()

        self._step = int(state["step"])
        self._samples = {p: int(state["samples"].get(p, 0)) for p in PHASES}
        self.should_stop, self.stop_reason = bool(state["should_stop"]), state["stop_reason"]
        self._entry = None if state["entry"] is None else list(state["entry"])
        if self._entry is not None:
            self._capture.stop_entry_detection()
        self._prev = {p: arr(f) for p, f in state["previous"].items()}
        # states saved before vs_train existed lack the steps: train_step then reads null
        self._prev_step = {p: int(v) for p, v in state.get("previous_steps", {}).items()}
        r = state["reference"]
        if self._ref.source != "file":
            self._ref = Reference(target=self.reference_steps, flat=arr(r["flat"]),
                                  steps=list(r["steps"]), source=r["source"], path=r["path"])
        self._judge.bind(self.layers, self._entry)
        self._judge.load_state_dict(state["judge"])
        self.alerts = [_alert_from_record(a) for a in state["alerts"]]
        self._schedule(self._step)

    # ------------------------------------------------------------------ lifecycle
    def _check_open(self) -> None:
        if self._closed:
            raise RuntimeError("the monitor is closed; create a new ShiftMonitor to keep watching")

    @property
    def closed(self) -> bool:
        return self._closed

    def close(self, *, reason: str | None = None) -> None:
        """Remove the hooks, write the ``end`` record and close the sinks.  Safe twice."""
        if self._closed:
            return
        self._closed = True
        self._capture.close()
        counts = {"warn": 0, "fail": 0}
        for a in self.alerts:
            counts[a.severity] += 1
        self._write({"kind": "end", "step": self._step, "stopped": self.should_stop,
                     "reason": reason or self.stop_reason or "closed", "alerts": counts})
        if self._tb is not None:
            self._tb.close()
        if self._events is not None:
            self._events.close()

    def __enter__(self) -> ShiftMonitor:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        reason = None if exc is None else f"{exc_type.__name__}: {exc}"
        self.close(reason=reason)

    def __repr__(self) -> str:
        state = "closed" if self._closed else f"step {self._step}"
        return (f"ShiftMonitor({len(self.layers)} layers, every_n_steps={self.every_n_steps}, "
                f"{state}, {len(self.alerts)} alerts)")


def _open_event_log(log_dir: Path) -> EventLog:
    try:
        return EventLog(log_dir / "events.jsonl")
    except ConfigError as exc:
        cause = exc.__cause__
        why = f"{type(cause).__name__}: {cause.strerror or cause}" if isinstance(
            cause, OSError) else str(exc)
        raise ConfigError(
            f"'log_dir' must be a directory this process can create and write (got "
            f"'{log_dir.absolute()}': {why}); pass another log_dir, or log_dir=None to "
            "write no files"
        ) from exc


def _alert_from_record(rec: Mapping[str, Any]) -> Alert:
    keys = Alert.__dataclass_fields__
    return Alert(**{k: rec[k] for k in keys if k in rec})
