"""The Python client against a real `pollard serve` (conftest.py): upload, sweep, follow,
get by id, scores, models, predictions and errors, on iris (tests/data/iris.csv, UCI,
CC BY 4.0; see tests/data/SOURCES.md). Where a number can be checked outside the client,
it is: against the `pollard` command line's JSON for the same run (another client of the
same server) and against the definitions the contract states (valid_mean is the mean of
the fold scores, valid_sd their sample standard deviation)."""

from __future__ import annotations

import csv
import hashlib
import json
import math
import statistics

import pandas
import pytest

import pollard
from conftest import REPO, data, pollard_cli

FEATURES = ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]


def iris_rows():
    with open(data("iris.csv"), newline="") as f:
        return list(csv.DictReader(f))


@pytest.fixture(scope="module")
def iris(server):
    with pollard.connect(server.url) as c:
        return c.upload(data("iris.csv"), name="iris", target="target")


@pytest.fixture(scope="module")
def finished(server, iris):
    """A finished 8-setting sweep of iris and the events that followed it."""
    with pollard.connect(server.url) as c:
        run = c.sweep(iris, max_depth=range(1, 5), min_leaf_rows=[1, 5], folds=5, seed=7, labels={"suite": "python"})
        events = list(c.follow(run))
        return c.run(run.id), events


def test_the_installed_stubs_come_from_this_checkouts_contract():
    from pollard import _contract

    for name, digest in _contract.PROTO_SHA256.items():
        assert hashlib.sha256((REPO / "proto" / name).read_bytes()).hexdigest() == digest, f"{name} changed since the package was built: pip install ./clients/python again"
    assert sorted(_contract.PROTO_SHA256) == sorted(f"pollard/v1/{p.name}" for p in (REPO / "proto" / "pollard" / "v1").glob("*.proto"))


def test_upload_a_csv_file_and_get_it_by_id(client, iris):
    rows = iris_rows()
    assert iris.id.startswith("ds_") and iris.name == "iris"
    assert iris.rows == len(rows) == 150
    assert iris.target == "target" and iris.task == "classify"
    assert [c.name for c in iris.columns] == FEATURES and list(rows[0]) == FEATURES + ["target"]
    assert iris.sha256 == hashlib.sha256(data("iris.csv").read_bytes()).hexdigest()
    assert client.dataset(iris.id) == pollard.Dataset(**{**iris.__dict__, "unchanged": False})
    again = client.upload(data("iris.csv"), name="iris", target="target")
    assert again.unchanged and again.id == iris.id and again.version == iris.version
    assert iris.id in [d.id for d in client.datasets("iris")]


def test_upload_a_dataframe(client):
    frame = pandas.read_csv(data("iris.csv"))
    frame.loc[3, "sepal_width_cm"] = float("nan")
    d = client.upload(frame, name="iris-frame", target="target")
    assert d.rows == len(frame) and d.task == "classify"
    kinds = {c.name: (c.kind, c.missing) for c in d.columns}
    assert kinds["sepal_width_cm"] == ("numeric", 1)
    assert set(kinds) == set(FEATURES) and d.target == "target"
    # The same table as rows of mappings stores the same content.
    records = client.upload(frame.to_dict("records"), name="iris-frame", target="target")
    assert records.sha256 == d.sha256 and records.unchanged


def test_sweep_follow_and_get_by_id(server, finished):
    run, events = finished
    assert run.state is pollard.RunState.FINISHED and run.ended
    assert run.settings == 8 and run.units_done == run.units_total
    assert run.labels == {"suite": "python"} and run.metric
    # The events: progress that never goes backwards and ends at the total, one scored
    # event per setting, and `finished` last, naming the run's pick.
    progress = [e for e in events if isinstance(e, pollard.Progress)]
    assert [p.units_done for p in progress] == sorted(p.units_done for p in progress)
    assert progress[-1].units_done == progress[-1].units_total == run.units_total
    assert sorted(e.score.index for e in events if isinstance(e, pollard.Scored)) == list(range(8))
    assert isinstance(events[-1], pollard.Finished) and events[-1].picked == run.picked and events[-1].best == run.best
    assert [e.sequence for e in events] == sorted(set(e.sequence for e in events))
    # Resuming after a sequence number gives the rest only.
    with pollard.connect(server.url) as c:
        rest = list(c.follow(run, after=events[-3].sequence))
    assert rest == events[-2:]
    # The grid: every combination of the two ranges, no other limit.
    grid = {(s.max_depth, s.min_leaf_rows) for s in run.scores}
    assert grid == {(d, m) for d in range(1, 5) for m in (1, 5)}
    assert all(s.max_leaves is None for s in run.scores)
    # The run read back by id through another client, the command line, agrees.
    shown = json.loads(pollard_cli("show", run.id, "--json", server=server).stdout)
    assert shown["state"] == "finished" and shown["picked"] == run.picked
    for ours, theirs in zip(run.scores, shown["scores"]):
        assert ours.index == theirs["index"]
        assert ours.valid_mean == theirs["valid_mean"] and ours.train_mean == theirs["train_mean"]
        assert list(ours.fold_scores) == theirs["fold_scores"]


