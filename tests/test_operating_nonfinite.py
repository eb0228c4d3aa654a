"""OperatingPoint.at refuses a point with non-finite derivatives with an OperatingPointError."""

from __future__ import annotations

import numpy as np
import pytest

import mpcproto as mp


def test_non_finite_jacobian_names_model_entries_and_parameter():
    # area = 1e308: rho*A*h overflows to inf in the balances, so d(...)/dh is inf - inf = nan
    m = mp.make_model("blending_tank").with_parameters(area=1e308)
    with pytest.raises(mp.OperatingPointError) as ei:
        mp.OperatingPoint.at(m, m.nominal("state"), m.nominal("mv"))
    msg = str(ei.value)
    assert "model 'blending_tank'" in msg and "non-finite Jacobian entries" in msg
    assert "d(dx_naoh/dt)/d(h) = nan" in msg and "area = 1e+308" in msg
    assert not isinstance(ei.value, np.linalg.LinAlgError)
    # the same model at a sane area is fine (finite Jacobian, eigenvalues computed)
    ok = mp.make_model("blending_tank")
    op = mp.OperatingPoint.at(ok, ok.nominal("state"), ok.nominal("mv"))
    assert np.all(np.isfinite(op.eigenvalues))
