"""The client: one gRPC channel to a pollard server and a method per thing a caller does."""

from __future__ import annotations

import os
import sys
from pathlib import Path
from typing import Any, Callable, Dict, Iterator, List, Literal, Mapping, Optional, Sequence, Tuple, Union, overload

import grpc

from . import _convert as convert
from ._convert import LIMITS, Values
from .errors import MissingExtra, RunCancelled, RunFailed, UsageError, from_rpc_error
from .types import Cancelled, Dataset, Event, Failed, Finished, ModelFormat, Predictions, Progress, Run, Score
from .v1 import pollard_pb2 as pb
from .v1 import pollard_pb2_grpc as rpc

#: Where `connect` goes when neither its argument nor POLLARD_SERVER names a server.
DEFAULT_SERVER = "http://127.0.0.1:7311"
#: Bytes of a CSV file per upload message.
CHUNK_BYTES = 1 << 20

RunRef = Union[Run, str]
DatasetRef = Union[Dataset, str]

_FORMATS = {ModelFormat.JSON: pb.MODEL_FORMAT_JSON, ModelFormat.DOT: pb.MODEL_FORMAT_DOT, ModelFormat.TEXT: pb.MODEL_FORMAT_TEXT, ModelFormat.ONNX: pb.MODEL_FORMAT_ONNX}


def _read(option: str, path: Optional[Union[str, os.PathLike]]) -> Optional[bytes]:
    if path is None:
        return None
    try:
        return Path(path).read_bytes()
    except OSError as e:
        raise UsageError(f"{option}: cannot read {path}: {e.strerror}") from None


def connect(
    server: Optional[str] = None,
    *,
    token: Optional[str] = None,
    ca: Optional[Union[str, os.PathLike]] = None,
    cert: Optional[Union[str, os.PathLike]] = None,
    key: Optional[Union[str, os.PathLike]] = None,
    timeout: float = 60.0,
) -> "Client":
    """A client of the server at `server`: `host:port`, `http://host:port`, or
    `https://host:port` for TLS. Unset options come from the environment as for the
    `pollard` command line: POLLARD_SERVER, POLLARD_TOKEN, POLLARD_CA, POLLARD_CERT,
    POLLARD_KEY.

    `token` is sent as `authorization: Bearer <token>` with every call. With https, `ca` is
    the CA certificate (PEM file) that signed the server's certificate (the system's roots
    when not given), and `cert` and `key` the client certificate and its key for a server
    that asks for one (mTLS). `timeout` bounds each call, in seconds, except `follow` and
    `wait`, which last as long as the run."""
    server = server or os.environ.get("POLLARD_SERVER") or DEFAULT_SERVER
    token = token if token is not None else os.environ.get("POLLARD_TOKEN")
    ca = ca if ca is not None else os.environ.get("POLLARD_CA")
    cert = cert if cert is not None else os.environ.get("POLLARD_CERT")
    key = key if key is not None else os.environ.get("POLLARD_KEY")
    if (cert is None) != (key is None):
        raise UsageError("cert and key go together: the client certificate and its private key (PEM files)")
    options = [("grpc.max_receive_message_length", -1), ("grpc.max_send_message_length", -1)]
    if server.startswith("https://"):
        address = server[len("https://") :]
        creds = grpc.ssl_channel_credentials(root_certificates=_read("ca", ca), private_key=_read("key", key), certificate_chain=_read("cert", cert))
        channel = grpc.secure_channel(address.rstrip("/"), creds, options)
    else:
        if ca is not None or cert is not None:
            raise UsageError(f"ca, cert and key are for https:// servers; {server} is plain text")
        address = server[len("http://") :] if server.startswith("http://") else server
        channel = grpc.insecure_channel(address.rstrip("/"), options)
    return Client(channel, token=token, timeout=timeout)


def _run_id(run: RunRef) -> str:
    return run.id if isinstance(run, Run) else run