def test_scores_as_rows_and_as_a_dataframe(client, finished):
    run, _ = finished
    rows = client.scores(run.id)
    assert rows == list(run.scores) and len(rows) == 8
    for s in rows:
        assert len(s.fold_scores) == 5
        assert math.isclose(s.valid_mean, statistics.fmean(s.fold_scores), rel_tol=1e-12)
        assert math.isclose(s.valid_sd, statistics.stdev(s.fold_scores), rel_tol=1e-9, abs_tol=1e-12)
    assert run.picked_score is not None and run.picked_score.index == run.picked
    best = max(rows, key=lambda s: s.valid_mean)
    assert best.valid_mean == rows[run.best].valid_mean
    frame = client.scores_frame(run)
    assert len(frame) == 8 and frame["picked"].sum() == 1
    assert int(frame.loc[frame["picked"], "index"].iloc[0]) == run.picked
    assert list(frame["valid_mean"]) == [s.valid_mean for s in rows]


def test_wait_shows_progress(client, iris, capsys):
    run = client.sweep("iris", max_depth=[1, 2, None], folds=3, seed=1)
    assert run.dataset_id == iris.id
    seen = []
    done = client.wait(run, progress=seen.append)
    assert done.state is pollard.RunState.FINISHED
    assert seen and seen[-1].units_done == seen[-1].units_total == done.units_total
    assert {s.max_depth for s in done.scores} == {1, 2, None}
    again = client.sweep(iris, min_gain=pollard.log_span(1e-4, 1e-2, 3), folds=3, seed=1)
    done = client.wait(again, progress=True)
    bar = capsys.readouterr().err
    assert again.id in bar and f"{done.units_total}/{done.units_total}" in bar
    assert sorted(s.min_gain for s in done.scores) == pytest.approx([1e-4, 1e-3, 1e-2])


def test_fetch_the_model(client, finished):
    run, _ = finished
    model = json.loads(client.model(run, "json"))
    assert isinstance(model, dict) and model
    text = client.model(run, pollard.ModelFormat.TEXT)
    assert isinstance(text, str) and "leaf:" in text
    assert client.model(run, "dot").lstrip().startswith("digraph")
    onnx = client.model(run, "onnx")
    assert isinstance(onnx, bytes) and len(onnx) > 100
    with pytest.raises(pollard.UsageError):
        client.model(run, "pickle")


def test_predict_agrees_with_the_command_line(server, client, finished):
    run, _ = finished
    rows = iris_rows()
    features = {name: [float(r[name]) for r in rows] for name in FEATURES}
    answers = client.predict(run, features)
    assert len(answers.predicted) == len(rows) and not answers.values
    assert set(answers.predicted) <= set(answers.classes)
    for p, probs in zip(answers.predicted, answers.probabilities):
        assert math.isclose(sum(probs), 1.0, rel_tol=1e-9)
        assert probs[answers.classes.index(p)] == max(probs)
    cli = [json.loads(line) for line in pollard_cli("predict", run.id, str(data("iris.csv")), "--json", server=server).stdout.splitlines()]
    assert [c["predicted"] for c in cli] == list(answers.predicted)
    # A DataFrame (with the target column, which is ignored) gives the same answers.
    assert client.predict(run, pandas.read_csv(data("iris.csv"))).predicted == answers.predicted
    # The tree separates iris well: most training rows get their own class back.
    right = sum(p == r["target"] for p, r in zip(answers.predicted, rows))
    assert right > 0.9 * len(rows)


def test_listing_and_errors(client, finished, iris):
    run, _ = finished
    assert run.id in [r.id for r in client.runs(dataset_name="iris", state="finished")]
    assert run.id in [r.id for r in client.runs(label="suite=python")]
    with pytest.raises(pollard.NotFound) as e:
        client.run("run_" + "0" * 32)
    assert e.value.status == "NOT_FOUND"
    with pytest.raises(pollard.NotFound):
        client.sweep("no-such-dataset", max_depth=[2])
    with pytest.raises(pollard.InvalidArgument) as e:
        client.sweep(iris, max_depth=[2], metric="no_such_metric")
    assert "metric" in e.value.message
    with pytest.raises(pollard.UsageError):
        client.sweep(iris, max_depth=range(3, 3))
    with pytest.raises(pollard.UsageError):
        client.sweep(iris, max_depth=["deep"])
    with pytest.raises(pollard.UsageError):
        client.predict(run, {"a": [1.0, 2.0], "b": [1.0]})
    with pytest.raises(pollard.UsageError):
        client.upload(REPO / "tests" / "data" / "no-such-file.csv")


