import os
from typing import Any, Dict, Iterable, List, Mapping, Optional, Sequence, Tuple, Union

import numpy as np
import numpy.typing as npt

Scenario = Union[str, os.PathLike[str]]
METRIC_COLUMNS: List[str]
MONTECARLO_METRICS: List[str]

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
def montecarlo_runs(
    scenario: Scenario,
    *,
    runs: int,
    seed: Optional[int] = None,
    require: Sequence[str] = (),
    shard: str = "1/1",
    static_only: bool = False,
    no_static: bool = False,
    audio_band_hz: Optional[Tuple[float, float]] = None,
) -> List[Tuple[int, int]]: ...
def montecarlo_run(
    scenario: Scenario,
    index: int,
    *,
    seed: Optional[int] = None,
    static_only: bool = False,
    no_static: bool = False,
    audio_band_hz: Optional[Tuple[float, float]] = None,
) -> Dict[str, Any]: ...
def write_montecarlo(
    scenario: Scenario,
    results: Iterable[Mapping[str, Any]],
    out: Union[str, os.PathLike[str]],
    *,
    runs: int,
    seed: Optional[int] = None,
    require: Sequence[str] = (),
    shard: str = "1/1",
    static_only: bool = False,
    no_static: bool = False,
    audio_band_hz: Optional[Tuple[float, float]] = None,
    force: bool = False,
) -> Dict[str, Any]: ...
