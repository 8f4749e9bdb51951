"""Reading results back: run listings and tables of derived values across runs.

* :func:`open_store` opens a data directory in this process, read-only (no web server,
  no catalog process; also while a campaign writes to it), or a tiled server by URI,
  and returns the standard tiled client.
* :func:`find_runs` finds runs with the catalog's own search (setup, plan, campaign,
  time) and reads their ``summary`` streams (for a data directory straight from the
  catalog's files, see :mod:`._catalog_sql`); :func:`format_runs` and
  :func:`runs_json` print them (``quietwell runs``).
* :func:`derived_table`, :func:`heating_rates`, :func:`calibrations` and
  :func:`particles` return pandas DataFrames of derived values with their errors and
  provenance; units are in ``df.attrs["units"]``.
"""

from ._reader import DEFAULT_API_KEY_ENV, LocalStore, open_store
from ._runs import KEY_FIELDS, RunRecord, find_runs, format_runs, parse_since, runs_json
from ._tables import calibrations, derived_table, heating_rates, particles

__all__ = [
    "DEFAULT_API_KEY_ENV",
    "KEY_FIELDS",
    "LocalStore",
    "RunRecord",
    "calibrations",
    "derived_table",
    "find_runs",
    "format_runs",
    "heating_rates",
    "open_store",
    "parse_since",
    "particles",
    "runs_json",
]
