"""`trackproof compare BASELINE CURRENT`: the rebuild check between two stored sessions.

Cases are paired by name. For each case in both sessions, every metric measured in both (from
the source the current suite judges that case by) is compared: the mean with Welch's t-test, the
spread with the Brown-Forsythe test, with effect sizes in the metric's unit and a plain verdict:
same, better, worse, changed (moved, with no better direction), or not enough runs to tell (and
how many more would settle it). The p-values that decide are Holm-adjusted over the comparison's
deciding tests (and, separately, over the information-only ones), so two identical robots rarely
look different by chance; the runs needed to say "same" are planned for that correction, at
alpha/m for a family of m tests. The rules are in harness/analysis/compare.py.

Exit codes: 0 no case is worse, 1 a case is worse, 2 bad input (unknown session, bad --alpha, a
--json path whose folder does not exist: checked before comparing, so exit 1 is never hidden).
"""

from __future__ import annotations

import argparse
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from rich.console import Console
from rich.table import Table

from harness.analysis.compare import (
    MAX_RUNS,
    POWER,
    SAME_MEAN_SD,
    SAME_SD_RATIO,
    MetricComparison,
    PartComparison,
    MetricTests,
    case_verdict,
    deciding_metrics,
    judge_family,
    metric_tests,
    worst_verdict,
)
from harness.analysis.verdicts import unit_of
from harness.errors import InputError
from harness.jsonout import check_writable, json_safe, write_json
from harness.runner import stored_outcomes
from harness.store import DEFAULT_DB, Store, StoreError
from harness.suites import stored_cases

FINISHED = ("pass", "fail")
WIDE_COLUMNS = 140  # below this the tables leave out the means, sds and p-values
_STYLE = {"worse": "bold red", "better": "green", "not enough runs": "yellow", "changed": "cyan", "same": ""}


@dataclass
class SessionSide:
    """What the comparison needs from one stored session."""

    uid: str
    info: dict[str, Any]  # suite_name, robot_id, link, seed, started_at, status
    cases: dict[str, tuple[str, dict[str, Any]]]  # name -> (judge_by, expectations), suite order
    values: dict[str, dict[str, dict[str, np.ndarray]]]  # case -> source -> metric -> finished runs' values
    finished: dict[str, int]  # case -> finished runs
    units: dict[str, str] = field(default_factory=dict)


@dataclass
class CaseComparison:
    name: str
    judge_by: str
    verdict: str
    more_runs: tuple[int, int] | None
    runs: tuple[int, int]
    metrics: list[MetricComparison]
    deciding: list[str]
    note: str = ""


@dataclass
class Comparison:
    baseline: SessionSide
    current: SessionSide
    alpha: float
    cases: list[CaseComparison]
    only_baseline: list[str]
    only_current: list[str]
    units: dict[str, str]
    family_sizes: dict[str, int] = field(default_factory=dict)  # "deciding"/"information" -> tests in it

    @property
    def verdict(self) -> str:
        return worst_verdict([c.verdict for c in self.cases])  # type: ignore[arg-type]

    @property
    def any_worse(self) -> bool:
        return any(c.verdict == "worse" for c in self.cases)


# ---------------------------------------------------------------- loading


def load_side(store: Store, uid: str) -> SessionSide:
    """A session's cases and, per case and source, each metric's values over its finished runs.

    A resumed session may hold an aborted try of a repetition and its redo: the last one counts
    (as in `trackproof show`). Values that were not measured (NaN) are left out.
    """
    info = store.session(uid)
    runs = store.runs(uid)
    outcomes = stored_outcomes(runs, store.measurements(uid))
    latest = {(o.case, o.repetition): o for o in outcomes}
    cases = {name: (judge_by, expect)
             for name, judge_by, expect in stored_cases(info["suite_text"], list(runs["case_name"]), info["link"])}
    values: dict[str, dict[str, dict[str, list[float]]]] = {}
    finished: dict[str, int] = {}
    units: dict[str, str] = {}
    for (case, _), outcome in sorted(latest.items()):
        if outcome.status not in FINISHED:
            continue
        finished[case] = finished.get(case, 0) + 1
        for m in outcome.measurements:
            if math.isfinite(m.value):
                values.setdefault(case, {}).setdefault(m.source, {}).setdefault(m.name, []).append(m.value)
                units.setdefault(m.name, m.unit)
    arrays = {case: {source: {name: np.asarray(v, dtype=float) for name, v in metrics.items()}
                     for source, metrics in by_source.items()}
              for case, by_source in values.items()}
    keep = ("suite_name", "suite_path", "robot_id", "link", "seed", "started_at", "status")
    return SessionSide(uid, {k: info[k] for k in keep}, cases, arrays, finished, units)


