"""kernelpress: compile kernel machines into compact random-feature models.

A kernel SVM or kernel ridge model (an :class:`ExactModel`) compares every input with every
support vector. :func:`compact` turns it into a :class:`CompiledModel` — a fixed-size
feature program plus a linear head — whose cost does not depend on the number of support
vectors, and measures how far it is from the exact model::

    import kernelpress as kp
    exact = kp.ExactModel.load("models/pump_svm.safetensors")
    compiled = kp.compact(exact, "models/pump_calib.csv", method="nystrom", features=1024)

``compiled.report`` holds the agreement with the exact model on calibration rows that
were never fitted on. An approximated model changes some decisions: validate it on your
own data before any high-stakes use. :func:`guard` sends the rows it is unsure of to the
exact model (a :class:`GuardedModel`), and :func:`export` writes either kind.

Distillation over many rows can be sharded: :func:`shard_statistics` on each shard,
:func:`merge_statistics`, then :func:`compile_from_statistics`;
:mod:`kernelpress.distributed` runs the same on a Dask cluster. Refinement shards too:
each shard holds its rows as :class:`RefineRows` and :func:`refine_over` drives the passes
(``kernelpress.distributed.refine`` on a Dask cluster).
"""

from ._kernelpress import (  # noqa: F401
    CompiledModel,
    Error,
    ExactModel,
    GuardedModel,
    RefineGradient,
    RefineRows,
    RefineState,
    Statistics,
    __version__,
    compact,
    compile_from_statistics,
    export,
    featurize,
    guard,
    merge_statistics,
    read_data,
    refine_over,
    report,
    shard_statistics,
)

__all__ = [
    "CompiledModel",
    "Error",
    "ExactModel",
    "GuardedModel",
    "RefineGradient",
    "RefineRows",
    "RefineState",
    "Statistics",
    "compact",
    "compile_from_statistics",
    "export",
    "featurize",
    "guard",
    "merge_statistics",
    "read_data",
    "refine_over",
    "report",
    "shard_statistics",
]
