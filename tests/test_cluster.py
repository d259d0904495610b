"""The Dask engine: same model, plan and scores as the local engine, on a real
``distributed.LocalCluster`` of two worker processes on loopback."""
import os
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pandas as pd
import pytest

distributed = pytest.importorskip("distributed")

from hybrid import HybridFactorModel, load, plan  # noqa: E402
from hybrid.datasets.club import tasting_club  # noqa: E402
from hybrid.engines.cluster import ClusterRatingData  # noqa: E402
from hybrid.engines.engine import Engine  # noqa: E402
from hybrid.estimator.batch import score_items  # noqa: E402

FIT = dict(rank=6, epochs=8, text_min_df=1)


def _cluster():
    return distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                                    host="127.0.0.1")


@pytest.fixture(scope="module")
def cluster():
    with _cluster() as c, distributed.Client(c) as client:
        yield c, client


@pytest.fixture(scope="module")
def data():
    return tasting_club(seed=2)


@pytest.fixture(scope="module")
def local_model(data):
    return HybridFactorModel(**FIT, schema=data.schema).fit(data.ratings, data.lots)


def _assert_same_model(a, b):
    for name in ("item_blocks_", "user_blocks_", "map_", "prior_precision_"):
        x, y = getattr(a, name), getattr(b, name)
        assert np.abs(x - y).max() <= 1e-9 * max(1.0, np.abs(x).max()), name
    assert abs(a.metrics_["objective"] - b.metrics_["objective"]) <= 1e-9 * a.metrics_["objective"]
    assert a.sigma2_ == pytest.approx(b.sigma2_, rel=1e-9)
    assert a.sigma2_new_ == pytest.approx(b.sigma2_new_, rel=1e-9)
    assert a.lam_map_ == b.lam_map_


def test_cluster_trainer_equals_local(cluster, data, local_model, monkeypatch):
    c, _ = cluster
    reductions = []
    original = ClusterRatingData.map_rhs
    monkeypatch.setattr(ClusterRatingData, "map_rhs", lambda self, *a: reductions.append(1) or original(self, *a))
    # the penalty search travels to a worker: a call recorded here would mean it ran on the client
    import hybrid.estimator.model as model_module
    searched_here = []
    search = model_module.choose_penalties
    monkeypatch.setattr(model_module, "choose_penalties",
                        lambda *a, **k: searched_here.append(1) or search(*a, **k))
    remote = HybridFactorModel(**FIT, schema=data.schema).fit(
        data.ratings, data.lots, engine=Engine("dask", c.scheduler_address, partitions=4))
    _assert_same_model(local_model, remote)
    # the map steps went through the tree reduction on the workers (one per epoch at least)
    assert len(reductions) >= FIT["epochs"]
    assert searched_here == [] and [p for p, _ in remote.penalty_path_] == [p for p, _ in local_model.penalty_path_]


def test_cluster_trainer_with_bias_weighting_equals_local(cluster, data):
    # one prior weight per item and coordinate group: each group's map reduced on the workers
    c, _ = cluster
    fit = {**FIT, "epochs": 4, "map_weighting": "bias", "weight_half": 3.0}
    local = HybridFactorModel(**fit, schema=data.schema).fit(data.ratings, data.lots)
    remote = HybridFactorModel(**fit, schema=data.schema).fit(
        data.ratings, data.lots, engine=Engine("dask", c.scheduler_address, partitions=3))
    _assert_same_model(local, remote)


def test_cluster_plan_and_scores_are_identical(cluster, data, local_model):
    _, client = cluster
    here = plan(local_model, k=5, budget=60, per_user=2, draws=16)
    there = plan(local_model, k=5, budget=60, per_user=2, draws=16, client=client)
    pd.testing.assert_frame_equal(here.items, there.items, check_exact=True)
    pd.testing.assert_frame_equal(here.asks, there.asks, check_exact=True)
    assert len(here.asks) > 0
    new = data.new_lots
    local = pd.concat(score_items(local_model, new, chunk=3))
    remote = pd.concat(score_items(local_model, new, chunk=3, client=client, window=2))
    pd.testing.assert_frame_equal(local.reset_index(drop=True), remote.reset_index(drop=True), check_exact=True)


def test_a_worker_killed_during_training_changes_nothing(data, local_model):
    with _cluster() as c, distributed.Client(c) as client:
        pids = list(client.run(os.getpid).values())
        killed = []

        def kill_soon(record):
            if record["epoch"] == 2 and not killed:  # lands inside the next epoch's tasks
                killed.append(pids[0])
                threading.Timer(0.05, os.kill, (pids[0], signal.SIGKILL)).start()

        remote = HybridFactorModel(**FIT, schema=data.schema).fit(
            data.ratings, data.lots, on_epoch=kill_soon, engine=Engine("dask", c.scheduler_address, partitions=4))
        _assert_same_model(local_model, remote)
        time.sleep(0.2)
        with pytest.raises(ProcessLookupError):
            os.kill(killed[0], 0)   # the worker really died (its nanny started another)
        assert killed[0] not in client.run(os.getpid).values()


