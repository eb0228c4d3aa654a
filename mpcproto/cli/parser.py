"""The ``mpcproto`` argument parser and entry point: one sub-command per step of a study, each
handled by a function of :mod:`~mpcproto.cli.examine`, :mod:`~mpcproto.cli.run`,
:mod:`~mpcproto.cli.batch` or :mod:`mpcproto.export.cli`."""

from __future__ import annotations

import argparse
import sys
import traceback
from typing import Sequence

from ..exceptions import MpcprotoError
from ._common import EXIT_BAD_INPUT, EXIT_INTERNAL
from .batch import _add_batch_command
from .examine import _cmd_assess, _cmd_check, _cmd_linearize, _cmd_models
from .run import _add_new_parser, _cmd_run


# ----------------------------------------------------------------------------------------- parser
def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``mpcproto`` command (one sub-command per step of a study)."""
    p = argparse.ArgumentParser(
        prog="mpcproto",
        description="Prototype model-predictive controllers for process units and run closed-loop "
                    "studies. Simulation only: a real plant needs its own independent safety "
                    "systems, management of change, local codes and licensed engineers.")
    from .._version import __version__

    p.add_argument("--version", action="version", version=f"mpcproto {__version__}")
    p.add_argument("--debug", action="store_true",
                   help="on an error raised by a user's model function, also print its traceback "
                        "(accepted anywhere on the command line)")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    m = sub.add_parser("models", help="list the built-in models with their variables, roles and units",
                       description="List the built-in models: their options, and every parameter, "
                                   "state, MV, DV (measured or not) and CV with its unit, nominal "
                                   "value and physical bounds, and the dead times. Scenario files "
                                   "name models and variables as listed here.")
    m.add_argument("--json", action="store_true", help="print JSON instead of tables")
    m.add_argument("--scenario", metavar="SCENARIO.toml", default=None,
                   help="show the model(s) this scenario names (plant, and the controller's model "
                        "when it has its own), with what every option value changes")
    m.set_defaults(handler=_cmd_models)
    _add_new_parser(sub)

    lz = sub.add_parser("linearize", help="operating point and linear model of a scenario",
                        description="Find the scenario's operating point and print the linear "
                                    "model there: continuous matrices A, B, Bd, C (deviation "
                                    "variables), the discrete ones at the sample time (dead times "
                                    "as delay states), steady-state gains, poles, transmission "
                                    "zeros, the RGA (square systems) and each CV <- MV pair. "
                                    "Exit 0, or 2 on bad input.")
    lz.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file")
    lz.add_argument("--json", action="store_true", help="print JSON instead of tables")
    lz.add_argument("--model", choices=("plant", "controller"), default="plant",
                    help="linearize the plant (default) or the controller's model")
    lz.set_defaults(handler=_cmd_linearize)

    ax = sub.add_parser("assess", help="design checks of a scenario's controller model",
                        description="Check the controller's model of a scenario before trusting a "
                                    "design: singular values and condition number of the gain "
                                    "matrix (scaled by the variables' ranges), weak CV and MV "
                                    "directions, collinear MVs, det G(0), RGA at steady state "
                                    "and at frequency, the Niederlinski index and the gain/phase "
                                    "margins and peak sensitivity of the scenario's PID loops, and "
                                    "suggested horizons and a sample-time check. With --locus, the "
                                    "steady states against one MV, DV or parameter with their "
                                    "folds and stability. Exit 0, or 2 on bad input.")
    ax.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file")
    ax.add_argument("--json", action="store_true", help="print JSON instead of tables")
    ax.add_argument("--locus", nargs=3, metavar=("NAME", "LOW", "HIGH"),
                    help="follow the plant's steady states while NAME (an MV, DV or parameter) "
                         "moves from LOW to HIGH")
    ax.add_argument("--plot", metavar="FILE.png", help="with --locus: draw the locus to this PNG")
    ax.set_defaults(handler=_cmd_assess)

    ck = sub.add_parser("check", help="validate scenario files without running them",
                        description="Validate scenario files as deeply as possible without "
                                    "simulating: every key, the models and the operating point, "
                                    "every name against the model, signals, instruments, faults, "
                                    "the controllers and every case of the study. Exit 0 when all "
                                    "are valid; 2 at the first invalid file, with one paragraph "
                                    "naming the file, the key, what was expected and what was "
                                    "found.")
    ck.add_argument("scenarios", nargs="+", metavar="SCENARIO.toml", help="scenario files")
    ck.add_argument("--no-controllers", action="store_true",
                    help="do not build the controllers (faster; their settings are not checked)")
    ck.set_defaults(handler=_cmd_check)

    from ..export.cli import register_cli as _register_export

    _register_export(sub)       # `export`, and `--plot` on `linearize`

    r = sub.add_parser("run", help="run a scenario's nominal case and check its criteria",
                       description="Simulate the scenario's nominal case (sweeps and Monte Carlo "
                                   "draws are for mpcproto batch) under every controller it "
                                   "declares, with the same disturbances and noise, and check its "
                                   "pass/fail criteria. Writes DIR/summary.json, "
                                   "DIR/trajectories_<controller>.csv and PNG plots. Exit 0: every "
                                   "criterion holds; 1: one failed; 2: bad input. Simulation only: "
                                   "a real plant needs its own independent safety systems, "
                                   "management of change, local codes and licensed engineers.")
    r.add_argument("scenario", metavar="SCENARIO.toml", help="the scenario file")
    r.add_argument("--out", required=True, metavar="DIR", help="output directory (created)")
    r.add_argument("--no-plots", action="store_true", help="skip the PNG plots")
    r.add_argument("--ci", action="store_true",
                   help="use the scenario's CI-sized settings ([scenario.ci] duration)")
    r.add_argument("--case", default=None, metavar="ID",
                   help="run one case of the scenario's study (an id from mpcproto batch) instead "
                        "of the nominal case")
    r.set_defaults(handler=_cmd_run)

    _add_batch_command(sub)
    return p


def _plain_warnings(prefix: str):
    """Show each distinct warning once as ``<prefix>: warning: <message>`` (no source lines).

    A user of the command line wants the message (a dead time rounded to whole samples, a draw
    clipped to its bounds), not the line of mpcproto that raised it.  Only the *format* is
    replaced, so a caller that records warnings (``warnings.catch_warnings(record=True)``,
    ``pytest.warns``) still receives them; :func:`main` restores the previous format on return.
    Forked batch workers inherit this, so their warnings read the same.  Returns the previous
    ``warnings.formatwarning``.
    """
    import warnings

    seen: set[str] = set()
    previous = warnings.formatwarning

    def fmt(message, category, filename, lineno, line=None):  # noqa: ARG001
        text = str(message)
        if text in seen:
            return ""
        seen.add(text)
        return f"{prefix}: warning: {text}\n"

    warnings.formatwarning = fmt
    return previous


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``mpcproto`` command; returns the exit code.

    ``--debug`` anywhere on the line also prints the traceback of an exception a user's model
    function raised (otherwise only its last line is in the error message).
    """
    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    args = parser.parse_args([a for a in argv if a != "--debug"])
    args.debug = debug
    import warnings

    previous_format = _plain_warnings(f"mpcproto {args.command}")
    try:
        return _run_handler(args)
    finally:
        warnings.formatwarning = previous_format