def test_tokens(token_server):
    url, tokens = token_server.server.url, token_server.tokens
    with pollard.connect(url) as anonymous:
        with pytest.raises(pollard.Unauthenticated):
            list(anonymous.datasets())
    with pollard.connect(url, token=tokens["reader"]) as reader:
        assert list(reader.datasets()) == []
        with pytest.raises(pollard.PermissionDenied) as e:
            reader.upload(data("iris.csv"), target="target")
        assert "writer" in e.value.message
    with pollard.connect(url, token=tokens["writer"]) as writer:
        d = writer.upload(data("iris.csv"), target="target")
        done = writer.wait(writer.sweep(d, max_depth=range(1, 4), folds=3, seed=2))
        assert done.state is pollard.RunState.FINISHED and done.owner == "py-writer"
    with pollard.connect(url, token=tokens["reader"]) as reader:
        assert reader.run(done.id).scores == done.scores
        assert len(reader.predict(done, [{name: 5.0 for name in FEATURES}]).predicted) == 1


def test_tls_with_client_certificates(tls_server):
    url, certs = tls_server.server.url, tls_server.certs
    with pollard.connect(url, ca=certs / "ca.pem", cert=certs / "client.pem", key=certs / "client.key") as c:
        d = c.upload(data("iris.csv"), target="target")
        assert c.dataset(d.id).rows == 150
    with pollard.connect(url, ca=certs / "ca.pem") as no_client_cert:
        with pytest.raises(pollard.Unavailable):
            no_client_cert.dataset(d.id)
    with pollard.connect(url.replace("https://", "http://")) as plain:
        with pytest.raises(pollard.Unavailable):
            plain.dataset(d.id)
    with pytest.raises(pollard.UsageError):
        pollard.connect(url, ca=certs / "ca.pem", cert=certs / "client.pem")
    with pytest.raises(pollard.UsageError):
        pollard.connect(url.replace("https://", "http://"), ca=certs / "ca.pem")


def test_nested_monotone_and_costs(server, client):
    """A two-class sweep (breast cancer, tests/data/breast_cancer.csv, UCI via the reference
    library, CC BY 4.0; see tests/data/SOURCES.md) under monotone limits and decision costs,
    nested in an outer plan: the command line, another client of the same server, reads
    back what the Python client asked for."""
    cancer = client.upload(data("breast_cancer.csv"), name="cancer", target="target")
    run = client.sweep(cancer, max_depth=[1, 2, 3], prune_alpha=[0.0, 0.01], folds=3, outer_folds=3, seed=5,
                       monotone={"mean_radius": "increasing", "worst_texture": "decreasing"}, false_alarm_cost=1, miss_cost=5)
    done = client.wait(run)
    assert done.state is pollard.RunState.FINISHED and done.metric == "expected_cost"
    shown = json.loads(pollard_cli("show", run.id, "--json", server=server).stdout)
    assert shown["monotone"] == {"mean_radius": "increasing", "worst_texture": "decreasing"}
    decision = shown["model"]["decision"]
    assert (decision["false_alarm"], decision["miss"]) == (1, 5)
    assert math.isclose(decision["bayes_threshold"], 1 / 6)
    assert len(shown["nested"]["folds"]) == 3
    # The same, as the Python client reads it.
    assert done.decision == pollard.Decision(decision["threshold"], 1.0, 5.0)
    nested = shown["nested"]
    assert (done.nested.outer_mean, done.nested.outer_sd, done.nested.optimism) == (nested["outer_mean"], nested["outer_sd"], nested["optimism"])
    assert [(f.repeat, f.fold, f.picked, f.outer_score, f.leaves) for f in done.nested.folds] == [(f["repeat"], f["fold"], f["picked"], f["outer_score"], f["leaves"]) for f in nested["folds"]]
    assert client.run(run.id).nested == done.nested
    # Refused by the client before any call, or by the server naming the field.
    with pytest.raises(pollard.UsageError):
        client.sweep(cancer, max_depth=[2], false_alarm_cost=1)
    with pytest.raises(pollard.UsageError):
        client.sweep(cancer, max_depth=[2], monotone={"mean_radius": "upwards"})
    with pytest.raises(pollard.InvalidArgument) as e:
        client.sweep(cancer, max_depth=[2], monotone={"no_such_column": "increasing"})
    assert "spec.monotone[0]" in e.value.message
