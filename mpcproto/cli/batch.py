"""The ``mpcproto batch`` command: every case of one or more studies through
:func:`mpcproto.scenario.batch.run_batch`, then the report writers (``summary.csv``, the HTML report,
JUnit XML, the baseline comparison)."""

from __future__ import annotations

import math
import sys
from typing import Any

from ..analysis.criteria import REGRESSION_ATOL, REGRESSION_RTOL
from ._common import EXIT_BAD_INPUT, EXIT_FAILED, EXIT_OK


# ------------------------------------------------------------------------------------------ batch
#: Exit code of ``mpcproto batch`` stopped by Ctrl-C (128 + SIGINT) and by SIGTERM (128 + SIGTERM),
#: the shell's convention for a process ended by that signal.
EXIT_INTERRUPTED = 130
EXIT_TERMINATED = 143


def _add_batch_command(sub) -> None:
    """Add the ``batch`` sub-command (:func:`mpcproto.scenario.batch.run_batch` and the reports)."""
    b = sub.add_parser(
        "batch", help="run every case of one or more studies in parallel, with CI verdicts",
        description="Run every case (sweeps x Monte Carlo draws) of the given scenario files on a "
                    "local process pool or a Dask cluster. One JSON line per finished case is "
                    "appended to DIR/results.jsonl; DIR/summary.csv and DIR/report.html are written "
                    "at the end. Exit code 0: every case passed; 1: a criterion failed, a case did "
                    "not complete or a KPI got worse than the baseline; 2: bad input or DIR in use "
                    "by another batch; 130: Ctrl-C; 143: SIGTERM (finished cases are kept; "
                    "--resume runs the rest). Simulation only: a real plant needs its own "
                    "independent safety systems, management of change, local codes and licensed "
                    "engineers.")
    b.add_argument("paths", nargs="+", metavar="PATH",
                   help="scenario files (.toml) or directories of them")
    b.add_argument("--out", required=True, metavar="DIR",
                   help="output directory (created; locked while the batch runs)")
    where = b.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=None, metavar="N",
                       help="worker processes of the local pool (default: the available CPUs)")
    where.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="run on a running Dask scheduler, e.g. tcp://host:8786 (needs the "
                            "optional extra: pip install \"mpcproto[dask]\")")
    b.add_argument("--resume", action="store_true",
                   help="keep the complete records of DIR/results.jsonl and run only the other "
                        "cases (missing, incomplete or changed since they ran)")
    b.add_argument("--full", action="store_true",
                   help="use the studies' full Monte Carlo sizes and sweep values (default: the "
                        "CI-sized study)")
    b.add_argument("--junit", default=None, metavar="FILE",
                   help="also write JUnit XML: one test case per case and criterion")
    b.add_argument("--baseline", default=None, metavar="RESULTS.jsonl",
                   help="compare with an earlier run's results.jsonl; KPIs worse beyond the "
                        "tolerance fail the batch")
    b.add_argument("--tolerance", type=float, default=REGRESSION_RTOL, metavar="REL",
                   help=f"relative tolerance of the baseline comparison (default "
                        f"{REGRESSION_RTOL:g} = {100 * REGRESSION_RTOL:g} %%)")
    b.add_argument("--abs-tolerance", type=float, default=REGRESSION_ATOL, metavar="ABS",
                   help=f"absolute tolerance of the baseline comparison, in each KPI's unit "
                        f"(default {REGRESSION_ATOL:g})")
    b.add_argument("--no-trajectories", action="store_true",
                   help="do not re-run the worst cases for the report's trajectory plots (by "
                        "default the worst case of each scenario with a failed case, at most 3, "
                        "or the case closest to a limit when all passed)")
    b.add_argument("--progress-interval", type=float, default=30.0, metavar="SECONDS",
                   help="when stderr is not a terminal (a CI log), print a plain progress line "
                        "this often (default 30 s) and at the end")
    b.set_defaults(handler=_cmd_batch)


def _scenario_files(paths) -> list:
    from pathlib import Path

    from ..exceptions import ScenarioError

    files: list[Path] = []
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            found = sorted(p.glob("*.toml"))
            if not found:
                raise ScenarioError("expected a scenario file (.toml) or a directory holding some; "
                                    "found a directory with no .toml file.", file=str(p))
            files.extend(found)
        elif p.is_file():
            files.append(p)
        else:
            raise ScenarioError("expected a scenario file (.toml) or a directory of them; found no "
                                "such file or directory.", file=str(p))
    unique: list[Path] = []
    for f in files:
        if f.resolve() not in {u.resolve() for u in unique}:
            unique.append(f)
    return unique


