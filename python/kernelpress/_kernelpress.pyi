"""Type stubs of the compiled module (see the docstrings for the behaviour)."""

from os import PathLike
from typing import Any, Callable, Dict, List, Optional, Sequence, Tuple, Union

import numpy as np
import numpy.typing as npt

Rows = Union[npt.ArrayLike, str, PathLike]
"""An array of rows (n × d; 1-D is one column), or a CSV / .npy path whose columns are
matched to the model's by name."""

__version__: str

class Error(Exception):
    """Raised for every library failure. ``str(e)`` names the array or file, the row and
    field, and what was expected; ``kind`` is ``'input'``, ``'file'``, ``'numerical'``,
    ``'io'``, ``'internal'``, ``'gate'``, ``'budget'`` or ``'keep_exact'``; ``exit_code`` is
    the command-line tool's exit code for it (2 for bad input)."""

    kind: str
    exit_code: int

class ExactModel:
    """An exact kernel model.

    >>> exact = ExactModel.load("models/pump_svm.safetensors")
    >>> exact.decision(x).shape   # (rows, decision functions)
    """

    @staticmethod
    def load(path: Union[str, PathLike]) -> "ExactModel": ...
    @staticmethod
    def from_bytes(data: bytes) -> "ExactModel": ...
    @staticmethod
    def from_expansion(
        support_vectors: npt.ArrayLike,
        weights: npt.ArrayLike,
        bias: Sequence[float],
        kernel: str,
        labels: Optional[Sequence[str]] = None,
        task: Optional[str] = None,
    ) -> "ExactModel":
        """>>> m = ExactModel.from_expansion(sv, w, [0.1], "gaussian(gamma=0.5)", labels=["no", "yes"])"""
    def to_bytes(self) -> bytes: ...
    def save(self, path: Union[str, PathLike]) -> None: ...
    def decision(self, x: npt.ArrayLike) -> npt.NDArray[np.float64]: ...
    def predict(self, x: npt.ArrayLike) -> Union[List[str], npt.NDArray[np.float64]]: ...
    kernel: str
    task: str
    labels: List[str]
    input_dim: int
    outputs: int
    n_support_vectors: int
    feature_names: List[str]
    fingerprint: str

class CompiledModel:
    """A compiled model: scaling → feature program → linear head → label rule.

    >>> compiled = compact(exact, "models/pump_calib.csv", method="nystrom", features=1024)
    >>> compiled.report["agreement"]
    """

    @staticmethod
    def load(path: Union[str, PathLike]) -> "CompiledModel": ...
    @staticmethod
    def from_bytes(data: bytes) -> "CompiledModel": ...
    def to_bytes(self) -> bytes: ...
    def save(self, path: Union[str, PathLike]) -> None: ...
    def decision(self, x: npt.ArrayLike) -> npt.NDArray[np.float64]: ...
    def predict(self, x: npt.ArrayLike) -> Union[List[str], npt.NDArray[np.float64]]: ...
    def featurize(self, x: npt.ArrayLike) -> npt.NDArray[np.float64]: ...
    method: str
    features: int
    seed: int
    kernel: str
    task: str
    labels: List[str]
    input_dim: int
    parameter_bytes: int
    report: Optional[Dict[str, Any]]
    fit: Dict[str, Any]

class GuardedModel:
    """A compiled model guarded by its exact model: rows it is unsure of go to the exact model.

    >>> g = guard(compiled, exact, "models/pump_calib.csv", agreement=0.995)
    >>> s, stage = g.decision_with_stage(x)
    """

    @staticmethod
    def load(path: Union[str, PathLike]) -> "GuardedModel": ...
    @staticmethod
    def from_bytes(data: bytes) -> "GuardedModel": ...
    def to_bytes(self) -> bytes: ...
    def save(self, path: Union[str, PathLike]) -> None: ...
    def decision(self, x: npt.ArrayLike) -> npt.NDArray[np.float64]: ...
    def decision_with_stage(
        self, x: npt.ArrayLike, *, f32: bool = False
    ) -> Tuple[npt.NDArray[np.float64], List[str]]: ...
    def predict(self, x: npt.ArrayLike) -> List[str]: ...
    task: str
    labels: List[str]
    input_dim: int
    threshold: float
    rule: str
    compact: CompiledModel
    exact: ExactModel
    report: Optional[Dict[str, Any]]
    guard: Dict[str, Any]

class Statistics:
    """Distillation statistics of some calibration rows; picklable and mergeable.

    >>> s = shard_statistics(exact, rows, "hadamard", 4096, first_row=250_000, seed=1)
    """

    @staticmethod
    def from_bytes(data: bytes) -> "Statistics": ...
    @staticmethod
    def load(path: Union[str, PathLike]) -> "Statistics": ...
    def to_bytes(self) -> bytes: ...
    def save(self, path: Union[str, PathLike]) -> None: ...
    rows: int
    ranges: List[Tuple[int, int]]
    parts: Tuple[int, int, int]