def pick_sessions(store: Store, baseline: str | None, current: str | None, latest: bool) -> tuple[str, str]:
    """The two session uids to compare: as given (ids, unique prefixes, "latest"), or with
    --latest the two most recent sessions of the latest suite run (of the latest calibration or
    tuning command when no suite has run: their sessions have no suite file)."""
    if latest:
        if baseline or current:
            raise InputError("give either BASELINE and CURRENT or --latest, not both", key="compare")
        frame = store.sessions()
        if frame.empty:
            raise InputError(f"{store.path}: no sessions recorded yet", key="--latest")
        suites = frame[frame["suite_path"] != ""]
        if not suites.empty:
            frame = suites
        name = frame.iloc[0]["suite_name"]
        same = frame[frame["suite_name"] == name]
        if len(same) < 2:
            again = "Run the suite again" if frame.iloc[0]["suite_path"] else f"Run trackproof {name} again"
            raise InputError(f"{store.path}: only one session of {name!r} (the latest, {frame.iloc[0]['uid']}); "
                             f"--latest needs two. {again}, or name both sessions", key="--latest")
        return str(same.iloc[1]["uid"]), str(same.iloc[0]["uid"])
    if not baseline or not current:
        raise InputError("give BASELINE and CURRENT (session ids, unique prefixes or latest), or --latest",
                         key="compare")
    uids = (store.resolve_session(baseline), store.resolve_session(current))
    if uids[0] == uids[1]:
        raise InputError(f"BASELINE {baseline!r} and CURRENT {current!r} are the same session ({uids[0]}); "
                         "compare two different sessions", key="compare")
    return uids


# ---------------------------------------------------------------- comparing


def _case_tests(name: str, base: SessionSide, cur: SessionSide) -> tuple[list[MetricTests], list[str]]:
    """Tests of every metric of a case measured in both sessions (from the source the current
    suite judges the case by), and the names of the deciding ones."""
    judge_by, expect = cur.cases[name]
    a = base.values.get(name, {}).get(judge_by, {})
    b = cur.values.get(name, {}).get(judge_by, {})
    names = [m for m in b if m in a]
    tests = [metric_tests(m, a[m], b[m], expect.get(m, {})) for m in names]
    return tests, deciding_metrics(expect, names) if names else []


def compare_sessions(base: SessionSide, cur: SessionSide, alpha: float = 0.05) -> Comparison:
    """Pair the cases by name and compare each case present in both.

    The deciding tests of all compared cases are one family for Holm's correction, the
    information-only tests another (see harness/analysis/compare.py).
    """
    both = [name for name in cur.cases if name in base.cases]
    per_case = [_case_tests(name, base, cur) for name in both]
    families: dict[bool, list[tuple[int, MetricTests]]] = {True: [], False: []}
    for k, (tests, deciding) in enumerate(per_case):
        for t in tests:
            families[t.name in deciding].append((k, t))
    judged: list[list[MetricComparison]] = [[] for _ in both]
    sizes = {("deciding" if deciding else "information"): sum(p is not None for _, t in members for p in t.pvalues)
             for deciding, members in families.items()}
    for members in families.values():
        for (k, _), m in zip(members, judge_family([t for _, t in members], alpha)):
            judged[k].append(m)
    cases = []
    for name, (tests, deciding), metrics in zip(both, per_case, judged):
        judge_by = cur.cases[name][0]
        runs = (base.finished.get(name, 0), cur.finished.get(name, 0))
        if not metrics:
            cases.append(CaseComparison(name, judge_by, "not enough runs", None, runs, [], [],
                                        f"no metric from {judge_by} measured in finished runs of both sessions"))
            continue
        order = {t.name: i for i, t in enumerate(tests)}
        metrics.sort(key=lambda m: (m.name not in deciding, order[m.name]))  # deciding first
        verdict, more = case_verdict(metrics, deciding)
        cases.append(CaseComparison(name, judge_by, verdict, more, runs, metrics, deciding))
    only_base = [name for name in base.cases if name not in cur.cases]
    only_cur = [name for name in cur.cases if name not in base.cases]
    return Comparison(base, cur, alpha, cases, only_base, only_cur, {**base.units, **cur.units}, sizes)


