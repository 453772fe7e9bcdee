"""The run report: PNG plots, ``index.html`` and ``summary.md``, from the run folder alone."""

from __future__ import annotations

import datetime as _dt
import re
from pathlib import Path
from typing import Any

from benchctl import __version__
from benchctl.report.formatting import fmt, h, md, md_table
from benchctl.report.plots import KINDS, StepPlots, draw_step
from benchctl.report.runview import RunView, load_run
from benchctl.store.atomic import write_text_atomic

PARAM_HEADER = ["Parameter", "Value", "Uncertainty", "Unit", "Method", "Spec min", "Spec max",
                "Verdict", "Step", "Note"]

_CSS = """
body { font-family: sans-serif; margin: 2em auto; max-width: 60em; color: #202428; }
h1 { font-size: 1.5em; border-bottom: 2px solid #4a6b8a; padding-bottom: .2em; }
h2 { font-size: 1.2em; margin-top: 2em; color: #33506c; }
table { border-collapse: collapse; margin: .5em 0 1em; font-size: .9em; }
th, td { border: 1px solid #c9d1d9; padding: .25em .6em; text-align: left; vertical-align: top; }
th { background: #eef2f6; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.pass { color: #176b2c; font-weight: bold; }
.fail { color: #a3231a; font-weight: bold; }
.notes li { color: #7a4f00; }
figure { display: inline-block; margin: .5em 1em .5em 0; }
figure img { max-width: 100%; border: 1px solid #dde3e8; }
figcaption { font-size: .85em; color: #556; }
footer { margin-top: 3em; font-size: .8em; color: #778; }
"""


def build_report(run_dir: str | Path, *, out_dir: str | Path | None = None) -> Path:
    """Make the report of one run folder, offline, and return the path of ``index.html``.

    Parameters
    ----------
    run_dir : path-like
        The run folder.
    out_dir : path-like, optional
        Where to write; ``<run_dir>/report`` by default. Files there are overwritten.

    Returns
    -------
    Path
        ``<out_dir>/index.html``; ``summary.md`` and the PNG plots sit beside it.

    Raises
    ------
    ConfigError
        ``run_dir`` is not a run folder.

    Notes
    -----
    Every text that comes from the folder is HTML-escaped (or Markdown-escaped). Missing
    columns, absent parameters and partial (aborted) runs are reported in the page's
    notes, never raised.
    """
    run = load_run(run_dir)
    out = Path(out_dir) if out_dir is not None else run.path / "report"
    out.mkdir(parents=True, exist_ok=True)
    _remove_old_plots(out)
    plotted = [draw_step(run, step, out) for step in run.steps]
    stamp = _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds").replace("+00:00", "Z")
    write_text_atomic(out / "index.html", _html(run, plotted, stamp))
    write_text_atomic(out / "summary.md", _markdown(run, plotted, stamp))
    return out / "index.html"


def _remove_old_plots(out: Path) -> None:
    """Delete plots an earlier report left (only files named the way this module names them)."""
    pattern = re.compile(rf"[0-9]{{2,}}-[A-Za-z0-9_-]+-(?:{'|'.join(map(re.escape, KINDS))})(?:-[0-9]+)?\.png")
    for entry in out.iterdir():
        if entry.is_file() and pattern.fullmatch(entry.name):
            entry.unlink()


def parameter_rows(parameters: dict[str, dict[str, Any]]) -> list[list[Any]]:
    """Rows of the parameters table, in :data:`PARAM_HEADER` order."""
    rows = []
    for name, p in parameters.items():
        spec = p.get("spec") if isinstance(p.get("spec"), dict) else {}
        rows.append([
            name, p.get("value"), p.get("uncertainty"), p.get("unit") or "", p.get("method") or "",
            spec.get("min"), spec.get("max"), p.get("verdict"), p.get("step"), p.get("note") or "",
        ])
    return rows


def _run_facts(run: RunView) -> list[tuple[str, Any]]:
    meta = run.meta
    facts: list[tuple[str, Any]] = [
        ("Board", run.board or None), ("Revision", run.revision or None), ("Serial", run.serial or None),
        ("Status", run.status),
    ]
    verdicts = [p.get("verdict") for p in run.parameters.values()]
    if any(v in ("pass", "fail") for v in verdicts):
        failed = [n for n, p in run.parameters.items() if p.get("verdict") == "fail"]
        text = f"{verdicts.count('pass')} pass, {len(failed)} fail"
        facts.append(("Spec limits", text + (f" ({', '.join(failed)})" if failed else "")))
    for key, label in (("message", "Outcome"), ("exit_code", "Exit code"), ("started", "Started"),
                       ("ended", "Ended"), ("host", "Host"), ("software_version", "Software version"),
                       ("bench", "Bench"), ("seed", "Seed"), ("resumes", "Resumes"),
                       ("points_measured", "Points measured"), ("points_replayed", "Points replayed"),
                       ("safe_state", "Bench at the end")):
        if key in meta:
            facts.append((label, meta[key] if not isinstance(meta[key], list | dict) else str(meta[key])))
    return facts


