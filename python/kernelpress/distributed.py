"""Sharded distillation on a Dask cluster.

The statistics a distillation needs (``ZᵀZ``, ``Zᵀy`` and sums over the calibration rows)
add up over rows, so each worker computes them for its shards, the workers merge them
pairwise, and the client fits the head from the merged sums::

    from dask.distributed import Client
    import kernelpress as kp
    from kernelpress.distributed import distill

    client = Client("tcp://scheduler:8786")          # or a LocalCluster
    exact = kp.ExactModel.load("teacher.safetensors")
    shards = [("calib-000.npy", 0), ("calib-001.npy", 250_000), ...]   # (rows, first row)
    compiled = distill(client, exact, shards, method="hadamard", features=4096, seed=1)

What crosses the network: the exact model once per worker (its file bytes), the map spec
(a few hundred bytes) with every task, each shard's rows only when they are given as arrays
(paths are read on the worker), and one statistics object per shard and per merge
(``4·D²`` float64 values: 537 MB at ``D = 4096``, 134 MB at ``D = 2048``).
"""

from __future__ import annotations

from typing import Any, Iterable, Optional, Sequence, Tuple

from . import _kernelpress as _kp


def _shard(exact, rows, first_row, method, features, seed, landmark_rule):
    return _kp.shard_statistics(
        exact,
        rows,
        method,
        features,
        first_row=first_row,
        seed=seed,
        landmark_rule=landmark_rule,
    )


def _merge(a, b):
    return _kp.merge_statistics([a, b])


def shard_futures(
    client: Any,
    exact: "_kp.ExactModel",
    shards: Iterable[Tuple[Any, int]],
    *,
    method: str,
    features: int,
    seed: int = 0,
    landmark_rule: str = "uniform",
):
    """Submits one statistics task per ``(rows, first_row)`` shard and merges the results
    pairwise on the workers; returns the future of the merged :class:`Statistics`.
    ``rows`` is an array (sent to the worker) or a path the workers can read."""
    model = client.scatter(exact, broadcast=True)
    parts = [
        client.submit(
            _shard, model, rows, int(first), method, features, seed, landmark_rule, pure=False
        )
        for rows, first in shards
    ]
    if not parts:
        raise _kp.Error("distill: no shards given")
    while len(parts) > 1:
        merged = [client.submit(_merge, parts[i], parts[i + 1], pure=False) for i in range(0, len(parts) - 1, 2)]
        if len(parts) % 2:
            merged.append(parts[-1])
        parts = merged
    return parts[0]


def distill(
    client: Any,
    exact: "_kp.ExactModel",
    shards: Sequence[Tuple[Any, int]],
    *,
    method: str,
    features: int,
    seed: int = 0,
    landmark_rule: str = "uniform",
    eval: Optional[Any] = None,
    eval_labels: Optional[Sequence[str]] = None,
) -> "_kp.CompiledModel":
    """Distils ``exact`` over ``shards`` — ``(rows, first_row)`` pairs, where ``first_row``
    is the global index of the shard's first row in the whole calibration set — on the
    workers of ``client`` (a ``dask.distributed.Client``) and fits the head here. Equals
    ``kp.compact(exact, all_rows, method, features, seed=seed, bandwidth_search=False)``
    up to the rounding of the sums (1e-9 in decision values, tested). With ``eval`` the
    compiled model's report is computed on those rows."""
    stats = shard_futures(
        client,
        exact,
        shards,
        method=method,
        features=features,
        seed=seed,
        landmark_rule=landmark_rule,
    ).result()
    return _kp.compile_from_statistics(
        exact, stats, eval=eval, eval_labels=list(eval_labels) if eval_labels is not None else None
    )