# ---------------------------------------------------------------- output


def _more_dict(more: tuple[int, int] | None) -> dict[str, int] | None:
    return None if more is None else {"baseline": more[0], "current": more[1]}


def _part_dict(part: PartComparison) -> dict[str, Any]:
    return {"verdict": part.verdict, "p": part.p, "p_holm": part.p_adjusted, "runs_needed": part.runs_needed,
            "runs_needed_alpha": part.power_alpha, "more_runs": _more_dict(part.more_runs), "why": part.why}


def _metric_dict(m: MetricComparison, unit: str, decides: bool) -> dict[str, Any]:
    t = m.tests
    w, bf = t.welch, t.brown_forsythe
    return {
        "name": t.name,
        "unit": unit,
        "decides": decides,
        "verdict": m.verdict,
        "better_means": None if t.goal is None else {"kind": t.goal[0], "target": t.goal[1]},
        "baseline": {"n": t.n[0], "mean": t.mean[0], "sd": t.sd[0]},
        "current": {"n": t.n[1], "mean": t.mean[1], "sd": t.sd[1]},
        "mean": {"diff": t.diff, "ci95": t.diff_ci95, "t": w.t if w else None, "df": w.df if w else None,
                 **_part_dict(m.mean_part)},
        "spread": {"sd_ratio": t.sd_ratio, "sd_diff": t.sd_diff, "w": bf.w if bf else None,
                   "df1": bf.df1 if bf else None, "df2": bf.df2 if bf else None,
                   "mean_abs_dev": bf.mean_abs_dev if bf else None, **_part_dict(m.spread_part)},
    }


def comparison_dict(comp: Comparison) -> dict[str, Any]:
    """The comparison as plain JSON data (NaN and infinities as null)."""
    def side(s: SessionSide) -> dict[str, Any]:
        i = s.info
        return {"session": s.uid, "suite": i["suite_name"], "robot": i["robot_id"], "link": i["link"],
                "seed": i["seed"], "started_at": i["started_at"], "status": i["status"]}

    return json_safe({
        "baseline": side(comp.baseline),
        "current": side(comp.current),
        "alpha": comp.alpha,
        "power": POWER,
        "correction": "holm",
        "family_sizes": comp.family_sizes,
        "runs_needed_at": "alpha / family size (Bonferroni, an upper bound on the runs Holm needs)",
        "same_needs": {"mean_shift_sd": SAME_MEAN_SD, "sd_ratio": SAME_SD_RATIO},
        "verdict": comp.verdict,
        "any_worse": comp.any_worse,
        "cases": [
            {"name": c.name, "judge_by": c.judge_by, "verdict": c.verdict, "more_runs": _more_dict(c.more_runs),
             "runs": {"baseline": c.runs[0], "current": c.runs[1]}, "note": c.note,
             "metrics": [_metric_dict(m, comp.units.get(m.name) or unit_of(m.name), m.name in c.deciding)
                         for m in c.metrics]}
            for c in comp.cases
        ],
        "only_in_baseline": comp.only_baseline,
        "only_in_current": comp.only_current,
    })


def write_comparison_json(comp: Comparison, path: Path) -> None:
    write_json(path, comparison_dict(comp))


def _num(x: float | None) -> str:
    """A number with sensible digits for a table cell."""
    if x is None or not math.isfinite(x):
        return "-" if x is None or math.isnan(x) else ("inf" if x > 0 else "-inf")
    if x == 0:
        return "0"
    if abs(x) >= 100:
        return f"{x:.1f}"
    if abs(x) >= 1:
        return f"{x:.2f}"
    return f"{x:.2g}" if abs(x) < 0.01 else f"{x:.3f}"


