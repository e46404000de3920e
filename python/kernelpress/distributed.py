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

Refinement (:func:`refine`) shards the same way: each worker holds its shards' rows and the
teacher's decisions on them (a :class:`kernelpress.RefineRows`, built once), and the client
drives the passes — for every minibatch it sends the current state (the program's
parameters and the head) to every shard and adds the gradients they return, in shard
order; after every pass it merges their statistics and refits the head. What crosses the
network per minibatch is the state (Hadamard D = 4096: about 0.4 MB with 10 outputs;
Nyström or dense Fourier: ``D × d`` float64 values, 26 MB at ``D = 4096, d = 784``) and one
gradient per shard of the same size, so refinement over a cluster pays when the shards'
rows, not the map, are what is large.
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


def _hold(exact, rows, first_row):
    return _kp.RefineRows(exact, rows, first_row=first_row)


def _answer(held, job, state, batch):
    return held.answer(job, state, batch)


def refine(
    client: Any,
    exact: "_kp.ExactModel",
    shards: Sequence[Tuple[Any, int]],
    *,
    method: str,
    features: int,
    passes: int,
    seed: int = 0,
    landmark_rule: str = "uniform",
    rate: float = 3e-3,
    batch: int = 500,
    patience: int = 2,
    eval: Optional[Any] = None,
    eval_labels: Optional[Sequence[str]] = None,
) -> "_kp.CompiledModel":
    """Refines a ``method``/``features`` map of ``exact`` over ``shards`` — ``(rows,
    first_row)`` pairs as for :func:`distill` — held on the workers of ``client``; the
    passes are driven here. Equals ``kp.compact(exact, all_rows, method, features,
    seed=seed, bandwidth_search=False, refine=passes)`` up to the rounding of the sums
    (1e-9 relative in decision values, tested) for the same pass count. The map must be
    the same on every shard: a data-independent method, or Nyström with
    ``landmark_rule="support"``."""
    model = client.scatter(exact, broadcast=True)
    held = [
        client.submit(_hold, model, rows, int(first), pure=False) for rows, first in shards
    ]
    if not held:
        raise _kp.Error("refine: no shards given")

    def each(job, state, rows):
        return client.gather(
            [client.submit(_answer, h, job, state, rows, pure=False) for h in held]
        )

    try:
        return _kp.refine_over(
            exact,
            each,
            method,
            features,
            passes=passes,
            seed=seed,
            landmark_rule=landmark_rule,
            rate=rate,
            batch=batch,
            patience=patience,
            eval=eval,
            eval_labels=list(eval_labels) if eval_labels is not None else None,
        )
    finally:
        client.cancel(held)
