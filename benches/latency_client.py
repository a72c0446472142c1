"""Latency client in Python (grpcio), for benches/latency.sh: the same calls as
examples/latency.rs, from the other language a caller is likely to use.

    python benches/latency_client.py STUBS_DIR HOST:PORT DATASET_ID RUN900_ID REPEATS

STUBS_DIR holds modules generated from proto/pollard/v1/pollard.proto by grpcio-tools
(benches/latency.sh makes them). Prints `result:` lines as the Rust client does:
sweep100 (StartRun of a 100-setting iris sweep to its `finished` event on FollowRunBatches,
several events to a message, as the client package follows), sweep100_each (the same on
FollowRun, one message per event), get_run900 and list_runs50, each the median and p99 of
REPEATS timed calls after 10 untimed.
"""

import sys
import time

stubs, address, dataset, run900, repeats = sys.argv[1], sys.argv[2], sys.argv[3], sys.argv[4], int(sys.argv[5])
sys.path.insert(0, stubs)

import grpc  # noqa: E402
from pollard.v1 import pollard_pb2 as pb  # noqa: E402
from pollard.v1 import pollard_pb2_grpc as rpc  # noqa: E402

LEAF_ROWS = [1, 2, 3, 4, 5, 6, 8, 10, 15, 20]


def values(v):
    return pb.LimitRange(values=pb.ValueList(values=[pb.LimitValue(number=float(x)) for x in v]))


def sweep100():
    spec = pb.SweepSpec(max_depth=values(range(1, 11)), min_leaf_rows=values(LEAF_ROWS))
    return pb.StartRunRequest(dataset_id=dataset, spec=spec)


channel = grpc.insecure_channel(address)
runs = rpc.RunsStub(channel)


def ended(run_id, event):
    """Whether `event` ends the run well; exits when it ends otherwise."""
    kind = event.WhichOneof("kind")
    if kind in ("failed", "cancelled"):
        raise SystemExit(f"latency_client: run {run_id} ended {kind}: {getattr(event, kind)}")
    return kind == "finished"


def start_and_follow():
    """StartRun, then FollowRunBatches (several events to a message, as the client package
    follows) to the `finished` event."""
    run = runs.StartRun(sweep100())
    for batch in runs.FollowRunBatches(pb.FollowRunRequest(id=run.id, after_sequence=0)):
        if any(ended(run.id, e) for e in batch.events):
            return
    raise SystemExit(f"latency_client: the events of run {run.id} ended without a terminal event")


def start_and_follow_each():
    """StartRun, then FollowRun (one message per event) to the `finished` event."""
    run = runs.StartRun(sweep100())
    for event in runs.FollowRun(pb.FollowRunRequest(id=run.id, after_sequence=0)):
        if ended(run.id, event):
            return
    raise SystemExit(f"latency_client: the events of run {run.id} ended without a terminal event")


def get_run():
    info = runs.GetRun(pb.GetRunRequest(id=run900))
    if len(info.scores) != 900:
        raise SystemExit(f"latency_client: GetRun returned {len(info.scores)} scores, not 900")


def list_runs():
    page = runs.ListRuns(pb.ListRunsRequest(page_size=50))
    if len(page.runs) != 50:
        raise SystemExit(f"latency_client: ListRuns returned {len(page.runs)} runs, not 50")


def timed(name, call):
    for _ in range(10):
        call()
    took = []
    for _ in range(repeats):
        start = time.perf_counter()
        call()
        took.append(time.perf_counter() - start)
    took.sort()

    def q(p):
        return took[round((len(took) - 1) * p)] * 1000.0

    print(f"result: {name} client=python n={len(took)} median_ms={q(0.5):.3f} p99_ms={q(0.99):.3f}", flush=True)


timed("sweep100", start_and_follow)
timed("sweep100_each", start_and_follow_each)
timed("get_run900", get_run)
timed("list_runs50", list_runs)