def _html(run: RunView, plotted: list[StepPlots], stamp: str) -> str:
    title = " ".join(x for x in ("Run report:", run.board, run.revision and f"rev {run.revision}",
                                 run.serial and f"serial {run.serial}") if x)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{h(title)}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>{h(title)}</h1>",
        '<h2 id="run">Run</h2><table class="facts">',
    ]
    parts += [f"<tr><th>{h(k)}</th><td>{h(v)}</td></tr>" for k, v in _run_facts(run)]
    parts.append("</table>")
    parts.append('<h2 id="instruments">Instruments (*IDN?)</h2>')
    if run.idn:
        parts.append("<table><tr><th>Role</th><th>Identification</th></tr>")
        parts += [f"<tr><td>{h(role)}</td><td>{h(idn)}</td></tr>" for role, idn in run.idn.items()]
        parts.append("</table>")
    else:
        parts.append("<p>No instrument identification recorded.</p>")
    parts.append('<h2 id="parameters">Parameters</h2>')
    rows = parameter_rows(run.parameters)
    if rows:
        parts.append('<table class="parameters"><tr>' + "".join(f"<th>{h(c)}</th>" for c in PARAM_HEADER) + "</tr>")
        for row in rows:
            cells = []
            for i, cell in enumerate(row):
                if PARAM_HEADER[i] == "Verdict" and cell in ("pass", "fail"):
                    cells.append(f'<td class="{cell}">{h(cell)}</td>')
                elif isinstance(cell, int | float) and not isinstance(cell, bool):
                    cells.append(f'<td class="num">{h(cell)}</td>')
                else:
                    cells.append(f"<td>{h(cell)}</td>")
            parts.append("<tr>" + "".join(cells) + "</tr>")
        parts.append("</table>")
    else:
        parts.append("<p>No derived parameters.</p>")
    if run.problems:
        parts.append('<h2 id="notes">Notes</h2><ul class="notes">')
        parts += [f"<li>{h(p)}</li>" for p in run.problems]
        parts.append("</ul>")
    for sp in plotted:
        step = sp.step
        parts.append(f'<h2 id="step-{h(step.label)}">Step {step.index:02d}: {h(step.name)}</h2>')
        parts.append(f"<p>{_count(len(step.frame))}; columns: {h(', '.join(map(str, step.frame.columns)))}</p>")
        for d in sp.drawn:
            parts.append(f'<figure><img src="{h(d.file)}" alt="{h(d.title)}">'
                         f"<figcaption>{h(d.title)}</figcaption></figure>")
        if sp.notes:
            parts.append('<ul class="notes">' + "".join(f"<li>{h(n)}</li>" for n in sp.notes) + "</ul>")
    parts.append(f"<footer>Made by benchctl {h(__version__)} on {h(stamp)} from {h(run.path.name)}.</footer>")
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def _markdown(run: RunView, plotted: list[StepPlots], stamp: str) -> str:
    title = " ".join(x for x in (run.board, run.revision and f"rev {run.revision}",
                                 run.serial and f"serial {run.serial}") if x)
    out = [f"# Run report: {md(title) or md(run.path.name)}", ""]
    out += [f"- **{md(k)}:** {md(v)}" for k, v in _run_facts(run)]
    out += ["", "## Instruments (*IDN?)", ""]
    if run.idn:
        out.append(md_table(["Role", "Identification"], [[r, i] for r, i in run.idn.items()]))
    else:
        out += ["No instrument identification recorded.", ""]
    out += ["## Parameters", ""]
    rows = parameter_rows(run.parameters)
    out.append(md_table(PARAM_HEADER, rows) if rows else "No derived parameters.\n")
    if run.problems:
        out += ["## Notes", ""] + [f"- {md(p)}" for p in run.problems] + [""]
    for sp in plotted:
        out += [f"## Step {sp.step.index:02d}: {md(sp.step.name)}", "", _count(len(sp.step.frame)) + ".", ""]
        out += [f"![{md(d.title)}]({d.file})" for d in sp.drawn]
        out += [f"- {md(n)}" for n in sp.notes]
        out.append("")
    out.append(f"_Made by benchctl {md(__version__)} on {md(fmt(stamp))}._")
    return "\n".join(out) + "\n"


def _count(n: int) -> str:
    return f"{n} point" if n == 1 else f"{n} points"