_PEAK = r"""
import json, sys
import numpy as np
sys.path.insert(0, {bench!r})
from bench_train import synthetic
from hybrid.core.steps import Problem, RatingData
from hybrid.core.train import fit_factors
def run(n):
    u, i, r, A = synthetic(20000, 5000, n)
    data = RatingData.from_codes(u, i, r, 20000, 5000)
    fit_factors(Problem.of(data, A, lam_user=5.0, lam_map=1.0), rank=16, lam_item=5.0, epochs=2, tol=0.0, seed=0)
run(5000)  # warm: imports and buffers, as on the workers below
sys.path.insert(0, {tests!r})
from test_cluster import _reset_peak, _peak_rss
before = _reset_peak()
run(600000)
print(json.dumps(_peak_rss() - before))
"""


def _reset_peak():
    """Current resident memory, after resetting the peak (Linux: clear_refs 5).

    The process's own peak (VmHWM) is read, not ru_maxrss: a spawned worker's
    ru_maxrss keeps the peak of the process it was forked from.
    """
    import psutil
    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")
    return psutil.Process().memory_info().rss


def _peak_rss():
    with open("/proc/self/status") as fh:
        kb = next(int(line.split()[1]) for line in fh if line.startswith("VmHWM:"))
    return kb * 1024


def test_worker_memory_is_a_fraction_of_one_process():
    # the same fit in one process and on two workers with 8 partitions per side:
    # each worker's growth in peak memory stays under 40% of the single process's (measured: about 15%)
    bench = os.path.join(os.path.dirname(__file__), "bench")
    single = int(subprocess.run([sys.executable, "-c", _PEAK.format(bench=bench, tests=os.path.dirname(__file__))],
                                capture_output=True,
                                text=True, check=True).stdout.strip().splitlines()[-1])
    sys.path.insert(0, bench)
    from bench_train import synthetic

    from hybrid.core.steps import Problem
    from hybrid.core.train import fit_factors

    def run(client, n):
        u, i, r, A = synthetic(20000, 5000, n)
        data = ClusterRatingData.from_codes(client, u, i, r, 20000, 5000, partitions=8, A=A)
        fit_factors(Problem.of(data, A, lam_user=5.0, lam_map=1.0), rank=16, lam_item=5.0, epochs=2, tol=0.0,
                    seed=0)
        data.close()

    with _cluster() as c, distributed.Client(c) as client:
        run(client, 5000)  # warm: the workers import what a fit needs
        before = client.run(_reset_peak)
        run(client, 600000)
        peak = client.run(_peak_rss)
    growth = {w: peak[w] - before[w] for w in peak}
    print(f"single process +{single / 2**20:.0f} MB; workers +"
          + ", ".join(f"{g / 2**20:.0f} MB" for g in growth.values()))
    assert max(growth.values()) < 0.4 * single, (single, growth)


def test_commands_run_on_the_cluster_with_the_same_outputs(cluster, tmp_path):
    # train with --engine dask (a local cluster the command starts and stops), then
    # plan and score on the test cluster by --address: files equal the local ones
    from typer.testing import CliRunner

    from hybrid.cli import app
    from hybrid.datasets.club import write_samples
    c, _ = cluster
    runner = CliRunner()
    run = lambda *a: runner.invoke(app, [str(x) for x in a])
    paths = write_samples(tmp_path, tasting_club(n_members=300, n_lots=60, n_new=5, seed=4))
    cfg = tmp_path / "coffee.toml"
    cfg.write_text(open("configs/coffee.toml").read().replace("epochs = 60 ", "epochs = 4 "))
    for where, flags in (("here", []), ("there", ["--engine", "dask", "--partitions", "3"])):
        r = run("train", paths["ratings"], paths["lots"], "--config", cfg, "--out", tmp_path / f"{where}.hybrid",
                "--quiet", *flags)
        assert r.exit_code == 0, r.output
    here, there = (load(tmp_path / f"{w}.hybrid") for w in ("here", "there"))
    _assert_same_model(here, there)
    # where it ran is provenance only: the same settings, and the started cluster's address kept
    assert there.get_params() == here.get_params()
    assert there.metrics_["engine"]["kind"] == "dask" and there.metrics_["engine"]["partitions"] == 3
    assert here.metrics_["engine"] == {"kind": "local", "address": None, "partitions": 8, "shared_dir": None}
    for where, flags in (("here", []), ("there", ["--address", c.scheduler_address])):
        r = run("plan", tmp_path / "here.hybrid", "--budget", 40, "--out", tmp_path / f"plan-{where}.csv",
                "--asks", tmp_path / f"asks-{where}.csv", *flags)
        assert r.exit_code == 0, r.output
        r = run("score", tmp_path / "here.hybrid", paths["new_lots"], "--out", tmp_path / f"score-{where}.csv",
                "--chunk", 2, *flags)
        assert r.exit_code == 0, r.output
    for name in ("plan", "asks", "score"):
        assert (tmp_path / f"{name}-here.csv").read_bytes() == (tmp_path / f"{name}-there.csv").read_bytes()
    r = run("plan", tmp_path / "here.hybrid", "--out", tmp_path / "p.csv", "--engine", "spark")
    assert r.exit_code == 2 and "engine.kind" in r.stderr and "Traceback" not in r.output
    r = run("plan", tmp_path / "here.hybrid", "--out", tmp_path / "p.csv", "--address", "tcp://127.0.0.1:9")
    assert r.exit_code == 2 and "cannot reach the Dask scheduler" in r.stderr, r.output
    assert len(r.stderr.strip().splitlines()) == 1