def _load_cases(files: list, full: bool) -> tuple[list[Any], dict[str, Any]]:
    from ..exceptions import ScenarioError
    from ..scenario import check_scenario, expand, load_scenario

    cases: list[Any] = []
    owner: dict[str, str] = {}
    scenarios: dict[str, Any] = {}
    for f in files:
        scn = load_scenario(f)
        check_scenario(scn, build_controllers=True)
        for c in expand(scn, full=full):
            if c.case_id in owner:
                raise ScenarioError(
                    f"case id {c.case_id!r} also comes from {owner[c.case_id]}; case ids must be "
                    "unique across a batch: give the scenarios distinct names "
                    "([scenario] name = ...).", file=str(f), key="scenario.name")
            owner[c.case_id] = str(f)
            cases.append(c)
        scenarios[scn.name] = scn
    return cases, scenarios


def _worst_case_images(records: list[dict[str, Any]], cases: list[Any], limit: int = 3
                       ) -> list[tuple[str, bytes]]:
    """Re-run (same seed, same numbers) and plot the worst case of each scenario with a failed case
    (at most *limit*), or the case closest to a limit when every case passed."""
    import tempfile
    import warnings
    from pathlib import Path

    from ..report.html import sort_worst_first
    from ..store import case_id_of, case_verdict

    try:
        from ..report import plots
        from ..scenario.runner import _run  # the runner's (record, trajectories) form
    except ImportError:
        return []
    by_id = {case_id_of(c): c for c in cases}
    picked: dict[str, dict[str, Any]] = {}
    ranked = [r for r in sort_worst_first(records)
              if case_verdict(r) != "error" and r.get("case_id") in by_id]
    for rec in ranked:   # the worst case of every scenario with a failed case ...
        scen = str(rec.get("scenario", ""))
        if case_verdict(rec) == "failed" and scen not in picked:
            picked[scen] = rec
    if not picked and ranked:   # ... or, when all passed, the one closest to a limit
        picked[str(ranked[0].get("scenario", ""))] = ranked[0]
    images: list[tuple[str, bytes]] = []
    with tempfile.TemporaryDirectory() as tmp:
        for scen, rec in list(picked.items())[:limit]:
            cid = rec["case_id"]
            try:
                _, trajs = _run(by_id[cid])
                if not trajs:
                    continue
                stem = Path(tmp) / f"{len(images)}"
                plots.plot_cvs(dict(trajs), f"{stem}_cvs.png", title=f"{scen}: {cid}")
                plots.plot_mvs(dict(trajs), f"{stem}_mvs.png", title=f"{scen}: {cid}")
                what = (f"{scen}: the case closest to (or beyond) a limit, {cid} "
                        f"({case_verdict(rec)})")
                images.append((what + ": CVs", Path(f"{stem}_cvs.png").read_bytes()))
                images.append((what + ": MVs", Path(f"{stem}_mvs.png").read_bytes()))
            except Exception as exc:  # noqa: BLE001 - a figure must not sink the report
                warnings.warn(f"no trajectory plot for case {cid}: {type(exc).__name__}: {exc}",
                              RuntimeWarning, stacklevel=2)
    return images


def _cmd_batch(args) -> int:
    """Handler of ``mpcproto batch`` (exit codes: 0 pass, 1 fail/error/regression, 2 bad input or
    folder in use, 130 Ctrl-C, 143 SIGTERM)."""
    import warnings
    from pathlib import Path

    from ..exceptions import ScenarioError
    from ..store import ID_KEY, RESULTS_FILE, is_complete, load_results, lock_output, missing_fields
    from ..validation import fail

    # owner None: the CLI prints 'mpcproto <command>: error:' before the key
    if args.workers is not None and args.workers < 1:
        raise fail(None, "--workers", "an int in the range [1, inf)", f"{args.workers}")
    for opt in ("tolerance", "abs_tolerance"):
        v = getattr(args, opt)
        if not (math.isfinite(v) and v >= 0):
            raise fail(None, f"--{opt.replace('_', '-')}", "a finite number >= 0", f"{v}")
    if not (math.isfinite(args.progress_interval) and args.progress_interval > 0):
        raise fail(None, "--progress-interval", "a finite number of seconds > 0",
                   f"{args.progress_interval}")
    if args.baseline is not None and not Path(args.baseline).is_file():
        raise ScenarioError("expected the results.jsonl of an earlier batch (--baseline); found no "
                            "such file.", file=args.baseline)
    if args.baseline is not None:
        # a wrong file given as the baseline would otherwise compare nothing and pass
        with warnings.catch_warnings(record=True) as skipped:
            warnings.simplefilter("always")
            n_base = sum(1 for r in load_results(args.baseline) if not missing_fields(r))
        if n_base == 0:
            raise ScenarioError(
                "expected the results.jsonl of an earlier batch (--baseline): one JSON record with "
                f"a '{ID_KEY}', a 'status' and a 'passed' verdict per line; found no such record "
                f"({len(skipped)} line(s) skipped).", file=args.baseline)
    files = _scenario_files(args.paths)
    out_dir = Path(args.out)
    with lock_output(out_dir):   # refused at once when another batch writes there
        cases, _ = _load_cases(files, args.full)
        try:
            return _batch_locked(args, cases, files, out_dir)
        except KeyboardInterrupt as stop:
            results = out_dir / RESULTS_FILE
            done = sum(1 for r in load_results(results) if is_complete(r)) \
                if results.exists() else 0
            how = "stopped by SIGTERM" if getattr(stop, "signum", None) else "interrupted"
            print(f"\nmpcproto batch: {how}; {done} finished case(s) are kept in {results}. Run "
                  f"the same command with --resume to finish the rest.", file=sys.stderr)
            return EXIT_TERMINATED if getattr(stop, "signum", None) else EXIT_INTERRUPTED


