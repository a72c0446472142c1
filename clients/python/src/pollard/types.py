"""The values the client hands back: plain frozen dataclasses and enums, converted from the
protobuf messages in one place (`_convert.py`), so callers never need the generated code."""

from __future__ import annotations

import enum
from dataclasses import asdict, dataclass, field
from datetime import datetime
from typing import Any, Dict, Optional, Tuple, Union


class RunState(enum.Enum):
    QUEUED = "queued"
    RUNNING = "running"
    FINISHED = "finished"
    FAILED = "failed"
    CANCELLED = "cancelled"

    @property
    def ended(self) -> bool:
        """Whether the run will change no more."""
        return self in (RunState.FINISHED, RunState.FAILED, RunState.CANCELLED)


class ModelFormat(enum.Enum):
    """The files a finished run's model can be fetched as."""

    #: The versioned JSON model file (text).
    JSON = "json"
    #: Graphviz DOT (text).
    DOT = "dot"
    #: One line per node (text).
    TEXT = "text"
    #: An ONNX ModelProto (bytes).
    ONNX = "onnx"


@dataclass(frozen=True)
class Column:
    name: str
    #: "numeric" or "categorical".
    kind: str
    missing: int
    #: Distinct categories of a categorical column.
    levels: int


@dataclass(frozen=True)
class Dataset:
    id: str
    name: str
    version: int
    rows: int
    columns: Tuple[Column, ...]
    target: str
    #: "classify", "regress", or "" when no target was named.
    task: str
    bytes: int
    sha256: str
    created_at: Optional[datetime]
    #: True when an upload stored nothing: the newest version already had these bytes.
    unchanged: bool = False


@dataclass(frozen=True)
class Score:
    """One setting of a sweep with its cross-validated scores (one row of a run's table)."""

    #: Position in the grid.
    index: int
    criterion: str
    class_weight: str
    #: None: no limit.
    max_depth: Optional[int]
    min_split_rows: int
    min_leaf_rows: int
    #: None: no limit.
    max_leaves: Optional[int]
    min_gain: float
    prune_alpha: float
    valid_mean: float
    #: Sample standard deviation of the fold scores (ddof = 1).
    valid_sd: float
    train_mean: float
    #: Oriented so that a larger gap always means more overfitting.
    gap: float
    mean_leaves: float
    mean_depth: float
    fold_scores: Tuple[float, ...]

    def as_dict(self) -> Dict[str, Any]:
        return asdict(self)


@dataclass(frozen=True)
class OuterFold:
    """One outer split of a nested sweep."""

    repeat: int
    fold: int
    #: Grid index of the setting the inner sweep picked.
    picked: int
    inner_best: float
    inner_picked: float
    #: The picked setting's score on the outer validation rows.
    outer_score: float
    leaves: int


@dataclass(frozen=True)
class Nested:
    """What nested cross-validation measured: the outer scores and the optimism (the inner
    best's lead over the outer score, oriented like `Score.gap`)."""

    outer_mean: float
    outer_sd: float
    optimism: float
    folds: Tuple[OuterFold, ...]


@dataclass(frozen=True)
class Decision:
    """How a model fitted under decision costs decides: class 1 when its probability is at
    least `threshold` (chosen on the validation folds for these costs)."""

    threshold: float
    false_alarm: float
    miss: float


@dataclass(frozen=True)
class Run:
    id: str
    state: RunState
    dataset_id: str
    dataset_name: str
    dataset_version: int
    metric: str
    #: Settings in the grid.
    settings: int
    units_done: int
    units_total: int
    created_at: Optional[datetime]
    started_at: Optional[datetime]
    finished_at: Optional[datetime]
    #: Why the run failed or was cancelled.
    reason: str
    labels: Dict[str, str] = field(default_factory=dict)
    #: Every setting's scores (from `Client.run`; empty in listings).
    scores: Tuple[Score, ...] = ()
    #: Grid index of the picked setting and of the best validation score.
    picked: Optional[int] = None
    best: Optional[int] = None
    #: The token name that started the run ("" without tokens).
    owner: str = ""
    #: Settings no other setting beats on both score and mean leaves, fewest leaves first.
    pareto_front: Tuple[int, ...] = ()
    #: The outer estimate of a nested sweep (`sweep(..., outer_folds=k)`).
    nested: Optional[Nested] = None
    #: The model's decision threshold under decision costs.
    decision: Optional[Decision] = None

    @property
    def ended(self) -> bool:
        return self.state.ended

    @property
    def picked_score(self) -> Optional[Score]:
        """The picked setting's row, when the run has finished and carries its scores."""
        if self.picked is None:
            return None
        return next((s for s in self.scores if s.index == self.picked), None)


@dataclass(frozen=True)
class Progress:
    sequence: int
    units_done: int
    units_total: int
    scores_done: int
    scores_total: int


@dataclass(frozen=True)
class Scored:
    """Every fold of one setting is scored."""

    sequence: int
    score: Score


@dataclass(frozen=True)
class Finished:
    sequence: int
    picked: int
    best: int


@dataclass(frozen=True)
class Stopped:
    """A run's end other than finished (see `Failed`, `Cancelled`): why, in words."""

    sequence: int
    reason: str


class Failed(Stopped):
    """The run failed."""


class Cancelled(Stopped):
    """The run was cancelled."""


#: What `Client.follow` yields.
Event = Union[Progress, Scored, Finished, Failed, Cancelled]


@dataclass(frozen=True)
class Predictions:
    """A model's answers for some rows, in row order."""

    #: classify: the most likely class of each row.
    predicted: Tuple[str, ...]
    #: classify: the class names, in the order of each row's probabilities.
    classes: Tuple[str, ...]
    #: classify: per row, the probability of each class.
    probabilities: Tuple[Tuple[float, ...], ...]
    #: regress: the value of each row.
    values: Tuple[float, ...]