def test_the_local_engine_needs_no_dask():
    # the extra is optional: nothing but the cluster engine imports it
    code = ("import sys, hybrid, hybrid.cli, hybrid.engines.cluster, hybrid.estimator.batch, hybrid.planning.planner; "
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_without_the_extra_the_dask_engine_says_what_to_install(monkeypatch, data):
    from hybrid.common.errors import InputError
    monkeypatch.setitem(sys.modules, "distributed", None)   # as if not installed
    with pytest.raises(InputError, match=r"from the clone: pip install -e '\.\[dask\]'"):
        HybridFactorModel(**FIT, schema=data.schema).fit(data.ratings, data.lots, engine=Engine("dask"))


def test_every_rating_data_method_matches_the_local_one(cluster):
    # the contract the trainer relies on: ClusterRatingData's methods give RatingData's answers
    from hybrid.core.blocks import design
    from hybrid.core.steps import Factors, RatingData
    _, client = cluster
    rng = np.random.default_rng(5)
    n_users, n_items, d = 70, 40, 4
    key = np.unique(rng.integers(0, n_users * n_items, 900))
    u, i = key // n_items, key % n_items
    r = rng.integers(1, 6, len(key)).astype(float)
    here = RatingData.from_codes(u, i, r, n_users, n_items)
    there = ClusterRatingData.from_codes(client, u, i, r, n_users, n_items, partitions=3)
    try:
        F = Factors(rng.normal(size=(n_users, d)), rng.normal(size=(n_items, d)), np.zeros((1, d)), np.eye(d))
        assert there.nnz == here.nnz and there.shape == here.shape
        assert np.array_equal(there.item_counts(), here.item_counts())
        Fe, off = design(F.item[:, 1:], F.item[:, 0]), F.item[:, 0]
        prior, weight = rng.normal(size=(n_users, d)), rng.uniform(0.5, 2, n_users)
        for a, b in zip(here.solve("user", Fe, off, 2 * np.eye(d), prior, weight, with_edf=True),
                        there.solve("user", Fe, off, 2 * np.eye(d), prior, weight, with_edf=True)):
            assert np.allclose(a, b, rtol=1e-12, atol=1e-12)
        assert there.sse(F) == pytest.approx(here.sse(F), rel=1e-12)
        for a, b in zip(here.rater_sums(F.user), there.rater_sums(F.user)):
            assert np.allclose(a, b, rtol=1e-12, atol=1e-12)
        members = rng.random(n_items) < 0.5
        assert np.allclose(there.leverage(Fe, off, 3.0, members), here.leverage(Fe, off, 3.0, members))
        held = np.array([3, 17, 29])
        a, b = here.without(held), there.without(held)
        assert b.nnz == a.nnz and np.array_equal(b.item_counts(), a.item_counts())
        # a view loads a side only when asked for it (a held-out fold solves users alone)
        assert b.loaded_sides == ()
        assert np.allclose(a.solve("user", Fe, off, np.eye(d))[0], b.solve("user", Fe, off, np.eye(d))[0],
                           rtol=1e-12, atol=1e-12)
        assert b.loaded_sides == ("user",)
        Fu = design(F.user[:, 1:], F.user[:, 0])
        assert np.allclose(a.solve("item", Fu, F.user[:, 0], np.eye(d))[0],
                           b.solve("item", Fu, F.user[:, 0], np.eye(d))[0], rtol=1e-12, atol=1e-12)
        rows = np.array([30, 2, 17])
        assert (there.item_rows(rows) != here.item_rows(rows)).nnz == 0
    finally:
        there.close()