class RefineState:
    """Where a refinement stands (program and head); sent to every shard with a request."""

    @staticmethod
    def from_bytes(data: bytes) -> "RefineState": ...
    def to_bytes(self) -> bytes: ...
    trained: List[str]

class RefineGradient:
    """One shard's gradient of a minibatch; picklable."""

    @staticmethod
    def from_parts(values: Any, lengths: Sequence[int]) -> "RefineGradient": ...

class RefineRows:
    """Calibration rows held for a refinement (one shard, first row ``first_row``).

    >>> rows = RefineRows(exact, "calib-001.npy", first_row=250_000)
    """

    def __init__(self, exact: ExactModel, x: Rows, *, first_row: int = 0) -> None: ...
    @staticmethod
    def from_bytes(data: bytes) -> "RefineRows": ...
    def to_bytes(self) -> bytes: ...
    range: Tuple[int, int]
    def statistics(self, state: RefineState) -> Statistics: ...
    def gradient(self, state: RefineState, batch: Sequence[int]) -> RefineGradient: ...
    def audit(self, state: RefineState) -> Tuple[float, float]: ...
    def answer(self, job: str, state: RefineState, batch: Optional[Sequence[int]] = None) -> Any: ...

def refine_over(
    exact: ExactModel,
    each: Callable[[str, RefineState, Optional[List[int]]], Sequence[Any]],
    method: str,
    features: int,
    *,
    passes: int,
    seed: int = 0,
    landmark_rule: str = "uniform",
    rate: float = 3e-3,
    batch: int = 500,
    patience: int = 2,
    eval: Optional[Rows] = None,
    eval_labels: Optional[Sequence[str]] = None,
    min_agreement: float = 0.99,
) -> CompiledModel:
    """>>> m = refine_over(exact, lambda job, st, b: [r.answer(job, st, b) for r in shards], "hadamard", 4096, passes=10)"""

def compact(
    exact: ExactModel,
    calib: Rows,
    method: str,
    features: int,
    *,
    seed: int = 0,
    landmark_rule: str = "uniform",
    bandwidth_search: bool = True,
    eval: Optional[Rows] = None,
    eval_labels: Optional[Sequence[str]] = None,
    min_agreement: float = 0.99,
    refine: Optional[int] = None,
    head_rank: Union[int, str, None] = None,
) -> CompiledModel:
    """>>> compiled = compact(exact, "models/pump_calib.csv", "hadamard", 2048, seed=1)"""

def guard(
    compiled: CompiledModel,
    exact: ExactModel,
    calib: Rows,
    *,
    agreement: Optional[float] = None,
    rate: Optional[float] = None,
    rule: Optional[str] = None,
    eval: Optional[Rows] = None,
    eval_labels: Optional[Sequence[str]] = None,
    min_agreement: float = 0.99,
) -> GuardedModel:
    """>>> g = guard(compiled, exact, "models/pump_calib.csv", agreement=0.995, eval=x_test)"""

def report(
    compiled: CompiledModel,
    exact: ExactModel,
    x: Rows,
    *,
    labels: Optional[Sequence[str]] = None,
    timing: bool = False,
    min_agreement: float = 0.99,
) -> Dict[str, Any]:
    """>>> report(compiled, exact, x_test, labels=y_test)["agreement"]"""

def featurize(
    kernel: str,
    method: str,
    features: int,
    x: npt.ArrayLike,
    *,
    seed: int = 0,
    landmark_rule: str = "uniform",
) -> npt.NDArray[np.float64]:
    """>>> z = featurize("gaussian(gamma=0.3)", "orthogonal", 2048, x, seed=7)"""

def export(
    model: Union[CompiledModel, GuardedModel],
    format: str,
    path: Union[str, PathLike],
    *,
    precision: str = "f32",
) -> Dict[str, Any]:
    """>>> export(compiled, "onnx", "model.onnx")"""

def read_data(
    path: Union[str, PathLike], target: Optional[str] = None
) -> Tuple[npt.NDArray[np.float64], List[str], Optional[List[str]]]:
    """>>> x, columns, y = read_data("models/pump_test.csv", target="condition")"""

def shard_statistics(
    exact: ExactModel,
    x: Rows,
    method: str,
    features: int,
    *,
    first_row: int = 0,
    seed: int = 0,
    landmark_rule: str = "uniform",
) -> Statistics: ...
def merge_statistics(parts: Sequence[Statistics]) -> Statistics: ...
def compile_from_statistics(
    exact: ExactModel,
    statistics: Statistics,
    *,
    eval: Optional[Rows] = None,
    eval_labels: Optional[Sequence[str]] = None,
    min_agreement: float = 0.99,
) -> CompiledModel: ...