def _p(p: float | None) -> str:
    return "-" if p is None else "<0.0001" if p < 1e-4 else f"{p:.2g}"


def more_text(more: tuple[int, int] | None) -> str:
    if more is None:
        return f"more runs than is practical (over {MAX_RUNS} per side) or an unknown number"
    a, b = more
    if a == b:
        return f"{a} more run{'s' if a != 1 else ''} per side"
    return f"{a} more baseline and {b} more current run{'s' if b != 1 else ''}"


def _verdict_cell(m: MetricComparison) -> str:
    v = m.verdict
    if v in ("worse", "better", "changed"):
        which = [name for name, part in (("mean", m.mean_part), ("spread", m.spread_part)) if part.verdict == v]
        text = f"{v} ({' and '.join(which)})"
    elif v == "not enough runs":
        more = [p.more_runs for p in (m.mean_part, m.spread_part) if p.verdict == v]
        known = [x for x in more if x is not None]
        text = v + (f" (+{max(max(x) for x in known)})" if known and len(known) == len(more) else "")
    else:
        text = v
    style = _STYLE[v]
    return f"[{style}]{text}[/{style}]" if style else text


def _case_table(case: CaseComparison, units: dict[str, str], title: str, wide: bool) -> Table:
    """One case's metrics; a narrow terminal gets the effect sizes and verdicts only (all the
    numbers are in --json)."""
    table = Table(title=title, title_justify="left", show_edge=False)
    widest = max(len(m.name) + (0 if m.name in case.deciding else 7) for m in case.metrics)
    table.add_column("metric", no_wrap=True, min_width=widest)  # names are what people scan for
    columns = (["n", "baseline mean ± sd", "current mean ± sd", "mean change [95% CI]", "p Welch*", "sd ratio",
                "p B-F*"] if wide else ["mean change [95% CI]", "sd ratio"])
    for column in columns:
        table.add_column(column, justify="right", no_wrap=column in ("n", "mean change [95% CI]"))
    table.add_column("verdict", no_wrap=True)
    for m in case.metrics:
        t = m.tests
        unit = units.get(t.name) or unit_of(t.name)
        ci = t.diff_ci95
        change = f"{t.diff:+.3g}" + (f" [{_num(ci[0])}, {_num(ci[1])}]" if ci else "") + (f" {unit}" if unit else "")
        name = t.name if t.name in case.deciding else f"[dim]{t.name} (info)[/dim]"
        cells = {
            "n": f"{t.n[0]} -> {t.n[1]}",
            "baseline mean ± sd": f"{_num(t.mean[0])} ± {_num(t.sd[0])}",
            "current mean ± sd": f"{_num(t.mean[1])} ± {_num(t.sd[1])}",
            "mean change [95% CI]": change,
            "p Welch*": _p(m.mean_part.p_adjusted),
            "sd ratio": _num(t.sd_ratio),
            "p B-F*": _p(m.spread_part.p_adjusted),
        }
        table.add_row(name, *(cells[c] for c in columns), _verdict_cell(m))
    return table


def _planned_text(comp: Comparison) -> str:
    """At which alpha the runs needed were planned: alpha/m per family (Bonferroni, as the
    Holm-adjusted decision needs at most that many runs)."""
    parts = [f"alpha/{m} = {comp.alpha / m:.3g} for the {m} {name} tests"
             for name, m in comp.family_sizes.items() if m]
    return ("at " + " and ".join(parts) + " (Bonferroni, a safe bound for Holm)") if parts else f"at alpha {comp.alpha:g}"


