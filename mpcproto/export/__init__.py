"""Hand-off of a predictive controller to the control vendor: the export bundle.

``mpcproto export SCENARIO.toml --out DIR`` (:func:`export_bundle`) writes a versioned bundle in a
format of our own (plain JSON + CSV + HTML, documented in ``docs/export-bundle.md``, JSON Schema
``bundle.schema.json`` in this package); ``PredictiveController.from_bundle(DIR)`` rebuilds the
controller from it alone and :func:`check_bundle` (``mpcproto export --check DIR``) re-runs the
round-trip proof.

Layers: :mod:`.step_matrix` and :mod:`.bundle` use only the model, linear and control layers (a
bundle is read and checked without the scenario or the simulator); :mod:`.writer`,
:mod:`.sheet` and :mod:`.cli` are orchestration and I/O on top of the scenario layer.
"""

from .bundle import (FORMAT, FORMAT_VERSION, TOLERANCE, check_bundle, load_schema, read_bundle,
                     validate_bundle)
from .step_matrix import fit_pairs, plot_step_matrix, settling_samples, step_coefficients


def export_bundle(*args, **kwargs):
    """See :func:`mpcproto.export.writer.export_bundle` (imported lazily: it needs the scenario
    layer)."""
    from .writer import export_bundle as _export

    return _export(*args, **kwargs)


__all__ = ["export_bundle", "check_bundle", "read_bundle", "validate_bundle", "load_schema",
           "FORMAT", "FORMAT_VERSION", "TOLERANCE", "step_coefficients", "settling_samples",
           "fit_pairs", "plot_step_matrix"]
