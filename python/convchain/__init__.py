"""convchain from Python: run scenarios in memory (the report as a dict, the waveforms as numpy arrays) and
spread a sweep's points or a Monte-Carlo study's runs over any executor (``client.map(convchain.point, ...)``,
``client.map(convchain.montecarlo_run, ...)``).

The engine releases the GIL while it runs, so threads and distributed workers run points in parallel.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any, Dict, Iterable, List, Mapping, Optional, Sequence, Tuple, Union

from . import _convchain
from ._convchain import METRIC_COLUMNS, MONTECARLO_METRICS, RunError, ScenarioError

# The CLI's exit categories (README "Exit codes"): bad input 2, run failure 1.
ScenarioError.exit_code = 2
RunError.exit_code = 1

__all__ = [
    "Run",
    "run",
    "point",
    "sweep_points",
    "write_sweep",
    "montecarlo_runs",
    "montecarlo_run",
    "write_montecarlo",
    "ScenarioError",
    "RunError",
    "METRIC_COLUMNS",
    "MONTECARLO_METRICS",
]

Scenario = Union[str, os.PathLike]


def _source(scenario: Optional[Scenario]) -> Tuple[Optional[str], Optional[str], Optional[str]]:
    """(path, text, base_dir): a path when `scenario` names an existing file, else TOML text."""
    if scenario is None:
        return None, None, None
    if isinstance(scenario, os.PathLike):
        return os.fspath(scenario), None, None
    if "\n" not in scenario and Path(scenario).is_file():
        return scenario, None, None
    if "\n" not in scenario and scenario.endswith(".toml"):
        # A path that does not exist: let the engine report it like the CLI does.
        return scenario, None, None
    return None, scenario, os.getcwd()


def _overrides(overrides: Optional[Mapping[str, float]], seed: Optional[int] = None) -> List[Tuple[str, float]]:
    ov = [(str(k), float(v)) for k, v in (overrides or {}).items()]
    if seed is not None:
        ov.append(("simulation.seed", float(int(seed))))
    return ov


class Run:
    """One run of a scenario, kept in memory.

    Attributes:
        report: dict equal to the ``report.json`` that ``convchain run`` writes for the same scenario.
        waveforms: dict of numpy arrays at the full grid rate: ``time_s``, one ``<stream>_v`` column per analog
            stream and one column per code stream (the columns of ``waveforms.csv`` with ``--full-waveforms``).
        codes: the ADC record the meters use (numpy uint32 array), or None when the chain has no ADC.
    """

    __slots__ = ("report", "waveforms", "codes")

    def __init__(self, report: Dict[str, Any], waveforms: Dict[str, Any], codes: Any) -> None:
        self.report = report
        self.waveforms = waveforms
        self.codes = codes

    def __repr__(self) -> str:
        name = self.report.get("scenario", {}).get("name", "?")
        return f"<convchain.Run of {name!r}: {len(self.waveforms)} waveform columns>"


def run(
    scenario: Optional[Scenario] = None,
    *,
    overrides: Optional[Mapping[str, float]] = None,
    seed: Optional[int] = None,
    wav: bool = True,
) -> Run:
    """Run a scenario (a file's path or TOML text; None = the embedded demo) and measure it.

    ``overrides`` maps key paths (``source.frequency``, ``stage.3.slew_rate``) to values in SI base units;
    ``seed`` sets ``simulation.seed``. ``wav=False`` skips the listening files' figures (the report then has no
    ``listening`` object, as ``convchain run --no-wav``).

    Raises ScenarioError (bad input, exit category 2) or RunError (exit category 1) with the CLI's message.
    """
    path, text, base = _source(scenario)
    report, waveforms, codes = _convchain.run_scenario(path, text, base, _overrides(overrides, seed), wav)
    return Run(json.loads(report), waveforms, codes)


def point(scenario: Scenario, overrides: Optional[Mapping[str, float]] = None) -> Dict[str, Optional[float]]:
    """One study point: the numbers of a ``convchain sweep`` row for the scenario with ``overrides``.

    Returns a dict of ``frequency_requested_hz``, ``frequency_used_hz``, every column of METRIC_COLUMNS (None
    when not measured) and ``error`` (None, or why the point could not be simulated). Bad input raises
    ScenarioError.
    """
    path, text, base = _source(scenario)
    return _convchain.point(path, text, base, _overrides(overrides))


def sweep_points(vary: Union[str, Sequence[str]], points: int, *, log: bool = False) -> List[Tuple[int, Dict[str, float]]]:
    """The points of a sweep in grid order (the last key varies fastest), as (index, overrides).

    ``vary`` is one or more ``KEY=FROM..TO`` as ``convchain sweep --vary`` takes them.
    """
    if isinstance(vary, str):
        vary = [vary]
    return [(i, dict(ov)) for i, ov in _convchain.sweep_points(list(vary), int(points), bool(log))]


def write_sweep(
    scenario: Scenario,
    vary: Union[str, Sequence[str]],
    points: int,
    results: Iterable[Tuple[int, Mapping[str, Any]]],
    out: Union[str, os.PathLike],
    *,
    log: bool = False,
    shard: str = "1/1",
    force: bool = False,
) -> None:
    """Write a sweep's folder (``rows.json``, ``sweep.csv``, ``sweep.json``, plots) from points computed
    elsewhere: ``results`` holds (index, the dict point() returned). With ``shard="K/N"`` the folder is one
    shard's, which ``convchain merge`` joins with the others.
    """
    if isinstance(vary, str):
        vary = [vary]
    path, text, base = _source(scenario)
    _convchain.write_sweep(
        path, text, base, list(vary), int(points), bool(log),
        [(int(i), dict(d)) for i, d in results], os.fspath(out), shard, force,
    )


def _band(audio_band_hz: Optional[Tuple[float, float]]) -> Optional[Tuple[float, float]]:
    if audio_band_hz is None:
        return None
    low, high = audio_band_hz
    return float(low), float(high)


def _seed(seed: Optional[int]) -> Optional[int]:
    return None if seed is None else int(seed)


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
) -> List[Tuple[int, int]]:
    """The runs of a Monte-Carlo study (of one shard with ``shard="K/N"``) as (index, the run's seed).

    The options are those of ``convchain montecarlo``: ``runs`` (``--runs``), ``seed`` the base seed (``--seed``;
    None = the scenario's ``simulation.seed``), ``require`` texts such as ``"output.enob_bits>=7.5"``
    (``--require``), ``static_only`` / ``no_static`` (``--static-only`` / ``--no-static``) and ``audio_band_hz``
    as (low, high) in Hz (``--audio-band``; ``(20.0, 20000.0)`` is ``--audio``). The study is checked first, so
    bad input raises ScenarioError here rather than on the workers. Give each index to montecarlo_run().
    """
    path, text, base = _source(scenario)
    return _convchain.montecarlo_runs(
        path, text, base, int(runs), _seed(seed), [str(r) for r in require], bool(static_only),
        bool(no_static), _band(audio_band_hz), str(shard),
    )


def montecarlo_run(
    scenario: Scenario,
    index: int,
    *,
    seed: Optional[int] = None,
    static_only: bool = False,
    no_static: bool = False,
    audio_band_hz: Optional[Tuple[float, float]] = None,
) -> Dict[str, Any]:
    """Run ``index`` of a Monte-Carlo study: the numbers of that row of ``convchain montecarlo``'s output.

    Returns a dict in the order of ``montecarlo.csv``'s columns: ``index``, ``seed`` (the run's seed), one entry
    per ``[spread]`` path (the drawn value, SI units), every name of MONTECARLO_METRICS (None when not measured),
    the audio figures with ``audio_band_hz``, and ``error`` (None, or why the run failed: a failed run is a row,
    not an exception). ``seed``, ``static_only``, ``no_static`` and ``audio_band_hz`` must be the study's (see
    montecarlo_runs()). The row depends only on the scenario, these options and ``index``, so runs can be
    computed in any order on any machine. Bad input raises ScenarioError.
    """
    path, text, base = _source(scenario)
    return _convchain.montecarlo_run(
        path, text, base, int(index), _seed(seed), bool(static_only), bool(no_static), _band(audio_band_hz),
    )


def write_montecarlo(
    scenario: Scenario,
    results: Iterable[Mapping[str, Any]],
    out: Union[str, os.PathLike],
    *,
    runs: int,
    seed: Optional[int] = None,
    require: Sequence[str] = (),
    shard: str = "1/1",
    static_only: bool = False,
    no_static: bool = False,
    audio_band_hz: Optional[Tuple[float, float]] = None,
    force: bool = False,
) -> Dict[str, Any]:
    """Write a Monte-Carlo study's folder (``rows.json``, ``montecarlo.csv``, ``montecarlo.json``, histograms)
    from runs computed elsewhere: ``results`` holds the dicts montecarlo_run() returned, one for every run of
    the study (of ``shard``), in any order. The options are the study's, as for montecarlo_runs(); with
    ``shard="K/N"`` the folder is one shard's, which ``convchain merge`` joins with the others. ``force``
    replaces another study's files in ``out``.

    Returns the summary that ``montecarlo.json`` holds, as a dict. A missing, repeated or foreign run raises
    ScenarioError naming it.
    """
    path, text, base = _source(scenario)
    summary = _convchain.write_montecarlo(
        path, text, base, int(runs), _seed(seed), [str(r) for r in require], bool(static_only),
        bool(no_static), _band(audio_band_hz), [dict(r) for r in results], os.fspath(out), str(shard),
        bool(force),
    )
    return json.loads(summary)
