"""The one conversion between the generated protobuf messages and this package's values:
plain Python ranges, lists and tables in; dataclasses out."""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Iterable, List, Mapping, Optional, Sequence, Tuple, Union

from .errors import UsageError
from .types import Cancelled, Column, Dataset, Decision, Event, Failed, Finished, Nested, OuterFold, Predictions, Progress, Run, RunState, Score, Scored
from .v1 import pollard_pb2 as pb


@dataclass(frozen=True)
class Span:
    """`start`, `start + step`, ... up to `stop`, inclusive (counted by the server)."""

    start: float
    stop: float
    step: float


@dataclass(frozen=True)
class LogSpan:
    """`count` values from `start` to `stop`, evenly spaced on a log scale."""

    start: float
    stop: float
    count: int


def span(start: float, stop: float, step: float) -> Span:
    """Values from `start` to `stop` inclusive, `step` apart: `span(0, 0.05, 0.01)`."""
    return Span(float(start), float(stop), float(step))


def log_span(start: float, stop: float, count: int) -> LogSpan:
    """`count` values from `start` to `stop` on a log scale: `log_span(1e-4, 1e-2, 3)`."""
    return LogSpan(float(start), float(stop), int(count))


#: What a limit's keyword accepts: a range, a span, a log span, one number, or numbers
#: (None among them: no limit).
Values = Union[range, Span, LogSpan, float, int, Iterable[Optional[float]]]


def _is_number(v: Any) -> bool:
    return isinstance(v, numbers.Real) and not isinstance(v, bool)


def limit_range(field: str, values: Values) -> pb.LimitRange:
    if isinstance(values, Span):
        return pb.LimitRange(span=pb.Span(**{"from": values.start, "to": values.stop, "step": values.step}))
    if isinstance(values, LogSpan):
        return pb.LimitRange(log_span=pb.LogSpan(**{"from": values.start, "to": values.stop, "count": values.count}))
    if isinstance(values, range):
        if len(values) == 0:
            raise UsageError(f"{field}: {values!r} is empty")
        if values.step > 0:
            # Sent as a span, so the server counts it before making it.
            return pb.LimitRange(span=pb.Span(**{"from": float(values[0]), "to": float(values[-1]), "step": float(values.step)}))
        values = sorted(values)
    if values is None or _is_number(values):
        values = [values]
    if isinstance(values, (str, bytes)):
        raise UsageError(f"{field}: give numbers, a range or a span, not text {values!r}")
    out: List[pb.LimitValue] = []
    for v in values:
        if v is None:
            out.append(pb.LimitValue(unlimited=True))
        elif _is_number(v):
            out.append(pb.LimitValue(number=float(v)))
        else:
            raise UsageError(f"{field}: {v!r} is not a number (None means no limit)")
    if not out:
        raise UsageError(f"{field}: no values")
    return pb.LimitRange(values=pb.ValueList(values=out))


LIMITS = ("max_depth", "min_split_rows", "min_leaf_rows", "max_leaves", "min_gain", "prune_alpha")


def _missing(v: Any) -> bool:
    if v is None:
        return True
    if isinstance(v, float) and math.isnan(v):
        return True
    # pandas' NA and NaT (without importing pandas).
    return type(v).__name__ in ("NAType", "NaTType")


def _column(name: str, cells: Sequence[Any]) -> pb.TableColumn:
    present = [v for v in cells if not _missing(v)]
    if all(_is_number(v) for v in present) and present:
        return pb.TableColumn(name=name, numbers=pb.NumberCells(values=[0.0 if _missing(v) else float(v) for v in cells], missing=[_missing(v) for v in cells]))
    return pb.TableColumn(name=name, texts=pb.TextCells(values=["" if _missing(v) else _text(v) for v in cells], missing=[_missing(v) for v in cells]))


