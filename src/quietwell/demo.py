"""The main job on the simulated bench: a whole characterisation into the embedded store.

``quietwell demo --data-dir DIR`` runs, on the simulated setup ``amber`` of the invented
Quillfen Levitation Laboratory: a charge calibration and a thermal calibration at a
few mbar, a pump-down pressure sweep from 10 mbar to 1e-8 mbar with feedback engaged
below the loss pressure, a cold-damping gain sweep, reheating cycles at three
pressures (the heating rate versus pressure separates the gas part, the slope, from
photon recoil, the intercept), and sideband thermometry; then prints the derived
values beside the simulation's truth and the physics prediction.
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ._errors import QuietwellError
from .analysis._derived import fit_line
from .physics import AXES, MBAR

__all__ = ["DemoConfig", "run_demo", "format_report"]


#: The campaign files the demo runs (``campaigns/`` of the source checkout).
CAMPAIGNS = Path(__file__).resolve().parents[2] / "campaigns"


@dataclass(frozen=True)
class DemoConfig:
    """What the demo runs: a campaign file on a setup profile.

    ``quick()`` is the reduced campaign the tests run.
    """

    profile: str = "amber"
    campaign: Path = CAMPAIGNS / "characterise.toml"

    @classmethod
    def quick(cls) -> DemoConfig:
        return cls(campaign=CAMPAIGNS / "characterise-quick.toml")


@dataclass
class DemoResult:
    """Summaries of every run of the demo and the timing breakdown."""

    data_dir: Path
    uids: dict[str, str] = field(default_factory=dict)
    summaries: dict[str, dict] = field(default_factory=dict)
    truth: dict = field(default_factory=dict)
    predictions: dict = field(default_factory=dict)
    timing: dict[str, float] = field(default_factory=dict)


class _Timer:
    """Wall time spent inside wrapped callables."""

    def __init__(self) -> None:
        self.total = 0.0

    def wrap(self, fn):
        def timed(*a, **k):
            t0 = time.perf_counter()
            try:
                return fn(*a, **k)
            finally:
                self.total += time.perf_counter() - t0

        return timed

    def __enter__(self) -> _Timer:
        self._t0 = time.perf_counter()
        return self

    def __exit__(self, *exc: object) -> None:
        self.total += time.perf_counter() - self._t0


def run_demo(data_dir: str | Path, config: DemoConfig | None = None, *, log=print,
             progress=None) -> DemoResult:
    """Run the campaign of ``config`` into the embedded store at ``data_dir``, through the
    same runner as ``quietwell run``, and compare each result with the simulation's truth."""
    from .campaign import load_campaign, run_campaign
    from .session import open_session

    cfg = config or DemoConfig()
    t_start = time.perf_counter()
    camp = load_campaign(cfg.campaign)
    result = DemoResult(Path(data_dir).expanduser().resolve())
    truths: dict[str, object] = {}
    with open_session(cfg.profile, data_dir) as session:
        setup, store, lab = session.setup, session.store, session.lab
        if lab is None:
            raise QuietwellError(f"setup {setup.name!r} is not simulated; the demo compares "
                                 "with the simulation's truth, so it needs a setup of kind sim "
                                 "(use quietwell run for hardware)")
        store_timer = _Timer()
        store.writer = store_timer.wrap(store.writer)
        sim_timer = _Timer()
        lab.record = sim_timer.wrap(lab.record)
        lab.advance = sim_timer.wrap(lab.advance)
        catalog_timer = _Timer()
        t_step = [time.perf_counter()]

        def on_step(step, uid, summary, _session):
            # the plan returned its summary; the catalog meanwhile finishes the run on
            # the other core, and every run is read back from it at the end
            name = _run_name(step, summary)
            truths[name] = lab.truth()
            result.uids[name] = uid
            result.summaries[name] = summary
            log(f"  {name:<28s} {time.perf_counter() - t_step[0]:6.1f} s  uid {uid[:8]}")
            t_step[0] = time.perf_counter()

        log(f"quietwell demo: campaign {camp.name!r} on setup {setup.name!r} ({setup.lab}), "
            f"data in {result.data_dir}")
        run_campaign(camp, setup, data_dir, session=session, on_step=on_step,
                     progress=progress)
        with catalog_timer:
            store.wait()  # the catalog holds every run
        fits_seconds = _read_back(store.client, result)
        charge_truth = store.client[result.uids["charge_calibration"]].metadata["start"][
            "sim_truth"]["charge_e"]
        truth = lab.truth()
        result.truth = {"radius": truth.radius, "mass": truth.mass, "charge": charge_truth,
                        "calibration": list(setup.detector.calibration),
                        "recoil_heating": [float(v) for v in truth.recoil_heating],
                        "gas_heating_per_pa": [float(v) / truth.pressure
                                               for v in truth.gas_heating]}
        heat_runs = {n: s for n, s in result.summaries.items()
                     if n.startswith("reheating_cycles@")}
        result.summaries["heating_vs_pressure"] = _heating_vs_pressure(heat_runs)
        result.truth["per_run"] = {name: _truth_row(t) for name, t in truths.items()}
    result.timing = {"total": time.perf_counter() - t_start, "simulation": sim_timer.total,
                     "analysis (fit thread)": fits_seconds, "storage (writer)": store_timer.total,
                     "storage (waits for the catalog)": catalog_timer.total}
    (result.data_dir / "demo-summary.json").write_text(json.dumps(
        {"uids": result.uids, "summaries": result.summaries, "truth": result.truth,
         "timing": result.timing}, indent=1, default=float))
    return result


