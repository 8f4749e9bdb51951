"""Write a campaign's report as one self-contained HTML page.

Nothing on the page is fetched: the style sheet is inline, there is no script, and the
pictures are inline SVG (matplotlib draws the text as paths, so no font is loaded).
Every number of the tables carries its exact value in ``data-*`` attributes (the
stored float, repr-exact), so that a test or a script can read the page back.
"""

from __future__ import annotations

import datetime as _dt
import html
import math
import os
import re
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .._errors import InputError
from . import _checks, _plots
from ._collect import ReportData, RunEntry, collect

__all__ = ["write_report", "render_report", "Picture"]

_STATUS_TEXT = {
    "completed": "completed", "failed": "failed", "aborted": "aborted",
    "superseded": "superseded", "never reached": "never reached", "running": "running",
    "interrupted": "interrupted", "skipped": "skipped", "refused": "refused",
    "in progress": "in progress",
}


@dataclass
class Picture:
    """One picture of the report: its key, title, caption, and the SVG or why there is none."""

    key: str
    title: str
    caption: str
    svg: str = ""
    error: str = ""


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _when(t: float | None) -> str:
    if t is None:
        return "—"
    return _dt.datetime.fromtimestamp(float(t)).astimezone().strftime("%Y-%m-%d %H:%M:%S %Z")


def _num_text(v: float, e: float | None = None) -> str:
    if not math.isfinite(v):
        return "nan"
    if e is None or not math.isfinite(e):
        return f"{v:.5g}"
    if e == 0:
        return f"{v:.5g}"
    return f"{v:.5g} ± {e:.2g}"


