"""The cluster coordinator's bookkeeping, driven step by step with a stand-in Dask client.

No processes: the client below accepts blocks and lets the test decide what comes
back and when (a streamed result, a block's end, a lost worker, a late event). The
planted truths: every finished run is journalled exactly once, whichever way its
result arrives (event, block return value, or both); a lost worker's blocks go
back to the queue with only the runs that never came back; a late event from an
attempt given up on is ignored; `position` is the order of arrival.
"""

from __future__ import annotations

import json
from dataclasses import asdict

import pytest

from benchharness.execute import cluster
from benchharness.execute.base import Measurement
from benchharness.experiment.file import Experiment
from benchharness.results import journal as J

TEXT = """\
experiment: coordinator
command: [/bin/true, "{a}", "{b}"]
factors:
  a: [x, y]
  b: ["1", "2"]
replicates: 2
order: blocked
seed: 4
host_check: off
"""


class FakeFuture:
    def __init__(self, key):
        self.key = key
        self.status = "pending"
        self.results = None
        self.callbacks = []
        self.cancelled = False

    def add_done_callback(self, fn):
        self.callbacks.append(fn)

    def finish(self, results):
        self.status, self.results = "finished", results
        for fn in self.callbacks:
            fn(self)

    def result(self):
        return self.results

    def cancel(self):
        self.cancelled = True

    def exception(self):
        return RuntimeError("lost")


class FakeClient:
    def __init__(self, workers):
        self.live = dict(workers)
        self.submitted = []   # (worker, key, payloads, future)

    def scheduler_info(self, n_workers=-1):
        return {"workers": self.live}

    def run(self, fn, workers=None):
        addrs = workers or list(self.live)
        if fn is cluster.remote.identity:
            return {a: {"hostname": "h", "worker": self.live[a]["name"]} for a in addrs}
        return {a: {"cpu": "fake"} for a in addrs}

    def submit(self, fn, payloads, topic, attempt, key=None, workers=None, **kw):
        fut = FakeFuture(key)
        self.submitted.append((workers[0], key, payloads, fut))
        return fut

    def subscribe_topic(self, topic, handler):
        pass

    def unsubscribe_topic(self, topic):
        pass

    def close(self, timeout=None):
        pass


def result_of(payload, host_position, worker):
    m = Measurement(status="ok", exit_code=0, wall_s=0.001, started_at="2026-12-05T10:00:00Z")
    return {"run": payload["run"], "measurement": asdict(m), "not_run": None, "teardown": "",
            "conditions": {"load_1m": 0.5}, "host_position": host_position,
            "hostname": "h", "worker": worker}


@pytest.fixture
def coordinator(tmp_path, monkeypatch):
    exp = Experiment.from_text(TEXT)
    from benchharness.design import build_plan

    plan = build_plan(exp, seed=4)
    planned = [{"run": r.run, "position": r.position, "block": r.block,
                "replicate": r.replicate, "warmup": r.warmup, "levels": dict(r.levels)}
               for r in plan.runs]
    folder = tmp_path / "res"
    folder.mkdir()
    (folder / "runs.jsonl").touch()
    client = FakeClient({"w1": {"name": "w1", "resources": {"bench": 1}}})
    monkeypatch.setattr(cluster, "_connect", lambda address: client)
    co = cluster._Coordinator(folder, exp, planned, set(), {"seed": 4}, None, "tcp://fake:1",
                              True, (), None, poll_s=0.01)
    co.meet_workers()
    co.fill_queue(planned)
    return co, client, folder


def journal(folder):
    return [json.loads(x) for x in (folder / "runs.jsonl").read_bytes().splitlines()]