def _text(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    return str(v)


def table(rows: Any, what: str) -> pb.Table:
    """A columnar table from a pandas DataFrame, a mapping of column name to cells, or a
    sequence of row mappings. A column whose present cells are all numbers is numeric;
    any other is text (categories). None, NaN and pandas' NA are missing cells."""
    if hasattr(rows, "columns") and hasattr(rows, "__getitem__") and hasattr(rows, "to_dict"):
        columns = {str(c): rows[c].tolist() for c in rows.columns}
    elif isinstance(rows, Mapping):
        columns = {str(k): list(v) for k, v in rows.items()}
    elif isinstance(rows, Sequence) and not isinstance(rows, (str, bytes)) and all(isinstance(r, Mapping) for r in rows):
        names: List[str] = []
        for r in rows:
            names.extend(str(k) for k in r if str(k) not in names)
        columns = {n: [r.get(n) for r in rows] for n in names}
    else:
        raise UsageError(f"{what}: give a pandas DataFrame, a mapping of column name to cells, or a list of row mappings (got {type(rows).__name__})")
    if not columns:
        raise UsageError(f"{what}: the table has no columns")
    lengths = {len(c) for c in columns.values()}
    if len(lengths) != 1:
        raise UsageError(f"{what}: columns differ in length ({', '.join(f'{n}: {len(c)}' for n, c in columns.items())})")
    return pb.Table(columns=[_column(n, c) for n, c in columns.items()])


def _time(text: str) -> Optional[datetime]:
    if not text:
        return None
    return datetime.fromisoformat(text.replace("Z", "+00:00"))


_KINDS = {0: "unspecified", 1: "numeric", 2: "categorical"}


def dataset(d: pb.DatasetInfo) -> Dataset:
    return Dataset(
        id=d.id,
        name=d.name,
        version=d.version,
        rows=d.rows,
        columns=tuple(Column(c.name, _KINDS.get(c.kind, str(c.kind)), c.missing, c.levels) for c in d.columns),
        target=d.target,
        task=d.task,
        bytes=d.bytes,
        sha256=d.sha256,
        created_at=_time(d.created_at),
        unchanged=d.unchanged,
    )


def score(s: pb.SettingScore) -> Score:
    lim = s.limits
    return Score(
        index=s.index,
        criterion=lim.criterion,
        class_weight=lim.class_weight,
        max_depth=lim.max_depth if lim.HasField("max_depth") else None,
        min_split_rows=lim.min_split_rows,
        min_leaf_rows=lim.min_leaf_rows,
        max_leaves=lim.max_leaves if lim.HasField("max_leaves") else None,
        min_gain=lim.min_gain,
        prune_alpha=lim.prune_alpha,
        valid_mean=s.valid_mean,
        valid_sd=s.valid_sd,
        train_mean=s.train_mean,
        gap=s.gap,
        mean_leaves=s.mean_leaves,
        mean_depth=s.mean_depth,
        fold_scores=tuple(s.fold_scores),
    )


_STATES = {pb.RUN_STATE_QUEUED: RunState.QUEUED, pb.RUN_STATE_RUNNING: RunState.RUNNING, pb.RUN_STATE_FINISHED: RunState.FINISHED, pb.RUN_STATE_FAILED: RunState.FAILED, pb.RUN_STATE_CANCELLED: RunState.CANCELLED}


def run_state_pb(state: Union[RunState, str]) -> int:
    state = RunState(state) if isinstance(state, str) else state
    return next(k for k, v in _STATES.items() if v is state)


_DIRECTIONS = {
    "increasing": pb.MONOTONE_DIRECTION_INCREASING,
    "decreasing": pb.MONOTONE_DIRECTION_DECREASING,
    "free": pb.MONOTONE_DIRECTION_FREE,
}


def monotone_direction_pb(direction: str) -> int:
    """A monotone limit's direction by name, as the contract numbers it."""
    if direction not in _DIRECTIONS:
        raise UsageError(f"monotone direction {direction!r} is not one of {', '.join(_DIRECTIONS)}")
    return _DIRECTIONS[direction]


def run(r: pb.RunInfo) -> Run:
    if r.state not in _STATES:
        raise UsageError(f"run {r.id}: unknown state number {r.state} (a newer server? upgrade pollard-client)")
    return Run(
        id=r.id,
        state=_STATES[r.state],
        dataset_id=r.dataset_id,
        dataset_name=r.dataset_name,
        dataset_version=r.dataset_version,
        metric=r.metric,
        settings=r.settings,
        units_done=r.units_done,
        units_total=r.units_total,
        created_at=_time(r.created_at),
        started_at=_time(r.started_at),
        finished_at=_time(r.finished_at),
        reason=r.reason,
        labels=dict(r.labels),
        scores=tuple(score(s) for s in r.scores),
        picked=r.picked if r.HasField("picked") else None,
        best=r.best if r.HasField("best") else None,
        owner=r.owner,
        pareto_front=tuple(r.pareto_front),
        nested=_nested(r.nested) if r.HasField("nested") else None,
        decision=_decision(r.model.decision) if r.HasField("model") and r.model.HasField("decision") else None,
    )


def _nested(n: pb.NestedEstimate) -> Nested:
    folds = tuple(OuterFold(f.repeat, f.fold, f.picked, f.inner_best, f.inner_picked, f.outer_score, f.leaves) for f in n.folds)
    return Nested(n.outer_mean, n.outer_sd, n.optimism, folds)


def _decision(d: Any) -> Decision:
    return Decision(d.threshold, d.costs.false_alarm, d.costs.miss)


def event(e: pb.RunEvent) -> Optional[Event]:
    """Our event for a wire event; None for a kind this client does not know."""
    kind = e.WhichOneof("kind")
    n = e.sequence
    if kind == "progress":
        p = e.progress
        return Progress(n, p.units_done, p.units_total, p.scores_done, p.scores_total)
    if kind == "scored":
        return Scored(n, score(e.scored))
    if kind == "finished":
        return Finished(n, e.finished.picked, e.finished.best)
    if kind == "failed":
        return Failed(n, e.failed)
    if kind == "cancelled":
        return Cancelled(n, e.cancelled)
    return None


def predictions(r: pb.PredictReply) -> Predictions:
    k = len(r.classes)
    probs: Tuple[Tuple[float, ...], ...] = ()
    if k:
        flat = list(r.probabilities)
        probs = tuple(tuple(flat[i : i + k]) for i in range(0, len(flat), k))
    return Predictions(predicted=tuple(r.predicted), classes=tuple(r.classes), probabilities=probs, values=tuple(r.values))