def _run_name(step, summary: dict) -> str:
    """The table's name of a run: its plan, with the pressure or gain where it repeats."""
    if step.plan == "reheating_cycles":
        p = step.params.get("pressure")
        return f"reheating_cycles@{p / MBAR:g}mbar" if isinstance(p, float) else \
            f"reheating_cycles@{step.id}"
    if step.plan == "sideband_thermometry":
        g = step.params.get("feedback_gain")
        return f"sideband_thermometry@{g:g}" if isinstance(g, float) else \
            f"sideband_thermometry@{step.id}"
    return step.plan


def _truth_row(t) -> dict:
    """What the table compares with: true heating without feedback, the occupation now,
    and the cold-damping optimum from the simulation's true rates."""
    from .physics import cold_damping_optimum

    row = {"heating": [float(a + b) for a, b in zip(t.gas_heating, t.recoil_heating,
                                                     strict=True)],
           "occupation": [float(v) for v in t.occupation]}
    n_min = []
    for i in range(3):
        g = float(t.feedback_damping[i])
        if g > 0 and t.feedback_heating[i] > 0:
            gm = g**2 / (16.0 * float(t.feedback_heating[i]))
            dec = float(t.gas_heating[i] + t.recoil_heating[i])
            n_min.append(cold_damping_optimum(float(t.gas_damping[i]), 0.0, gm, dec)[1])
        else:
            n_min.append(math.nan)
    row["min_occupation"] = n_min
    return row


def _read_back(client, result: DemoResult) -> float:
    """Check every run's stored summary against what its plan returned; the fit time.

    Returns the seconds the live fits took, summed over the ``fits`` streams.
    """
    fit_seconds = 0.0
    for name, uid in result.uids.items():
        run_ = client[uid]
        stored = {k: _first(v) for k, v in run_["summary"].read().items() if k != "time"}
        returned = result.summaries[name]
        for key in sorted(set(stored) | set(returned)):
            a, b = stored.get(key, "missing"), returned.get(key, "missing")
            same = (a == b or (isinstance(a, float) and isinstance(b, float)
                               and (math.isclose(a, b, rel_tol=1e-12)
                                    or (math.isnan(a) and math.isnan(b)))))
            if not same:
                raise QuietwellError(f"run {uid} ({name}): the stored summary has {key}={a!r}, "
                                     f"its plan returned {b!r}; see the server log in "
                                     f"{result.data_dir / 'catalog'}")
        fit_seconds += float(np.nansum(np.asarray(run_["fits"].read()["fit_seconds"])))
    return fit_seconds


def _first(col):
    v = np.asarray(col)
    v = v.reshape(-1)[0] if v.size else math.nan
    return v.item() if isinstance(v, np.generic) else v


def _heating_vs_pressure(heat_runs: dict[str, dict]) -> dict:
    """Per axis ``Gamma(P) = a P + b``: gas slope ``a`` (quanta/(s Pa)) and the recoil
    intercept ``b`` (quanta/s)."""
    out = {}
    if len(heat_runs) < 3:
        return out
    for a in AXES:
        p = [s["pressure"] for s in heat_runs.values()]
        g = [s[f"heating_rate_{a}"] for s in heat_runs.values()]
        e = [s[f"heating_rate_{a}_stderr"] for s in heat_runs.values()]
        try:
            line = fit_line(p, g, e)
        except Exception:  # noqa: BLE001 - reported as missing in the table
            continue
        out[f"gas_slope_{a}"] = line.slope.value
        out[f"gas_slope_{a}_stderr"] = line.slope.stderr
        out[f"recoil_intercept_{a}"] = line.intercept.value
        out[f"recoil_intercept_{a}_stderr"] = line.intercept.stderr
    return out