def test_each_run_recorded_once_whichever_way_its_result_arrives(coordinator):
    co, client, folder = coordinator
    co.dispatch()
    # the worker holds the block it runs and the next one
    assert [(w, len(p)) for w, _k, p, _f in client.submitted] == [("w1", 4), ("w1", 4)]
    (_, key1, pay1, fut1), (_, key2, pay2, _fut2) = client.submitted
    # two results of block 1 stream back; the events of the other two are lost
    for i in (0, 1):
        co.on_event((0.0, {"attempt": key1, "result": result_of(pay1[i], i, "w1")}))
    co.wait()
    assert [r["run"] for r in journal(folder)] == [pay1[0]["run"], pay1[1]["run"]]
    # the block ends: its return value holds all four; the two already recorded stay once
    fut1.finish([result_of(p, i, "w1") for i, p in enumerate(pay1)])
    co.wait()
    recs = journal(folder)
    assert [r["run"] for r in recs] == [p["run"] for p in pay1]
    assert [r["position"] for r in recs] == [0, 1, 2, 3]          # order of arrival
    assert all(r["host"] == "w1" and r["status"] == "ok" and r["load_1m"] == 0.5
               for r in recs)
    # the worker is lost with block 2 not started: all four runs go back to the queue
    client.live = {}
    co.next_check = 0.0
    co.check_workers()
    assert [pr["run"] for pr in co.queue[0]] == [p["run"] for p in pay2]
    # a late event from the attempt given up on is ignored
    co.on_event((0.0, {"attempt": key2, "result": result_of(pay2[0], 4, "w1")}))
    co.wait()
    assert len(journal(folder)) == 4
    # a new worker takes the block; each of its runs is recorded once
    client.live = {"w2": {"name": "w2", "resources": {"bench": 1}}}
    co.next_check = 0.0
    co.check_workers()
    co.dispatch()
    w, key3, pay3, fut3 = client.submitted[-1]
    assert w == "w2" and [p["run"] for p in pay3] == [p["run"] for p in pay2]
    co.on_event((0.0, {"attempt": key3, "result": result_of(pay3[0], 0, "w2")}))
    fut3.finish([result_of(p, i, "w2") for i, p in enumerate(pay3)])
    co.wait()
    co.wait()
    recs = journal(folder)
    assert sorted(r["run"] for r in recs) == list(range(8))
    assert [r["position"] for r in recs] == list(range(8))
    assert {r["host"] for r in recs[4:]} == {"w2"}
    assert not co.queue and not co.busy
    co.close()


def test_a_lost_worker_gives_back_only_what_never_came_back(coordinator):
    co, client, folder = coordinator
    co.dispatch()
    (_, key1, pay1, fut1), _second = client.submitted
    co.on_event((0.0, {"attempt": key1, "result": result_of(pay1[0], 0, "w1")}))
    co.wait()
    client.live = {}
    co.next_check = 0.0
    co.check_workers()
    assert fut1.cancelled
    # block 1 comes back without its finished first run, ahead of block 2, in plan order
    assert [[pr["run"] for pr in b] for b in co.queue][:2] == [
        [p["run"] for p in pay1[1:]], [p["run"] for p in _second[2]]]
    assert [r["run"] for r in J.read_journal(folder / "runs.jsonl")] == [pay1[0]["run"]]
    co.close()


def test_padding_is_drawn_once_per_run_and_recorded_as_sent(tmp_path, monkeypatch):
    # pad_env on a cluster: the coordinator draws each run's padding length once, the
    # worker pads with it, and the journal records the length that was sent.
    exp = Experiment.from_text(TEXT + "pad_env: true\n")
    from benchharness.design import build_plan

    planned = [{"run": r.run, "position": r.position, "block": r.block,
                "replicate": r.replicate, "warmup": r.warmup, "levels": dict(r.levels)}
               for r in build_plan(exp, seed=4).runs]
    folder = tmp_path / "res"
    folder.mkdir()
    client = FakeClient({"w1": {"name": "w1", "resources": {"bench": 1}}})
    monkeypatch.setattr(cluster, "_connect", lambda address: client)
    co = cluster._Coordinator(folder, exp, planned, set(), {"seed": 4}, None, "tcp://fake:1",
                              True, (), None, poll_s=0.01)
    co.meet_workers()
    co.fill_queue(planned)
    drawn = []

    class Counted:   # the engine's generator, each draw noted
        def __init__(self, rng):
            self.rng = rng

        def integers(self, *a, **k):
            drawn.append(self.rng.integers(*a, **k))
            return drawn[-1]

    co.engine.pad_rng = Counted(co.engine.pad_rng)
    co.dispatch()
    (_, key1, pay1, fut1), _second = client.submitted
    sent = [p["command"]["pad_bytes"] for p in pay1 + _second[2]]
    assert len(drawn) == 8 and sent == [int(x) for x in drawn]
    assert all(0 <= n <= 4096 for n in sent) and len(set(sent)) > 1
    fut1.finish([result_of(p, i, "w1") for i, p in enumerate(pay1)])
    co.wait()
    assert [r["pad_env_bytes"] for r in journal(folder)] == sent[:4]
    co.close()
