"""Derived values across runs as pandas DataFrames, with errors, units and provenance."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from ._reader import DEFAULT_API_KEY_ENV
from ._runs import RunRecord, find_runs

__all__ = ["derived_table", "heating_rates", "calibrations", "particles", "PROVENANCE"]

#: The provenance columns every table starts with.
PROVENANCE = ("uid", "time", "setup", "plan_name", "campaign_id", "campaign_step",
              "campaign_attempt", "particle", "exit_status", "superseded_by")

_AXES = ("x", "y", "z")


def _with_errors(names: Sequence[str]) -> list[str]:
    return [c for n in names for c in (n, f"{n}_stderr")]


def _frame(records: Sequence[RunRecord], fields: Sequence[str] | None) -> Any:
    import pandas as pd

    if fields is None:
        fields = []
        for r in records:
            fields += [k for k in r.summary if k not in fields]
    else:
        fields = [c for c in _with_errors(fields)
                  if any(c in r.summary for r in records) or not c.endswith("_stderr")]
    rows, units = [], {}
    for r in records:
        row = {"uid": r.uid, "time": r.time, "setup": r.setup, "plan_name": r.plan_name,
               "campaign_id": r.campaign_id, "campaign_step": r.campaign_step,
               "campaign_attempt": r.campaign_attempt, "particle": r.particle,
               "exit_status": r.exit_status, "superseded_by": r.superseded_by}
        for k in fields:
            row[k] = r.summary.get(k, float("nan"))
            if k in r.units:
                units.setdefault(k, r.units[k])
        rows.append(row)
    df = pd.DataFrame(rows, columns=[*PROVENANCE, *fields])
    df["time"] = pd.to_datetime(df["time"], unit="s", utc=True)
    for k in ("campaign_step", "campaign_attempt"):
        df[k] = df[k].astype("Int64")
    df.attrs["units"] = {k: units.get(k, "") for k in fields}
    return df


def derived_table(location: Any, plan: str | None = None, *, setup: str | None = None,
                  campaign: str | None = None, since: Any = None,
                  fields: Sequence[str] | None = None, include_all: bool = False,
                  api_key_env: str = DEFAULT_API_KEY_ENV) -> Any:
    """The summary values of every matching run, one row a run, oldest first.

    Parameters
    ----------
    location : str, Path or tiled client
        A data directory, a tiled server URI (API key in ``$api_key_env``) or a client.
    plan : str, optional
        ``plan_name`` of the runs (e.g. ``"reheating_cycles"``); all plans if None.
    setup, campaign : str, optional
        Exact ``setup`` / ``campaign_id`` of the runs.
    since : str, datetime or float, optional
        Runs started at or after this time (ISO date or date-time, local time).
    fields : sequence of str, optional
        Summary values to keep (each with its ``_stderr`` column when the summary has
        one); default: every value of the summaries.
    include_all : bool
        Also runs that were aborted, failed, unfinished or superseded (default: only
        runs that ended with ``success`` and were not redone), so that they are never
        mixed into averages by accident; ``exit_status`` and ``superseded_by`` say which.

    Returns
    -------
    pandas.DataFrame
        Provenance columns ``uid``, ``time`` (start, UTC), ``setup``, ``plan_name``,
        ``campaign_id``, ``campaign_step``, ``campaign_attempt``, ``particle`` (None if
        not recorded), ``exit_status``, ``superseded_by``; then the values in SI, each
        followed by ``<name>_stderr``. ``df.attrs["units"]`` maps each value column to
        its units as stored in the run's data keys (``"quanta/s"``, ``"Pa"``, ...).
    """
    records = find_runs(location, setup=setup, plan=plan, campaign=campaign, since=since,
                        usable_only=not include_all, api_key_env=api_key_env)
    return _frame(records, fields)


def heating_rates(location: Any, setup: str | None = None, **kwargs: Any) -> Any:
    """Heating rates versus pressure of every ``reheating_cycles`` run of a setup.

    Columns (after the provenance of :func:`derived_table`): ``pressure`` (Pa), and per
    axis ``heating_rate_<axis>`` (quanta/s, linear model over the cycles),
    ``heating_rate_exp_<axis>`` (exponential model), ``predicted_heating_rate_<axis>``
    (the physics prediction), each with ``_stderr``. Keyword arguments as
    :func:`derived_table` (``campaign``, ``since``, ``include_all``, ``api_key_env``).
    """
    names = ["pressure"]
    for a in _AXES:
        names += [f"heating_rate_{a}", f"heating_rate_exp_{a}", f"predicted_heating_rate_{a}"]
    return derived_table(location, "reheating_cycles", setup=setup, fields=names, **kwargs)


def calibrations(location: Any, setup: str | None = None, **kwargs: Any) -> Any:
    """Detector calibration factors over time from every ``thermal_calibration`` run.

    Columns: ``calibration_x``, ``_y``, ``_z`` (V/m), ``mass`` (kg) and ``mass_source``
    (where the mass came from), ``pressure`` (Pa), with ``_stderr`` columns. Keyword
    arguments as :func:`derived_table`.
    """
    names = [f"calibration_{a}" for a in _AXES] + ["mass", "mass_source", "pressure"]
    return derived_table(location, "thermal_calibration", setup=setup, fields=names,
                         **kwargs)


def particles(location: Any, setup: str | None = None, **kwargs: Any) -> Any:
    """Gas-damping slope, radius and mass per particle from every ``pressure_sweep`` run.

    Columns: ``damping_slope`` (1/(s·Pa), combined over axes) and ``damping_slope_<axis>``,
    ``radius`` (m), ``mass`` (kg), with ``_stderr`` columns; ``particle`` is the
    particle's name where the start document records one. Keyword arguments as
    :func:`derived_table`.
    """
    names = ["damping_slope", *(f"damping_slope_{a}" for a in _AXES), "radius", "mass"]
    return derived_table(location, "pressure_sweep", setup=setup, fields=names, **kwargs)
