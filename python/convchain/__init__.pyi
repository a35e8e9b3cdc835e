import os
from typing import Any, Dict, Iterable, List, Mapping, Optional, Sequence, Tuple, Union

import numpy as np
import numpy.typing as npt

Scenario = Union[str, os.PathLike[str]]
METRIC_COLUMNS: List[str]

class ScenarioError(Exception):
    exit_code: int

class RunError(Exception):
    exit_code: int

class Run:
    report: Dict[str, Any]
    waveforms: Dict[str, npt.NDArray[Any]]
    codes: Optional[npt.NDArray[np.uint32]]

def run(
    scenario: Optional[Scenario] = None,
    *,
    overrides: Optional[Mapping[str, float]] = None,
    seed: Optional[int] = None,
    wav: bool = True,
) -> Run: ...
def point(scenario: Scenario, overrides: Optional[Mapping[str, float]] = None) -> Dict[str, Any]: ...
def sweep_points(
    vary: Union[str, Sequence[str]], points: int, *, log: bool = False
) -> List[Tuple[int, Dict[str, float]]]: ...
def write_sweep(
    scenario: Scenario,
    vary: Union[str, Sequence[str]],
    points: int,
    results: Iterable[Tuple[int, Mapping[str, Any]]],
    out: Union[str, os.PathLike[str]],
    *,
    log: bool = False,
    shard: str = "1/1",
    force: bool = False,
) -> None: ...
