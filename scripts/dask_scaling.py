"""Wall time of the sharded statistics phase on a Dask LocalCluster with one and with two
worker processes, and each worker's peak memory (README, "Scaling").

Run: target/pyenv/bin/python scripts/dask_scaling.py TEACHER CALIB.csv TARGET ROWS SHARDS METHOD FEATURES
e.g.  ... /tmp/fm/svm10k.safetensors /tmp/fm/train_all.csv label 20000 4 hadamard 2048
Each worker runs with RAYON_NUM_THREADS=1 (one core per worker process).
"""

import json
import os
import resource
import sys
import tempfile
import time

import numpy as np

import kernelpress as kp
from kernelpress.distributed import shard_futures


def peak_rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main():
    teacher, calib, target, rows, shards, method, features = sys.argv[1:8]
    rows, shards, features = int(rows), int(shards), int(features)
    import distributed

    exact = kp.ExactModel.load(teacher)
    x, _, _ = kp.read_data(calib, target=target)
    x = x[:rows]
    tmp = tempfile.mkdtemp()
    bounds = np.linspace(0, rows, shards + 1).astype(int)
    parts = []
    for i, (a, b) in enumerate(zip(bounds, bounds[1:])):
        p = os.path.join(tmp, f"shard{i}.npy")
        np.save(p, x[a:b])
        parts.append((p, int(a)))
    out = {"rows": rows, "shards": shards, "method": method, "features": features}
    os.environ["RAYON_NUM_THREADS"] = "1"
    for workers in (1, 2):
        with distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                      host="127.0.0.1", dashboard_address=None) as cluster:
            with distributed.Client(cluster) as client:
                client.run(lambda: os.environ.setdefault("RAYON_NUM_THREADS", "1"))
                t0 = time.perf_counter()
                stats = shard_futures(client, exact, parts, method=method, features=features, seed=1).result()
                t1 = time.perf_counter()
                mem = client.run(peak_rss_mb)
        assert stats.rows == rows
        out[f"seconds_{workers}_worker"] = round(t1 - t0, 2)
        out[f"peak_mb_per_worker_{workers}"] = sorted(round(v) for v in mem.values())
    out["speedup"] = round(out["seconds_1_worker"] / out["seconds_2_worker"], 2)
    print(json.dumps(out))


if __name__ == "__main__":
    main()