class Client:
    """Calls one pollard server. Use `connect` to make one; close it (or use `with`) when
    done. Every failed call raises a `pollard.CallError` subclass named after its status."""

    def __init__(self, channel: grpc.Channel, *, token: Optional[str] = None, timeout: float = 60.0) -> None:
        self._channel = channel
        self._metadata: Tuple[Tuple[str, str], ...] = (("authorization", f"Bearer {token}"),) if token else ()
        self._timeout = timeout
        self._datasets = rpc.DatasetsStub(channel)
        self._runs = rpc.RunsStub(channel)
        self._models = rpc.ModelsStub(channel)

    def close(self) -> None:
        self._channel.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def _call(self, method: Callable[..., Any], request: Any, *, bounded: bool = True) -> Any:
        """One call with the token, bounded by the client's timeout unless `bounded` is
        False; a failure becomes our `CallError` (`errors.from_rpc_error`)."""
        try:
            return method(request, metadata=self._metadata, timeout=self._timeout if bounded else None)
        except grpc.RpcError as e:
            raise from_rpc_error(e) from None

    # ------------------------------------------------------------------ datasets

    def upload(self, data: Any, *, name: Optional[str] = None, target: str = "", categorical: Sequence[str] = ()) -> Dataset:
        """Stores a dataset: a CSV file (a path) or a table held in memory (a pandas
        DataFrame, a mapping of column name to cells, or a list of row mappings). A file's
        name defaults to its stem; a table needs `name`. `target` names the column to
        predict (a sweep may name it instead); `categorical` names numeric-looking columns
        of a file to read as categories (text columns of a table are categories anyway).
        Uploading the same bytes again stores nothing and returns the version that has
        them (`unchanged` is then True)."""
        if isinstance(data, (str, os.PathLike)):
            path = Path(data)
            if not path.is_file():
                raise UsageError(f"upload: {path} is not a file")
            header = pb.UploadHeader(name=name or path.stem, format=pb.DATA_FORMAT_CSV, target=target, categorical=list(categorical))

            def chunks() -> Iterator[pb.UploadChunk]:
                yield pb.UploadChunk(header=header)
                with open(path, "rb") as f:
                    while block := f.read(CHUNK_BYTES):
                        yield pb.UploadChunk(data=block)

            return convert.dataset(self._call(self._datasets.Upload, chunks(), bounded=False))
        if not name:
            raise UsageError("upload: a table held in memory needs a name")
        if categorical:
            raise UsageError("upload: categorical is for CSV files; a table's text columns are categories already")
        request = pb.PutTableRequest(name=name, target=target, table=convert.table(data, "upload"))
        return convert.dataset(self._call(self._datasets.PutTable, request))

    def dataset(self, dataset_id: str) -> Dataset:
        return convert.dataset(self._call(self._datasets.GetDataset, pb.GetDatasetRequest(id=dataset_id)))

    def datasets(self, name: str = "") -> Iterator[Dataset]:
        """Every dataset version, newest first (only those of `name` when given), fetched a
        page at a time."""
        token = ""
        while True:
            page = self._call(self._datasets.ListDatasets, pb.ListDatasetsRequest(name=name, page_token=token))
            yield from (convert.dataset(d) for d in page.datasets)
            token = page.next_page_token
            if not token:
                return

    def delete_dataset(self, dataset: DatasetRef) -> None:
        self._call(self._datasets.DeleteDataset, pb.DeleteDatasetRequest(id=dataset.id if isinstance(dataset, Dataset) else dataset))

    # ------------------------------------------------------------------ runs

    def sweep(
        self,
        dataset: DatasetRef,
        *,
        max_depth: Optional[Values] = None,
        min_split_rows: Optional[Values] = None,
        min_leaf_rows: Optional[Values] = None,
        max_leaves: Optional[Values] = None,
        min_gain: Optional[Values] = None,
        prune_alpha: Optional[Values] = None,
        prune_path: bool = False,
        criteria: Sequence[str] = (),
        class_weights: Sequence[str] = (),
        folds: Optional[int] = None,
        repeats: Optional[int] = None,
        fold_scheme: str = "",
        fold_column: str = "",
        metric: str = "",
        pick: str = "",
        seed: int = 0,
        target: str = "",
        task: str = "",
        refit: bool = True,
        splitter: str = "",
        outer_folds: Optional[int] = None,
        outer_scheme: str = "",
        outer_column: str = "",
        monotone: Optional[Mapping[str, str]] = None,
        false_alarm_cost: Optional[float] = None,
        miss_cost: Optional[float] = None,
        labels: Optional[Mapping[str, str]] = None,
        key: str = "",
    ) -> Run:
        """Starts a sweep of every combination of the given limits on a dataset (a
        `Dataset`, an id `ds_...`, or a name for its latest version) and returns the queued
        run at once; `wait` or `follow` it.

        Each limit takes a Python `range`, a list of numbers (None among them: no limit),
        one number, `pollard.span(start, stop, step)` or `pollard.log_span(start, stop,
        count)`; a limit not given is not limited. `folds` (k), `repeats`, `fold_scheme`
        ("shuffled", "stratified", "grouped", "forward", "given") and `fold_column` make the
        fold plan; `metric` and `pick` ("highest", "one_se", "max_leaves_budget:N",
        "within:T") say how settings are scored and picked; empty values take the server's
        defaults. `refit=False` skips the final tree on all rows. `outer_folds` (with
        `outer_scheme`, `outer_column`) makes the sweep nested: an outer fold plan whose
        validation rows score the picked setting once each. `monotone` maps feature names to
        "increasing", "decreasing" or "free". `false_alarm_cost` and `miss_cost` (both or
        neither; two-class targets) are decision costs: the metric defaults to
        `expected_cost` and the model decides at the threshold chosen for them. `key` is an
        idempotency key: a retried call with the same key returns the first call's run."""
        limits: Dict[str, Any] = {"max_depth": max_depth, "min_split_rows": min_split_rows, "min_leaf_rows": min_leaf_rows, "max_leaves": max_leaves, "min_gain": min_gain, "prune_alpha": prune_alpha}
        spec = pb.SweepSpec(
            target=target,
            task=task,
            criteria=list(criteria),
            class_weights=list(class_weights),
            prune_path=prune_path,
            folds=pb.FoldPlan(scheme=fold_scheme, k=folds or 0, repeats=repeats or 0, column=fold_column),
            metric=metric,
            pick=pick,
            seed=seed,
            skip_final=not refit,
            splitter=splitter,
        )
        if outer_folds is not None or outer_scheme or outer_column:
            spec.outer.CopyFrom(pb.FoldPlan(scheme=outer_scheme, k=outer_folds or 0, column=outer_column))
        for feature, direction in (monotone or {}).items():
            spec.monotone.append(pb.MonotoneLimit(feature=feature, direction=convert.monotone_direction_pb(direction)))
        if (false_alarm_cost is None) != (miss_cost is None):
            raise UsageError("give both false_alarm_cost and miss_cost, or neither")
        if false_alarm_cost is not None:
            spec.costs.SetInParent()
            spec.costs.false_alarm = false_alarm_cost
            spec.costs.miss = miss_cost
        for field in LIMITS:
            if limits[field] is not None:
                getattr(spec, field).CopyFrom(convert.limit_range(field, limits[field]))
        request = pb.StartRunRequest(spec=spec, idempotency_key=key, labels=dict(labels or {}))
        if isinstance(dataset, Dataset):
            request.dataset_id = dataset.id
        elif dataset.startswith("ds_"):
            request.dataset_id = dataset
        else:
            request.dataset_name = dataset
        return convert.run(self._call(self._runs.StartRun, request))

    def run(self, run_id: str) -> Run:
        """A run by id, with every setting's scores."""
        return convert.run(self._call(self._runs.GetRun, pb.GetRunRequest(id=run_id)))

    def runs(self, *, dataset_name: str = "", state: Optional[str] = None, label: str = "", schedule_id: str = "") -> Iterator[Run]:
        """Runs, newest first, without their scores (use `run` for those), fetched a page at
        a time; filtered by dataset name, state ("queued", ..., "cancelled"), a label
        ("key=value") or schedule."""
        request = pb.ListRunsRequest(dataset_name=dataset_name, label=label, schedule_id=schedule_id)
        if state is not None:
            request.state = convert.run_state_pb(state)
        while True:
            page = self._call(self._runs.ListRuns, request)
            yield from (convert.run(r) for r in page.runs)
            if not page.next_page_token:
                return
            request.page_token = page.next_page_token

    def cancel(self, run: RunRef) -> Run:
        return convert.run(self._call(self._runs.CancelRun, pb.CancelRunRequest(id=_run_id(run))))

    def follow(self, run: RunRef, *, after: int = 0) -> Iterator[Event]:
        """The run's events from sequence number `after` + 1 on (0: from the start), then
        live ones until the run ends; the last is `Finished`, `Failed` or `Cancelled`. To
        resume after a broken connection, pass the last sequence number seen."""
        # Several events to a message (FollowRunBatches): grpcio's cost is per message.
        stream = self._runs.FollowRunBatches(pb.FollowRunRequest(id=_run_id(run), after_sequence=after), metadata=self._metadata)
        try:
            for batch in stream:
                for wire in batch.events:
                    e = convert.event(wire)
                    if e is not None:
                        yield e
        except grpc.RpcError as err:
            raise from_rpc_error(err) from None
        finally:
            stream.cancel()

    def wait(self, run: RunRef, *, progress: Union[bool, Callable[[Progress], None]] = False) -> Run:
        """Follows the run to its end and returns it with its scores. `progress=True`
        shows a progress bar of work units on stderr (needs the `progress` extra, tqdm); a
        function is called with every `Progress` event instead. Raises `RunFailed` or
        `RunCancelled` when the run ends otherwise than finished."""
        run_id = _run_id(run)
        bar: Any = None
        if progress is True:
            try:
                from tqdm import tqdm
            except ImportError:
                raise MissingExtra("tqdm", "progress", "a progress bar") from None
            bar = tqdm(desc=run_id, unit="unit", file=sys.stderr)
        try:
            for e in self.follow(run_id):
                if isinstance(e, Progress):
                    if bar is not None:
                        bar.total = e.units_total
                        bar.update(e.units_done - bar.n)
                    elif callable(progress):
                        progress(e)
                elif isinstance(e, Failed):
                    raise RunFailed(run_id, e.reason)
                elif isinstance(e, Cancelled):
                    raise RunCancelled(run_id, e.reason)
                elif isinstance(e, Finished):
                    break
        finally:
            if bar is not None:
                bar.close()
        return self.run(run_id)

    def scores(self, run: RunRef) -> List[Score]:
        """Every setting's scores as rows (grid order). A `Run` that carries its scores is
        read as is; otherwise the run is fetched."""
        if isinstance(run, Run) and run.scores:
            return list(run.scores)
        return list(self.run(_run_id(run)).scores)

    def scores_frame(self, run: RunRef) -> Any:
        """`scores` as a pandas DataFrame, one row per setting, with a `picked` column
        (needs the `pandas` extra)."""
        try:
            import pandas
        except ImportError:
            raise MissingExtra("pandas", "pandas", "scores_frame") from None
        full = run if isinstance(run, Run) and run.scores else self.run(_run_id(run))
        rows = [dict(s.as_dict(), picked=s.index == full.picked) for s in full.scores]
        return pandas.DataFrame(rows)

    # ------------------------------------------------------------------ models

    @overload
    def model(self, run: RunRef, format: Literal["json", "dot", "text", ModelFormat.JSON, ModelFormat.DOT, ModelFormat.TEXT] = ...) -> str: ...

    @overload
    def model(self, run: RunRef, format: Literal["onnx", ModelFormat.ONNX]) -> bytes: ...

    def model(self, run: RunRef, format: Union[ModelFormat, str] = ModelFormat.JSON) -> Union[str, bytes]:
        """The finished run's model as a file: text for "json", "dot" and "text", bytes for
        "onnx". (A run whose refit was skipped has no model: FailedPrecondition.)"""
        try:
            fmt = ModelFormat(format) if isinstance(format, str) else format
        except ValueError:
            raise UsageError(f"model: format {format!r} is not one of {', '.join(f.value for f in ModelFormat)}") from None
        reply = self._call(self._models.GetModel, pb.GetModelRequest(run_id=_run_id(run), format=_FORMATS[fmt]))
        return reply.data if fmt is ModelFormat.ONNX else reply.text

    def predict(self, run: RunRef, rows: Any) -> Predictions:
        """The finished run's model applied to rows: a pandas DataFrame, a mapping of column
        name to cells, or a list of row mappings, holding the model's feature columns
        (others are ignored)."""
        request = pb.PredictRequest(run_id=_run_id(run), rows=convert.table(rows, "predict"))
        return convert.predictions(self._call(self._models.Predict, request))
