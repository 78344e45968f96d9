"""Type stubs of the compiled extension ``ballast._native`` (the public API is in ``ballast``)."""

from os import PathLike
from typing import Any, Optional, Sequence, Tuple, Union

import numpy as np
import numpy.typing as npt

_Path = Union[str, "PathLike[str]"]
_F64 = npt.NDArray[np.float64]
_I64 = npt.NDArray[np.int64]

__version__: str

class InputError(ValueError):
    """Bad input or a bad setting (exit code 2 on the command line)."""

class FileError(OSError):
    """A file could not be read or written (exit code 2 on the command line)."""

class Model:
    @staticmethod
    def load(path: _Path, allow_large: bool = False) -> "Model": ...
    @staticmethod
    def from_json(text: str) -> "Model": ...
    def to_json(self) -> str: ...
    def save(self, path: _Path) -> None: ...
    def logits(self, x: _F64) -> _F64: ...
    def predict(self, x: _F64) -> _I64: ...
    def with_input_range(self, lower: Sequence[float], upper: Sequence[float]) -> "Model": ...
    @property
    def input_range(self) -> Tuple[list[float], list[float]]: ...
    @property
    def input_dim(self) -> int: ...
    @property
    def classes(self) -> list[str]: ...
    @property
    def feature_names(self) -> list[str]: ...
    @property
    def names_inputs(self) -> bool: ...
    @property
    def name(self) -> Optional[str]: ...
    @property
    def parameter_count(self) -> int: ...
    @property
    def path(self) -> Optional[str]: ...

class Requirement:
    def __init__(
        self,
        model: Model,
        *,
        eps: Optional[Sequence[float]] = None,
        tolerances_file: Optional[_Path] = None,
        tolerances: Optional[Sequence[Tuple[str, float]]] = None,
        norm: Optional[str] = None,
        floor: Optional[float] = None,
        confidence: Optional[float] = None,
        min_clean_accuracy: Optional[float] = None,
        forbid_into: Optional[Sequence[str]] = None,
        forbid_from: Optional[Sequence[str]] = None,
        requirement: Optional[_Path] = None,
        one_epsilon: bool = False,
    ) -> None: ...
    def describe(self, model: Model) -> str: ...
    @property
    def epsilons(self) -> list[float]: ...
    @property
    def floor(self) -> Optional[float]: ...
    @property
    def norm(self) -> str: ...

class Report:
    @staticmethod
    def load(path: _Path) -> "Report": ...
    def to_json_string(self) -> str: ...
    def to_json(self, path: _Path) -> None: ...
    def sheet(self, folder: _Path) -> Tuple[str, str]: ...
    def summary_json(self) -> str: ...
    @property
    def verdict(self) -> str: ...
    @property
    def exit_code(self) -> int: ...
    @property
    def status(self) -> list[str]: ...
    @property
    def stage(self) -> list[str]: ...
    @property
    def margin_lower(self) -> _F64: ...
    @property
    def radius(self) -> _F64: ...
    @property
    def seconds(self) -> _F64: ...
    @property
    def index_label_predicted(self) -> Tuple[_I64, _I64, _I64]: ...
    def counterexample_arrays(self) -> Tuple[_I64, _I64, _F64]: ...
    @property
    def complete(self) -> bool: ...

class RetrainResult:
    @property
    def verdict(self) -> str: ...
    @property
    def exit_code(self) -> int: ...
    def epochs_json(self) -> str: ...
    def rounds_json(self) -> str: ...
    @property
    def report(self) -> Report: ...

def certify(
    model: Model,
    x: _F64,
    y: _I64,
    requirement: Requirement,
    *,
    budget: float = 0.0,
    seed: int = 0,
    radius: bool = False,
    attack: bool = True,
    out_of_range: str = "error",
) -> Report: ...
def attack(
    model: Model,
    x: _F64,
    y: _I64,
    requirement: Requirement,
    *,
    steps: int = 100,
    restarts: int = 5,
    seed: int = 0,
    precision: str = "single",
    out_of_range: str = "error",
) -> Tuple[_I64, _I64, _F64]: ...
def retrain(
    model: Model,
    x: _F64,
    y: _I64,
    requirement: Requirement,
    settings: dict[str, Any],
    *,
    validation: Optional[Tuple[_F64, _I64]] = None,
    acceptance: Optional[Tuple[_F64, _I64]] = None,
    out_of_range: str = "error",
) -> Tuple[Model, RetrainResult]: ...