def _is_num(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


# --------------------------------------------------------------------------
# pictures


def _picture(key: str, title: str, caption: str, make, uid_prefix: str) -> Picture:
    pic = Picture(key, title, caption)
    try:
        fig = make()
        pic.svg = _unique_ids(_plots.figure_svg(fig), uid_prefix)
    except Exception as exc:  # noqa: BLE001 - a picture that fails must not lose the page
        pic.error = " ".join(f"{type(exc).__name__}: {exc}".split())[:300]
    return pic


def _unique_ids(svg: str, prefix: str) -> str:
    """Prefix the ids of one SVG so that several on one page never collide."""
    svg = re.sub(r'\bid="([^"]+)"', lambda m: f'id="{prefix}-{m.group(1)}"', svg)
    svg = re.sub(r'url\(#([^)]+)\)', lambda m: f"url(#{prefix}-{m.group(1)})", svg)
    return re.sub(r'href="#([^"]+)"', lambda m: f'href="#{prefix}-{m.group(1)}"', svg)


def _first(data: ReportData, plan: str) -> RunEntry | None:
    runs = data.usable(plan)
    return runs[0] if runs else None


def _pictures_and_checks(data: ReportData) -> tuple[list[Picture], list[_checks.Check]]:
    pics: list[Picture] = []
    checks: list[_checks.Check] = []
    k = 0

    def add(key, title, caption, make):
        nonlocal k
        k += 1
        pics.append(_picture(key, title, caption, make, f"f{k}"))

    rep = _first(data, "thermal_calibration") or _first(data, "pressure_sweep") or _first(
        data, "charge_calibration")
    if rep is not None:
        try:
            spectra = _plots.psd_fits(rep.client, 0)
            checks += _checks.spectrum_checks(spectra, rep.uid,
                                              f"PSD fit, {rep.step_id} record 0,")
        except Exception as exc:  # noqa: BLE001 - shown in place of the picture
            spectra, msg = None, f"{type(exc).__name__}: {exc}"
        else:
            msg = ""
        add("psd", f"Spectra of a representative record ({rep.step_id}, record 0)",
            "Welch PSD of each axis in its fit band with the fitted damped-oscillator model; "
            "below, data divided by model (scatters about 1 for a good fit).",
            (lambda: _plots.psd_figure(rep.client, 0, spectra=spectra)) if spectra else
            (lambda: (_ for _ in ()).throw(RuntimeError(msg))))
    sweep = _first(data, "pressure_sweep")
    if sweep is not None:
        add("damping", f"Damping versus pressure ({sweep.step_id})",
            "Fitted energy damping of every record versus the gauge pressure, with the gas "
            "line γ = s·P of the sweep's summary; below the loss pressure cold damping holds "
            "the particle, and the damping sits at the feedback gain.",
            lambda: _plots.damping_figure(sweep.client))
        try:
            checks += _checks.thermalization_checks(sweep, _first(data, "thermal_calibration"))
        except Exception:  # noqa: BLE001 - a check that cannot be made is left out
            pass
    gains = _first(data, "gain_sweep")
    if gains is not None:
        add("gain", f"Occupation versus gain ({gains.step_id})",
            "Calibrated occupation per gain (weighted mean of its records) with the fitted "
            "cold-damping model, its optimum, and the optimum predicted from the setup's "
            "nominal values.", lambda: _plots.gain_figure(gains.client))
        try:
            checks += _checks.cold_damping_checks(gains)
        except Exception:  # noqa: BLE001 - a check that cannot be made is left out
            pass
    heats = data.usable("reheating_cycles")
    for r in heats:
        add("reheating", f"Reheating ensemble ({r.step_id})",
            "Mean occupation over the cycles versus time after the feedback is switched "
            "off, the spread of the cycles, and the fitted linear heating n₀ + Γt.",
            lambda r=r: _plots.reheating_figure(r.client))
    if heats:
        table = _plots.heating_table([r.client for r in heats])
        add("heating", "Heating rate versus pressure",
            "Measured heating rate of every reheating run versus its pressure, the fitted "
            "line a·P + b (gas slope a, photon-recoil intercept b), and the rates predicted "
            "from the setup's nominal values.", lambda: _plots.heating_pressure_figure(table))
        try:
            checks += _checks.heating_checks(heats, table)
        except Exception:  # noqa: BLE001 - a check that cannot be made is left out
            pass
    for r in data.usable("sideband_thermometry"):
        try:
            sb = _plots.sideband_fits(r.client, 0)
            checks += _checks.sideband_checks(sb, r.uid)
        except Exception:  # noqa: BLE001 - the picture says why
            sb = None
        add("sidebands", f"Heterodyne sidebands ({r.step_id}, record 0)",
            "Beat-note PSD around the Stokes and anti-Stokes sidebands with the fitted lines "
            "(dotted: the sideband of the run's axis); their area ratio R gives "
            "n = R/(1 − R).",
            lambda r=r, sb=sb: _plots.sideband_figure(r.client, 0, spectrum=sb))
    return pics, checks


# --------------------------------------------------------------------------
# the page


_CSS = """
:root{--ink:#22303c;--paper:#f7f4ee;--card:#fffdf9;--rule:#ddd6ca;--soft:#6f7c88;
--x:#1f5f8b;--y:#b4531f;--z:#4f7d3a;--good:#2f7a4a;--bad:#a4262c;--warn:#a86a00;
--gone:#6b5b8c;--idle:#8c99a6}
*{box-sizing:border-box}
body{margin:0;background:var(--paper);color:var(--ink);
font:14px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,"Helvetica Neue",Arial,sans-serif}
main{max-width:1120px;margin:0 auto;padding:20px 24px 48px}
header.masthead{border-left:6px solid var(--x);padding:6px 0 6px 16px;margin-bottom:18px}
header.masthead .kicker{letter-spacing:.14em;text-transform:uppercase;font-size:11px;
color:var(--soft)}
h1{font-size:25px;margin:2px 0 4px}
h2{font-size:17px;margin:30px 0 10px;padding-bottom:4px;border-bottom:2px solid var(--rule)}
h3{font-size:14px;margin:18px 0 6px}
.lede{color:var(--soft);margin:0}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:3px 18px;margin:0;
background:var(--card);border:1px solid var(--rule);border-radius:6px;padding:12px 16px}
dl.facts dt{color:var(--soft)}
dl.facts dd{margin:0;overflow-wrap:anywhere}
code,.mono{font-family:ui-monospace,"DejaVu Sans Mono",Menlo,Consolas,monospace;font-size:12px}
.banner{border-radius:6px;padding:10px 14px;margin:10px 0;border:1px solid}
.banner.running{background:#eaf2f8;border-color:var(--x)}
.banner.warning{background:#fbf1e4;border-color:var(--warn)}
table{border-collapse:collapse;width:100%;background:var(--card);font-size:13px}
th,td{padding:4px 8px;border-bottom:1px solid var(--rule);text-align:left;vertical-align:top}
th{font-weight:600;color:var(--soft);font-size:12px;background:#f1ece3}
table.values,table.leftout-values{width:auto;min-width:62%}
table.values td:first-child{padding-right:28px}
td.text{max-width:34em;overflow-wrap:anywhere}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
.badge{display:inline-block;padding:0 8px;border-radius:9px;font-size:12px;color:#fff;
white-space:nowrap}
.s-completed{background:var(--good)}.s-failed,.s-refused{background:var(--bad)}
.s-aborted,.s-interrupted{background:var(--warn)}.s-superseded{background:var(--gone)}
.s-never-reached,.s-skipped,.s-in-progress{background:var(--idle)}.s-running{background:var(--x)}
.v-ok{color:var(--good);font-weight:600}.v-check{color:var(--warn);font-weight:600}
.v-disagrees{color:var(--bad);font-weight:600}.v-n-a{color:var(--soft)}
tr.stepgap td{background:#f1ece3;font-weight:600;color:var(--ink)}
figure.plot{margin:14px 0 22px;background:var(--card);border:1px solid var(--rule);
border-radius:6px;padding:10px 12px}
figure.plot svg{display:block;width:100%;height:auto}
figure.plot figcaption{color:var(--soft);font-size:12.5px;margin-top:4px}
figure.plot .missing{padding:20px;color:var(--bad)}
section.leftout{border:2px dashed var(--gone);border-radius:8px;padding:4px 16px 14px;
margin-top:30px;background:repeating-linear-gradient(135deg,#faf7fc,#faf7fc 12px,#f4eff8 12px,
#f4eff8 24px)}
section.leftout h2{border-color:var(--gone);color:var(--gone)}
.uids{columns:2;font-size:12px;margin:0;padding-left:18px}
footer{margin-top:36px;color:var(--soft);font-size:12px}
.dot-x{color:var(--x)}.dot-y{color:var(--y)}.dot-z{color:var(--z)}
"""


def _badge(status: str) -> str:
    cls = "s-" + status.replace(" ", "-")
    text = _e(_STATUS_TEXT.get(status, status))
    return f'<span class="badge {cls}" data-status="{_e(status)}">{text}</span>'


def _header(data: ReportData, out: list[str]) -> None:
    name = data.campaign_name or "runs"
    out.append('<header class="masthead"><div class="kicker">quietwell · morning report</div>')
    out.append(f"<h1>{_e(name)} on setup {_e(data.setup or '?')}</h1>")
    if data.description:
        out.append(f'<p class="lede">{_e(data.description)}</p>')
    out.append("</header>")
    if data.running:
        status = "running"
    elif data.end_status:
        status = data.end_status
    elif data.campaign_id:
        status = "did not end"
    else:
        status = "selected runs"
    versions = dict(data.versions)
    versions.setdefault("quietwell", data.quietwell_version or "?")
    ver = ", ".join(f"{k} {v}" for k, v in sorted(versions.items(), key=lambda kv: (
        kv[0] != "quietwell", kv[0])))
    rows = [
        ("campaign", f'<span class="mono" data-field="campaign_id">{_e(data.campaign_id or "—")}'
                     "</span>"),
        ("status", f'<span data-field="campaign_status">{_e(status)}</span>'
                   + (f" — {_e(data.end_reason)}" if data.end_reason else "")),
        ("setup", f'{_e(data.setup)} <span class="mono">{_e(data.setup_profile)}</span>'),
        ("setup sha256", f'<span class="mono" data-field="setup_sha256">'
                         f'{_e(data.setup_sha256 or "—")}</span>'),
        ("campaign file", f'<span class="mono">{_e(data.campaign_file or "—")}</span>'),
        ("campaign file sha256", f'<span class="mono" data-field="campaign_sha256">'
                                 f'{_e(data.campaign_sha256 or "—")}</span>'),
        ("started", _e(_when(data.started))),
        ("ended", _e(_when(data.ended)) if data.ended else
         ("still running" if data.running else "—")),
        ("versions", f'<span class="mono">{_e(ver)}</span>'),
        ("data directory", f'<span class="mono">{_e(data.data_dir)}</span>'),
    ]
    out.append('<dl class="facts">')
    for k, v in rows:
        out.append(f"<dt>{_e(k)}</dt><dd>{v}</dd>")
    uids = [r.uid for r in data.runs if r.uid]
    out.append("<dt>run uids</dt><dd><ol class=\"uids mono\">" + "".join(
        f'<li data-uid="{_e(u)}">{_e(u)}</li>' for u in uids) + "</ol></dd></dl>")
    for note in data.notes:
        cls = "running" if data.running else "warning"
        out.append(f'<div class="banner {cls}" data-note="1">{_e(note)}</div>')


def _steps(data: ReportData, out: list[str]) -> None:
    out.append('<h2 id="steps">Steps</h2>')
    out.append('<table class="steps"><thead><tr><th>#</th><th>step</th><th>plan</th>'
               "<th>status</th><th>attempts</th><th>run</th><th>note</th></tr></thead><tbody>")
    for s in data.steps:
        last = s.attempts[-1] if s.attempts else None
        note = ""
        if last is not None:
            note = last.reason
            if last.superseded_by:
                note = f"superseded by {last.superseded_by}"
        out.append(f'<tr data-step="{_e(s.id)}" data-status="{_e(s.status)}"><td>{s.index}</td>'
                   f"<td>{_e(s.id)}</td><td>{_e(s.plan)}</td><td>{_badge(s.status)}</td>"
                   f"<td class=\"num\">{len(s.attempts)}</td>"
                   f'<td class="mono">{_e(last.uid[:8] if last and last.uid else "—")}</td>'
                   f"<td>{_e(note)}</td></tr>")
    out.append("</tbody></table>")


def _monitors(data: ReportData, out: list[str]) -> None:
    out.append('<h2 id="monitors">Monitor events</h2>')
    if not data.monitors:
        out.append('<p data-monitors="0">No monitor condition changed during the campaign.</p>')
    else:
        out.append('<table class="monitors"><thead><tr><th>time</th><th>step</th>'
                   "<th>record</th><th>condition</th><th>action</th><th>value</th>"
                   "<th>message</th><th>from</th></tr></thead><tbody>")
        for m in data.monitors:
            v = m.get("value")
            vt = _num_text(float(v)) if _is_num(v) else _e(v if v is not None else "")
            out.append(
                f'<tr data-condition="{_e(m.get("condition", ""))}">'
                f"<td>{_e(_when(m.get('time')))}</td><td>{_e(m.get('step_id', ''))}</td>"
                f'<td class="num">{_e(m.get("record", ""))}</td>'
                f"<td>{_e(m.get('condition', ''))}</td><td>{_e(m.get('action', ''))}</td>"
                f'<td class="num">{vt} {_e(m.get("units", ""))}</td>'
                f"<td>{_e(m.get('message', ''))}</td><td>{_e(m.get('source', ''))}</td></tr>")
        out.append("</tbody></table>")
    other = [e for e in data.ledger_events if e.get("event") != "end"]
    if other:
        out.append("<h3>Other entries of the ledger</h3><ul>")
        for e in other:
            rest = ", ".join(f"{k} {v}" for k, v in e.items() if k not in ("event", "time"))
            out.append(f"<li>{_e(_when(e.get('time')))}: {_e(e['event'])} — {_e(rest)}</li>")
        out.append("</ul>")


def _value_rows(r: RunEntry, out: list[str]) -> None:
    keys = sorted((k for k in r.summary if not k.endswith("_stderr")),
                  key=lambda k: (not _is_num(r.summary[k]), k))
    for k in keys:
        v = r.summary[k]
        unit = r.units.get(k, "")
        attrs = f'data-uid="{_e(r.uid)}" data-key="{_e(k)}" data-units="{_e(unit)}"'
        if _is_num(v):
            e = r.summary.get(f"{k}_stderr")
            e = float(e) if _is_num(e) else None
            attrs += f' data-value="{_e(repr(float(v)))}"'
            if e is not None:
                attrs += f' data-stderr="{_e(repr(e))}"'
            cell = f'<td class="num derived" {attrs}>{_e(_num_text(float(v), e))}</td>'
        else:
            cell = (f'<td class="derived text" {attrs} data-text="{_e(v)}">'
                    f"{_e(_ranges(v) if k == 'records_used' else v)}</td>")
        out.append(f"<tr><td>{_e(k)}</td>{cell}<td>{_e(unit)}</td></tr>")


def _ranges(text: Any) -> str:
    """``"1,2,3,5"`` as ``"1–3, 5"`` (the page shows runs of record numbers as ranges)."""
    try:
        nums = [int(t) for t in str(text).split(",") if t.strip()]
    except ValueError:
        return str(text)
    parts: list[list[int]] = []
    for n in nums:
        if parts and parts[-1][1] == n - 1:
            parts[-1][1] = n
        else:
            parts.append([n, n])
    return ", ".join(f"{a}" if a == b else f"{a}–{b}" for a, b in parts)


def _values(data: ReportData, out: list[str]) -> None:
    out.append('<h2 id="values">Derived values</h2>')
    out.append("<p>From the <code>summary</code> stream of every completed run that no redo "
               "superseded; value ± standard error, SI units. Runs left out are listed at the "
               "end of the page and never enter these values.</p>")
    runs = [r for r in data.runs if r.status == "completed" and r.summary]
    if not runs:
        out.append("<p>No completed run yet.</p>")
        return
    out.append('<table class="values"><thead><tr><th>quantity</th><th>value</th>'
               "<th>units</th></tr></thead><tbody>")
    for r in runs:
        out.append(f'<tr class="stepgap"><td colspan="3">{_e(r.step_id)} · {_e(r.plan)} · '
                   f'<span class="mono">{_e(r.uid)}</span></td></tr>')
        _value_rows(r, out)
    out.append("</tbody></table>")


def _check_table(checks: Sequence[_checks.Check], out: list[str]) -> None:
    out.append('<h2 id="checks">Consistency checks</h2>')
    if not checks:
        out.append("<p>No check could be made from the runs there are.</p>")
        return
    out.append("<p>Reduced χ² and deviances are judged by their p-value (ok above 0.01); "
               "differences by z, in combined standard errors (ok within 2, check within 3, "
               "disagrees beyond).</p>")
    out.append('<table class="checks"><thead><tr><th>group</th><th>check</th>'
               "<th>measured</th><th>expected</th><th>value</th><th>verdict</th></tr></thead>"
               "<tbody>")
    for c in checks:
        v = "nan" if not math.isfinite(c.value) else f"{c.value:.3g}"
        vc = "v-" + c.verdict.replace("/", "-")
        out.append(f'<tr data-check="{_e(c.what)}" data-verdict="{_e(c.verdict)}">'
                   f"<td>{_e(c.group)}</td><td>{_e(c.what)}</td><td class=\"num\">"
                   f"{_e(c.measured)}</td><td class=\"num\">{_e(c.expected)}</td>"
                   f'<td class="num" data-value="{_e(repr(c.value))}">{_e(v)}</td>'
                   f'<td class="{vc}">{_e(c.verdict)}</td></tr>')
    out.append("</tbody></table>")


def _figures(pics: Sequence[Picture], out: list[str]) -> None:
    out.append('<h2 id="plots">Pictures</h2>')
    if not pics:
        out.append("<p>No picture: no completed run holds the data for one.</p>")
    for p in pics:
        out.append(f'<figure class="plot" data-plot="{_e(p.key)}"><h3>{_e(p.title)}</h3>')
        if p.svg:
            out.append(p.svg)
        else:
            out.append(f'<div class="missing" data-missing="1">This picture could not be drawn: '
                       f"{_e(p.error)}</div>")
        out.append(f"<figcaption>{_e(p.caption)}</figcaption></figure>")


def _left_out(data: ReportData, out: list[str]) -> None:
    runs = data.left_out()
    never = [s for s in data.steps if s.status == "never reached"]
    if not runs and not never:
        return
    out.append('<section class="leftout" data-section="left-out">')
    out.append('<h2 id="left-out">Runs left out of the results</h2>')
    out.append("<p>Failed, aborted, interrupted and superseded runs, and steps never reached. "
               "Their records stay in the store; none of their values enters the tables, "
               "checks or pictures above.</p>")
    if runs:
        out.append('<table class="leftout"><thead><tr><th>step</th><th>attempt</th>'
                   "<th>status</th><th>run</th><th>reason</th></tr></thead><tbody>")
        for r in runs:
            why = r.reason
            if r.superseded_by:
                why = f"superseded by {r.superseded_by}" + (f" ({r.reason})" if r.reason else "")
            out.append(f'<tr data-left-out="{_e(r.uid)}" data-status="{_e(r.status)}">'
                       f"<td>{_e(r.step_id)}</td><td class=\"num\">{r.attempt}</td>"
                       f'<td>{_badge(r.status)}</td><td class="mono">{_e(r.uid or "—")}</td>'
                       f"<td>{_e(why)}</td></tr>")
        out.append("</tbody></table>")
        with_values = [r for r in runs if r.summary]
        for r in with_values:
            out.append(f"<details><summary>summary of the {_e(r.status)} run "
                       f'<span class="mono">{_e(r.uid[:8])}</span> ({_e(r.step_id)})</summary>'
                       '<table class="leftout-values"><tbody>')
            rows: list[str] = []
            _value_rows(r, rows)
            out.extend(row.replace('class="num derived"', 'class="num"')
                       .replace('class="derived"', "") for row in rows)
            out.append("</tbody></table></details>")
    if never:
        out.append("<p>Never reached: " + ", ".join(
            f'<span data-never="{_e(s.id)}">{_e(s.id)} ({_e(s.plan)})</span>' for s in never)
            + ".</p>")
    out.append("</section>")


def render_report(data: ReportData) -> str:
    """The HTML text of the report of ``data`` (see :func:`~quietwell.report.collect`)."""
    pics, checks = _pictures_and_checks(data)
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>{_e(data.campaign_name or 'runs')} · quietwell report</title>",
           f"<style>{_CSS}</style></head><body><main>"]
    _header(data, out)
    _steps(data, out)
    _monitors(data, out)
    _values(data, out)
    _check_table(checks, out)
    _figures(pics, out)
    _left_out(data, out)
    out.append(f"<footer>Written by quietwell report on {_e(_when(_now()))}. The data "
               "directory holds the raw records and every fit; open it with "
               f"<code>quietwell.open_catalog({_e(repr(str(data.data_dir)))})</code>."
               "</footer></main></body></html>")
    return "\n".join(out)


def _now() -> float:
    import time

    return time.time()


def write_report(data_dir: str | Path, output: str | Path, *, campaign: str | None = None,
                 uids: Sequence[str] = ()) -> ReportData:
    """Write the report of a campaign (default: the latest in ``data_dir``) or of the runs
    ``uids`` to the HTML file ``output``; return what it shows.

    Raises :class:`~quietwell.InputError` (one line) for a data directory without a store,
    an unknown campaign or uid, or an output path that cannot be written.
    """
    out = Path(output).expanduser()
    if out.suffix.lower() not in (".html", ".htm"):
        raise InputError(f"-o {output}: the report is an HTML page; give a file name ending in "
                         ".html")
    if not out.parent.is_dir():
        raise InputError(f"-o {output}: the folder {out.parent} does not exist; create it or "
                         "choose another")
    data = collect(data_dir, campaign=campaign, uids=uids)
    text = render_report(data)
    fd, tmp = tempfile.mkstemp(prefix=".report-", suffix=".html", dir=out.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, out)
    except OSError as exc:
        Path(tmp).unlink(missing_ok=True)
        raise InputError(f"-o {output}: cannot write it ({exc.strerror}); choose a writable "
                         "file") from None
    return data