def _run_handler(args: argparse.Namespace) -> int:
    try:
        return int(args.handler(args))
    except MpcprotoError as e:
        if getattr(args, "debug", False) and getattr(e, "detail", ""):
            print(e.detail.rstrip(), file=sys.stderr)
        print(f"mpcproto {args.command}: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except BrokenPipeError:
        # the reader went away (`mpcproto linearize x.toml | head`): stop quietly, as a shell
        # tool killed by SIGPIPE would (128 + 13)
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 141
    except OSError as e:
        where = f" '{e.filename}'" if getattr(e, "filename", None) else ""
        print(f"mpcproto {args.command}: error: cannot use the file{where}: {e.strerror or e}.",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print(f"mpcproto {args.command}: interrupted.", file=sys.stderr)
        return 130
    except MemoryError as e:
        # almost always a size in the input: a prediction horizon, a duration / sample time or a
        # table far larger than meant
        print(f"mpcproto {args.command}: error: out of memory ({e}). Check the sizes in the "
              f"input: the MPC horizon and control_horizon (samples), duration / sample_time, "
              f"the number of study cases.", file=sys.stderr)
        return EXIT_BAD_INPUT
    except Exception:  # noqa: BLE001 - an internal error: show the traceback so it can be reported
        traceback.print_exc()
        print(f"mpcproto {args.command}: internal error (exit {EXIT_INTERNAL}); please report it "
              f"with the traceback above.", file=sys.stderr)
        return EXIT_INTERNAL
