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
