"""Sharded distillation in process and on a Dask cluster equals the single compile."""

import pickle

import numpy as np
import pytest

import kernelpress as kp


def shards_of(x, cuts):
    bounds = [0, *cuts, len(x)]
    return [(x[a:b], a) for a, b in zip(bounds, bounds[1:])]


def test_in_process_shards_equal_the_single_compile(root, exact, test_rows):
    x, _, _ = kp.read_data(root / "models" / "pump_calib.csv", target="condition")
    single = kp.compact(exact, x, "hadamard", 512, seed=5, bandwidth_search=False)
    parts = [kp.shard_statistics(exact, rows, "hadamard", 512, first_row=f, seed=5)
             for rows, f in shards_of(x, [999, 1000, 4321])]
    # Through pickle (as a cluster would ship them), merged in scrambled order.
    parts = [pickle.loads(pickle.dumps(p)) for p in parts]
    merged = kp.merge_statistics([parts[2], parts[0], parts[3], parts[1]])
    assert merged.rows == len(x)
    c = kp.compile_from_statistics(exact, merged)
    xt = test_rows[0]
    assert np.abs(c.decision(xt) - single.decision(xt)).max() < 1e-9
    with pytest.raises(kp.Error, match="overlap"):
        kp.merge_statistics([parts[0], parts[0]])


def test_dask_local_cluster_equals_the_single_compile(root, exact, test_rows, tmp_path):
    distributed = pytest.importorskip("distributed")
    from kernelpress.distributed import distill

    x, _, _ = kp.read_data(root / "models" / "pump_calib.csv", target="condition")
    single = kp.compact(exact, x, "fourier", 400, seed=8, bandwidth_search=False)
    # Two shards as arrays, one as a file the workers read.
    np.save(tmp_path / "last.npy", x[6000:])
    shards = [(x[:2500], 0), (x[2500:6000], 2500), (str(tmp_path / "last.npy"), 6000)]
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        with distributed.Client(cluster) as client:
            c = distill(client, exact, shards, method="fourier", features=400, seed=8,
                        eval=test_rows[0], eval_labels=None)
            workers = list(client.scheduler_info()["workers"])
    assert len(workers) == 2
    xt = test_rows[0]
    assert np.abs(c.decision(xt) - single.decision(xt)).max() < 1e-9
    assert c.report["n_rows"] == len(xt)


def test_refinement_over_shards_in_process_equals_one_process(root, exact, test_rows):
    x, _, _ = kp.read_data(root / "models" / "pump_calib.csv", target="condition")
    x = x[:3000]
    single = kp.compact(exact, x, "hadamard", 256, seed=3, bandwidth_search=False, refine=2)
    held = [kp.RefineRows(exact, x[a:b], first_row=a) for a, b in [(0, 1234), (1234, 3000)]]
    # Through pickle, as a cluster would move them.
    held = [pickle.loads(pickle.dumps(h)) for h in held]
    asked, states = [], []

    def each(job, state, batch):
        asked.append(job)
        states.append(state)
        state = pickle.loads(pickle.dumps(state))
        return [pickle.loads(pickle.dumps(h.answer(job, state, batch))) for h in held]

    many = kp.refine_over(exact, each, "hadamard", 256, passes=2, seed=3)
    xt = test_rows[0]
    a, b = single.decision(xt), many.decision(xt)
    assert np.abs(a - b).max() <= 1e-9 * np.abs(a).max()
    assert many.fit["refine"]["sharded"] is True
    assert many.fit["refine"]["passes"] == single.fit["refine"]["passes"]
    assert {"statistics", "gradient", "audit"} <= set(asked)
    # The comparison can fail: one shard missing changes the model.
    part = kp.refine_over(exact, lambda j, s, r: [held[0].answer(j, s, r)], "hadamard", 256,
                          passes=2, seed=3)
    assert np.abs(a - part.decision(xt)).max() > 1e-6 * np.abs(a).max()
    with pytest.raises(kp.Error, match="unknown request"):
        held[0].answer("gradients", states[0], None)


def test_dask_refinement_equals_one_process(root, exact, test_rows, tmp_path):
    distributed = pytest.importorskip("distributed")
    from kernelpress.distributed import refine

    x, _, _ = kp.read_data(root / "models" / "pump_calib.csv", target="condition")
    x = x[:3000]
    single = kp.compact(exact, x, "hadamard", 256, seed=3, bandwidth_search=False, refine=2)
    np.save(tmp_path / "last.npy", x[2000:])
    shards = [(x[:900], 0), (x[900:2000], 900), (str(tmp_path / "last.npy"), 2000)]
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        with distributed.Client(cluster) as client:
            many = refine(client, exact, shards, method="hadamard", features=256, passes=2,
                          seed=3, eval=test_rows[0])
            workers = list(client.scheduler_info()["workers"])
    assert len(workers) == 2
    xt = test_rows[0]
    a, b = single.decision(xt), many.decision(xt)
    assert np.abs(a - b).max() <= 1e-9 * np.abs(a).max()
    assert many.fit["refine"]["passes"] == single.fit["refine"]["passes"]
    assert many.report["n_rows"] == len(xt)