def _batch_locked(args, cases: list[Any], files: list, out_dir) -> int:
    """Run the cases and write the reports; the output folder is held by the caller."""
    from ..report.baseline import compare_with_baseline
    from ..report.html import SAFETY_CAUTION, write_html_report
    from ..report.junit import write_junit
    from ..report.summary import criteria_of, write_summary_csv
    from ..scenario.batch import run_batch
    from ..scenario.executors import dask_executor, default_workers
    from ..store import case_id_of, load_results

    ids = [case_id_of(c) for c in cases]
    print(f"mpcproto batch: {len(cases)} cases from {len(files)} scenario file(s) -> {out_dir}",
          file=sys.stderr)
    if args.scheduler:
        try:
            dask_cm = dask_executor(args.scheduler)
            ex = dask_cm.__enter__()
        except ImportError as exc:
            print(f"mpcproto batch: error: {exc}", file=sys.stderr)
            return EXIT_BAD_INPUT
        try:
            outcome = run_batch(cases, out_dir, executor=ex, resume=args.resume,
                                progress_interval=args.progress_interval)
        finally:
            dask_cm.__exit__(None, None, None)
        where = f"Dask scheduler {args.scheduler}"
    else:
        outcome = run_batch(cases, out_dir, workers=args.workers, resume=args.resume,
                            progress_interval=args.progress_interval)
        where = f"{args.workers or default_workers()} local worker process(es)"

    order = {cid: i for i, cid in enumerate(ids)}
    records = sorted(load_results(outcome.results_path, ids), key=lambda r: order[r["case_id"]])
    write_summary_csv(records, out_dir / "summary.csv")   # rows in case order, stable for diffs
    comparison = None
    if args.baseline:
        comparison = compare_with_baseline(records, args.baseline, rtol=args.tolerance,
                                           atol=args.abs_tolerance)
        comparison.baseline_file = str(args.baseline)
        if comparison.cases_compared == 0:
            print(f"mpcproto batch: warning: the baseline {args.baseline} has none of these cases' "
                  f"ids; nothing was compared with it.", file=sys.stderr)
    if args.junit:
        write_junit(records, args.junit, baseline=comparison)
    images = [] if args.no_trajectories else _worst_case_images(records, cases)
    info = {"run on": where, "wall time": f"{outcome.wall_s:.1f} s"}
    if outcome.skipped:
        info["resumed"] = f"{outcome.skipped} case(s) kept from an earlier run"
    title = "Closed-loop study: " + ", ".join(sorted({str(r.get("scenario")) for r in records}))
    write_html_report(records, out_dir / "report.html", title=title, run_info=info,
                      baseline=comparison, images=images)

    n_reg = len(comparison.regressions) if comparison else 0
    print(f"{outcome.passed} passed, {outcome.failed} failed a criterion, {outcome.errors} did not "
          f"complete" + (f", {n_reg} KPI(s) worse than the baseline" if comparison else "")
          + f" ({outcome.total} cases, {outcome.ran} run now, {outcome.wall_s:.1f} s)")
    if outcome.changed:
        print(f"  {len(outcome.changed)} case(s) had changed since their results were recorded and "
              f"ran again (e.g. {outcome.changed[0]})")
    if outcome.incomplete:
        print(f"  {len(outcome.incomplete)} case(s) had an incomplete record (no status, verdict "
              f"or fingerprint) and ran again (e.g. {outcome.incomplete[0]})")
    for cid in outcome.error_ids[:10]:
        rec = next((r for r in records if r.get("case_id") == cid), {})
        print(f"  error  {cid}: {rec.get('message', '')}")
    for cid in outcome.failed_ids[:10]:
        rec = next((r for r in records if r.get("case_id") == cid), {})
        failed = [f"{label + ': ' if label else ''}{cr.get('name')}" for label, cr in criteria_of(rec)
                  if cr.get("passed") is not True]
        print(f"  FAIL   {cid}" + (f": {', '.join(failed[:4])}" + (", ..." if len(failed) > 4 else "")
                                   if failed else ""))
    if comparison:
        for r in comparison.regressions[:10]:
            print(f"  WORSE  {r.describe()}")
    print(f"results: {outcome.results_path}  summary: {out_dir / 'summary.csv'}  "
          f"report: {out_dir / 'report.html'}" + (f"  junit: {args.junit}" if args.junit else ""))
    print(SAFETY_CAUTION)
    return EXIT_OK if (outcome.success and n_reg == 0) else EXIT_FAILED