def print_comparison(comp: Comparison, console: Console) -> None:
    b, c = comp.baseline, comp.current
    for label, side in (("baseline", b), ("current ", c)):
        what = f"suite {side.info['suite_name']}" if side.info["suite_path"] else side.info["suite_name"]
        console.print(f"{label} {side.uid}: {what}, robot {side.info['robot_id']}, "
                      f"link {side.info['link']}, seed {side.info['seed']}, started {side.info['started_at']}")
    console.print(f"means by Welch's t-test, spreads by Brown-Forsythe, alpha {comp.alpha:g}; * p-values after "
                  "Holm's correction for the many tests; \"same\" needs enough runs to see a "
                  f"{SAME_MEAN_SD:g}-sd shift or a {SAME_SD_RATIO:g}x spread with {POWER:.0%} power "
                  f"{_planned_text(comp)}; dimmed metrics are information, not part of the case verdict\n")
    for case in comp.cases:
        style = _STYLE[case.verdict]
        head = case.verdict.upper()
        title = (f"{case.name}: [{style}]{head}[/{style}]" if style else f"{case.name}: {head}")
        title += f"  (judged by {case.judge_by}; finished runs {case.runs[0]} -> {case.runs[1]})"
        if case.verdict == "not enough runs" and case.metrics:
            title += f"; {more_text(case.more_runs)} would settle it"
        if not case.metrics:
            console.print(title + f": {case.note}\n")
            continue
        console.print(_case_table(case, comp.units, title, wide=console.width >= WIDE_COLUMNS))
        console.print()
    for label, names in (("only in baseline", comp.only_baseline), ("only in current", comp.only_current)):
        if names:
            console.print(f"{label} (not compared): {', '.join(names)}")
    counts = {v: sum(c.verdict == v for c in comp.cases) for v in ("worse", "better", "not enough runs",
                                                                     "changed", "same")}
    parts = ", ".join(f"{n} {v}" for v, n in counts.items() if n)
    style = _STYLE[comp.verdict]
    overall = comp.verdict.upper()
    console.print(f"overall: [{style}]{overall}[/{style}] ({parts}; {len(comp.cases)} cases compared)"
                  if style else f"overall: {overall} ({parts}; {len(comp.cases)} cases compared)")


# ---------------------------------------------------------------- the command


def cmd_compare(args: argparse.Namespace) -> int:
    alpha = args.alpha
    if not (isinstance(alpha, float) and 0.0 < alpha < 0.5):
        raise InputError(f"expected a significance level between 0 and 0.5, got {alpha!r}", key="--alpha")
    if args.json:
        check_writable(args.json)  # before any work: a bad path after the report would hide exit 1 for "worse"
    try:
        with Store(args.db, readonly=True) as store:
            base_uid, cur_uid = pick_sessions(store, args.baseline, args.current, args.latest)
            base, cur = load_side(store, base_uid), load_side(store, cur_uid)
    except StoreError as exc:  # unknown session or results file: bad input, and the message names the file
        raise InputError(str(exc)) from None
    comp = compare_sessions(base, cur, alpha)
    if not comp.cases:
        raise InputError(f"sessions {base_uid} and {cur_uid} have no case in common (baseline: "
                         f"{', '.join(base.cases) or 'none'}; current: {', '.join(cur.cases) or 'none'})",
                         key="compare")
    if args.json:  # before the terminal report: a reader that leaves early must not cost the file
        write_comparison_json(comp, args.json)
    print_comparison(comp, Console(highlight=False))
    return 1 if comp.any_worse else 0


def add_parser(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Register `trackproof compare` on the CLI's subcommands."""
    p = sub.add_parser(
        "compare", help="the rebuild check: compare two sessions case by case",
        description="Compare two stored sessions case by case: whether each metric's mean moved "
                    "(Welch's t-test) and whether its spread changed (Brown-Forsythe), with effect sizes "
                    "in the metric's unit and a verdict: same, better, worse, changed, or not enough runs "
                    "to tell (and how many more would settle it). Exit codes: 0 no case is worse, "
                    "1 a case is worse, 2 bad input.")
    p.add_argument("baseline", metavar="BASELINE", nargs="?", help="session id, a unique prefix, or latest")
    p.add_argument("current", metavar="CURRENT", nargs="?", help="session id, a unique prefix, or latest")
    p.add_argument("--latest", action="store_true",
                   help="compare the two most recent sessions of the latest session's suite")
    p.add_argument("--db", type=Path, default=Path(DEFAULT_DB), help=f"results database (default {DEFAULT_DB})")
    p.add_argument("--json", type=Path, metavar="PATH", help="write the comparison as JSON here")
    p.add_argument("--alpha", type=float, default=0.05, help="significance level of both tests (default 0.05)")
    p.set_defaults(func=cmd_compare)
    return p