def _pm(summary: dict, key: str, scale: float = 1.0, fmt: str = ".4g") -> str:
    v = summary.get(key, math.nan)
    e = summary.get(f"{key}_stderr", math.nan)
    if isinstance(v, str):
        return v
    if not math.isfinite(e):
        return f"{v * scale:{fmt}}"
    return f"{v * scale:{fmt}} ± {e * scale:.2g}"


def format_report(r: DemoResult) -> str:
    """The table the demo prints: measured, truth of the simulation, physics prediction."""
    s, t = r.summaries, r.truth
    rows = [("quantity", "measured", "sim truth", "prediction")]

    def add(q, m, tr="", pr=""):
        rows.append((q, m, tr, pr))

    sw = s.get("pressure_sweep", {})
    add("radius (pressure sweep) [nm]", _pm(sw, "radius", 1e9), f"{t.get('radius', 0) * 1e9:.4g}")
    add("mass (pressure sweep) [fg]", _pm(sw, "mass", 1e18), f"{t.get('mass', 0) * 1e18:.4g}")
    ch = s.get("charge_calibration", {})
    add("charge [e]", str(ch.get("charge", "")), str(t.get("charge", "")))
    add("mass (Coulomb drive) [fg]", _pm(ch, "mass", 1e18), f"{t.get('mass', 0) * 1e18:.4g}")
    th = s.get("thermal_calibration", {})
    for i, a in enumerate(AXES):
        add(f"calibration {a} [V/um]", _pm(th, f"calibration_{a}", 1e-6),
            f"{t['calibration'][i] * 1e-6:.4g}" if t.get("calibration") else "")
    gs = s.get("gain_sweep", {})
    add("optimal gain (all axes) [1/s]", _pm(gs, "optimal_gain"))
    per_run = t.get("per_run", {})
    tg = per_run.get("gain_sweep", {})
    for i, a in enumerate(AXES):
        measured = _pm(gs, f"min_occupation_{a}")
        if not math.isfinite(gs.get(f"min_occupation_{a}", math.nan)):
            measured = f"beyond sweep, lowest {_pm(gs, f'lowest_occupation_{a}', fmt='.3g')}"
        true_min = tg.get("min_occupation", [math.nan] * 3)[i]
        add(f"min occupation {a}", measured, f"{true_min:.3g}",
            f"{gs.get(f'predicted_min_occupation_{a}', math.nan):.3g}")
    for name, summ in s.items():
        if name.startswith("reheating_cycles@"):
            th = per_run.get(name, {}).get("heating", [math.nan] * 3)
            for i, a in enumerate(AXES):
                add(f"heating {a} @ {summ['pressure']:.2g} Pa [1/s]",
                    _pm(summ, f"heating_rate_{a}"), f"{th[i]:.4g}",
                    f"{summ.get(f'predicted_heating_rate_{a}', math.nan):.4g}")
    hv = s.get("heating_vs_pressure", {})
    for i, a in enumerate(AXES):
        if f"recoil_intercept_{a}" in hv:
            add(f"recoil heating {a} (intercept) [1/s]", _pm(hv, f"recoil_intercept_{a}"),
                f"{t['recoil_heating'][i]:.4g}")
            add(f"gas heating {a} (slope) [1/(s Pa)]", _pm(hv, f"gas_slope_{a}"),
                f"{t['gas_heating_per_pa'][i]:.4g}")
    for name, summ in s.items():
        if name.startswith("sideband_thermometry@"):
            occ = per_run.get(name, {}).get("occupation", [math.nan] * 3)
            measured = _pm(summ, "occupation", fmt=".3g")
            if not math.isfinite(summ.get("occupation", math.nan)):
                measured = f">= {summ.get('occupation_lower_bound', math.nan):.3g} (ratio ~ 1)"
            add(f"occupation x (sidebands, gain {name.split('@')[1]}/s)", measured,
                f"{occ[0]:.3g}")
    widths = [max(len(row[i]) for row in rows) for i in range(4)]
    lines = ["  ".join(c.ljust(w) for c, w in zip(row, widths, strict=True)) for row in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    tm = r.timing
    lines.append("")
    lines.append("wall time: " + ", ".join(f"{k} {v:.1f} s" for k, v in tm.items()))
    return "\n".join(lines)
