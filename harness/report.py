"""Session results for people (a terminal table per case) and for machines (JSON, JUnit XML).

The JSON summary is stable: a top-level `session` (its uid), `suite`, `robot`, `link`, `seed`,
`status`, `passed`, and `cases`, a list whose items hold `name`, `verdict` (`pass` or `fail`),
`judge_by`, `checks` (each with `expectation`, `passed`, `text`), `runs` (each with `repetition`,
`status`, `note` and `measurements`: name, value, unit, source) and `stats` (per source, per
metric: n, mean, sd, min, max, range, ci95_low, ci95_high, and rp for lengths and angles).
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

from rich.console import Console
from rich.table import Table

from harness.jsonout import write_json, write_text
from harness.runner import RunOutcome, SessionReport


def summary_dict(report: SessionReport) -> dict[str, Any]:
    return {
        "session": report.uid,
        "suite": report.suite.name,
        "robot": report.suite.profile.id,
        "link": report.link,
        "seed": report.seed,
        "status": report.status,
        "passed": report.passed,
        "cases": [
            {
                "name": c.case.name,
                "verdict": c.verdict,
                "judge_by": c.case.judge_by,
                "checks": [{"expectation": k.expectation, "passed": k.passed, "text": k.text} for k in c.checks],
                "runs": [
                    {"repetition": r.repetition, "status": r.status, "note": r.note,
                     "measurements": [{"name": m.name, "value": m.value, "unit": m.unit, "source": m.source}
                                      for m in r.measurements]}
                    for r in c.runs
                ],
                "stats": c.stats,
            }
            for c in report.cases
        ],
    }


def write_summary_json(report: SessionReport, path: Path) -> None:
    write_json(path, summary_dict(report))


def write_junit(report: SessionReport, path: Path) -> None:
    """JUnit XML: one testsuite per session, one testcase per case, failures with the numbers."""
    failures = sum(c.verdict != "pass" for c in report.cases)
    suite = ET.Element("testsuite", name=report.suite.name, tests=str(len(report.cases)),
                       failures=str(failures), errors="0", time=f"{report.link_seconds:.3f}")
    for case in report.cases:
        element = ET.SubElement(suite, "testcase", classname=f"trackproof.{report.suite.profile.id}",
                                name=case.case.name)
        if case.verdict != "pass":
            lines = [k.text for k in case.checks if not k.passed]
            bad_runs = [r for r in case.runs if r.status != "pass"]
            if bad_runs:
                lines.append(f"{len(bad_runs)} of {len(case.runs)} runs did not pass: "
                             + "; ".join(f"run {r.repetition} {r.status} {r.note}".strip() for r in bad_runs[:5]))
            if len(case.runs) < case.expected_runs:
                lines.append(f"session aborted after {len(case.runs)} runs")
            failure = ET.SubElement(element, "failure", message=lines[0] if lines else "failed")
            failure.text = "\n".join(lines)
        out = ET.SubElement(element, "system-out")
        out.text = "\n".join(k.text for k in case.checks)
    root = ET.Element("testsuites", name="trackproof")
    root.append(suite)
    ET.indent(root)
    write_text(path, ET.tostring(root, encoding="unicode", xml_declaration=True))


def why_runs_failed(runs: list[RunOutcome], most: int = 3) -> list[str]:
    """Why runs did not pass, each reason once with the runs it hit, so a failing case says why
    without --json."""
    reasons: dict[str, list[int]] = {}
    for run in runs:
        if run.status != "pass":
            reasons.setdefault(f"{run.status}: {run.note}" if run.note else run.status, []).append(run.repetition)
    lines = [f"run{'s' if len(reps) > 1 else ''} {', '.join(map(str, reps[:6]))}{' ...' if len(reps) > 6 else ''}: "
             f"{reason}" for reason, reps in list(reasons.items())[:most]]
    if len(reasons) > most:
        lines.append(f"... and {len(reasons) - most} other reasons (see --json)")
    return lines


def _fmt(value: Any, digits: int = 2) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def print_report(report: SessionReport, console: Console) -> None:
    for case in report.cases:
        source = case.case.judge_by
        counts = {s: sum(r.status == s for r in case.runs) for s in ("pass", "fail", "aborted", "link_lost")}
        shown = [f"{n} {status}" for status, n in counts.items() if n or status in ("pass", "fail")]
        missing = case.expected_runs - len(case.runs)
        if missing:
            shown.append(f"{missing} not run" if case.runs else "not run")
        verdict = case.verdict.upper() if case.runs else "NOT RUN"
        title = f"{case.case.name}: {verdict}  ({', '.join(shown)}; judged by {source})"
        table = Table(title=title, title_justify="left", show_edge=False)
        for column in ("metric", "source", "n", "mean", "sd", "range", "95% CI ±", "RP"):
            table.add_column(column, justify="left" if column in ("metric", "source") else "right")
        for src, block in case.stats.items():
            for name, s in block.items():
                if name == "stop_spread_2d_mm":
                    table.add_row("stop (x, y)", src, str(s["n"]), "", "", "", "", _fmt(s["rp"]))
                    continue
                half = None if s.get("ci95_low") is None else (s["ci95_high"] - s["ci95_low"]) / 2
                table.add_row(name, src, str(s["n"]), _fmt(s["mean"]), _fmt(s["sd"]), _fmt(s["range"]),
                              _fmt(half), _fmt(s.get("rp")))
        if case.stats:
            console.print(table)
        else:
            console.print(title, highlight=False, markup=False)
        for check in case.checks if case.runs else ():  # a case never run has nothing to check
            mark = "[green]ok[/green]  " if check.passed else "[red]FAIL[/red]"
            console.print(f"  {mark} {check.text}", highlight=False)
        for line in why_runs_failed(case.runs):
            console.print(f"  {line}", highlight=False, markup=False)
        console.print()
    verdicts = [c.verdict for c in report.cases]
    console.print(f"session {report.uid}: {verdicts.count('pass')} of {len(verdicts)} cases passed"
                  f" ({report.status}; {report.link_seconds:.0f} s of robot time in {report.wall_seconds:.1f} s)")
