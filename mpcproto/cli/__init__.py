"""The ``mpcproto`` command line.

Commands
--------
``mpcproto models [--json] [--scenario SCENARIO.toml]``
    List the built-in and registered models with their variables, roles and units, and what every
    option value adds or removes; with ``--scenario``, the model(s) that scenario names.
``mpcproto new MODEL --out STUDY.toml [--option NAME=VALUE]``
    Write a commented starter scenario for any model reference.
``mpcproto linearize SCENARIO.toml [--json] [--model plant|controller]``
    Operating point, continuous and discrete matrices, steady-state gains, poles, transmission
    zeros, RGA (square systems) and a per-pair view.
``mpcproto assess SCENARIO.toml [--json] [--locus NAME LOW HIGH [--plot FILE.png]]``
    Design checks of the controller's model: gain-matrix conditioning and directions, RGA at
    steady state and at frequency, Niederlinski index and margins of the PID loops, horizons and
    sample time; optionally the steady-state locus against one variable, with its folds.
``mpcproto check SCENARIO.toml...``
    Validate scenario files as deeply as possible without running them (models, operating point,
    names, signal specs, controllers, every study case).
``mpcproto run SCENARIO.toml --out DIR [--ci] [--case ID]``
    Run the scenario's nominal case (or one case of its study); write DIR/summary.json, DIR/trajectories_<controller>.csv and
    PNG plots.
``mpcproto batch PATHS... --out DIR ...``
    Run every case of one or more studies (see ``mpcproto batch --help``).
``mpcproto export SCENARIO.toml --out DIR`` / ``mpcproto export --check DIR``
    Write the hand-off bundle of a predictive controller and prove the round trip, or re-run the
    proof of an existing bundle; ``mpcproto linearize ... --plot FILE.png`` draws the
    step-response matrix (both from :mod:`mpcproto.export.cli`).

Exit codes: 0 success (every pass/fail criterion holds), 1 a criterion failed, 2 bad input (a
one-paragraph message naming the file, key, expected and found; no traceback -- ``--debug`` adds
the traceback of an exception a user's model function raised), 3 an unexpected
internal error (with its traceback, so it can be reported).

Every command is a thin wrapper over a documented function: :func:`mpcproto.models.available`,
:func:`mpcproto.scenario.linear_report`, :func:`mpcproto.scenario.run_scenario`.
"""

from ._common import EXIT_BAD_INPUT, EXIT_FAILED, EXIT_INTERNAL, EXIT_OK
from .parser import build_parser, main

__all__ = ["main", "build_parser", "EXIT_OK", "EXIT_FAILED", "EXIT_BAD_INPUT", "EXIT_INTERNAL"]
