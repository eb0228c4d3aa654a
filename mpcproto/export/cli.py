"""The ``mpcproto export`` command (registered by :func:`register_cli`) and ``linearize --plot``.

``mpcproto export SCENARIO.toml --out DIR [--controller LABEL] [--summary FILE] [--ci]``
    Write the hand-off bundle and prove the round trip; exit 0 when it holds, 1 when not.
``mpcproto export --check DIR``
    Re-run the round-trip proof of a bundle from the bundle alone; exit 0 / 1.

Bad input (a scenario error, a missing or malformed bundle) exits 2 through the main handler.
"""

from __future__ import annotations

import argparse
import functools
from typing import Any

from ..validation import fail

__all__ = ["register_cli", "linearize_plot"]


def _report_proof(proof: dict[str, Any], where: str) -> int:
    files = proof.get("files") or {}
    bad = [f for f, ok in files.items() if not ok]
    dev = proof.get("max_deviation")
    dev_txt = "n/a" if dev is None else ("0 (bit-identical)" if dev == 0 else f"{dev:.3g}")
    print(f"bundle schema: {proof['schema']}")
    if files:
        print(f"files: {len(files) - len(bad)} of {len(files)} unchanged since export"
              + (f" (changed or missing: {', '.join(bad)})" if bad else ""))
    print(f"replay: {proof['samples']} samples; largest move difference {dev_txt} of an MV scale "
          f"(tolerance {proof['tolerance']:g})")
    if proof["passed"]:
        print(f"ROUND TRIP PROVED: the controller rebuilt from {where} makes the original's moves.")
        return 0
    print(f"ROUND TRIP FAILED: {proof['message']}")
    return 1


def _cmd_export(args: argparse.Namespace) -> int:
    from .bundle import check_bundle

    if args.check:
        if args.scenario or args.out:
            # owner None: the CLI prints 'mpcproto export: error:' before the key
            raise fail(None, "--check", "only the bundle directory (the check uses the bundle alone)",
                       "a scenario or --out as well",
                       "Export first, then check; an export always runs the check.")
        return _report_proof(check_bundle(args.check), args.check)
    if not args.scenario or not args.out:
        raise fail(None, "scenario" if not args.scenario else "--out",
                   "SCENARIO.toml and --out DIR (or --check DIR)",
                   "no scenario" if not args.scenario else "no --out")
    from .writer import export_bundle

    res = export_bundle(args.scenario, args.out, controller=args.controller, summary=args.summary,
                        ci=args.ci)
    doc = res["bundle"]
    st = doc["study"]
    print(f"bundle written: {args.out} (controller '{doc['controller']['label']}' of scenario "
          f"{doc['scenario']['name']}; design sheet {args.out}/design_sheet.html)")
    print(f"study ({st['source']}): {'PASSED' if st['passed'] else 'NOT PASSED'}"
          + (f" ({st['message']})" if st.get("message") else ""))
    for note in doc.get("notes", []):
        print(f"note: {note}")
    return _report_proof(res["proof"], args.out)


def register_cli(sub: Any) -> None:
    """Add the ``export`` sub-command to the ``mpcproto`` parser's sub-parsers, and the
    ``--plot FILE.png`` option to ``linearize`` when that command is there."""
    lz = sub.choices.get("linearize")
    if lz is not None:
        lz.add_argument("--plot", metavar="FILE.png", default=None,
                        help="also write the step-response matrix plot (CVs down, MVs/DVs across)")
        lz.set_defaults(handler=functools.partial(_linearize_then_plot, lz.get_default("handler")))
    e = sub.add_parser(
        "export", help="write the hand-off bundle of a predictive controller (or check one)",
        description="Write a versioned bundle for the control vendor: the operating point, the "
                    "controller's model (state space, step-response coefficients per MV/DV-CV "
                    "pair, fitted FOPDT/SOPDT/integrating models), limits, tuning, estimator and "
                    "solver settings, the PID baseline, the study's verdicts and a design sheet "
                    "(HTML). The controller is then rebuilt from the bundle alone and must make "
                    "the same moves on the recorded closed-loop run. Exit 0 when that holds, 1 "
                    "when not, 2 on bad input. Format: docs/export-bundle.md.")
    e.add_argument("scenario", nargs="?", metavar="SCENARIO.toml", help="the scenario file")
    e.add_argument("--out", metavar="DIR", help="bundle directory (created)")
    e.add_argument("--controller", metavar="LABEL", default=None,
                   help="label of the predictive controller (default: the scenario's only one)")
    e.add_argument("--summary", metavar="FILE", default=None,
                   help="summary.json of an earlier 'mpcproto run' of the scenario (default: run "
                        "the nominal case now)")
    e.add_argument("--ci", action="store_true",
                   help="use the scenario's CI-sized run length (scenario.ci.duration)")
    e.add_argument("--check", metavar="DIR", default=None,
                   help="re-run the round-trip proof of an existing bundle instead of exporting")
    e.set_defaults(handler=_cmd_export)


def _linearize_then_plot(linearize: Any, args: argparse.Namespace) -> int:
    """The ``linearize`` command, then (with ``--plot``) the step-response matrix plot."""
    code = linearize(args)
    if args.plot:
        linearize_plot(args)
    return code


def linearize_plot(args: argparse.Namespace) -> None:
    """``mpcproto linearize --plot FILE.png``: write the step-response matrix plot."""
    from .writer import plot_scenario_step_matrix

    path = plot_scenario_step_matrix(args.scenario, args.plot, which=args.model)
    import sys

    print(f"step-response matrix plot written: {path}", file=sys.stderr)
