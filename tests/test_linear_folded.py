"""LinearModel.folded_inputs: the delay-free (B, D) pair."""

from __future__ import annotations

import numpy as np
import pytest

import mpcproto as mp


def test_folded_inputs_give_the_wood_berry_gains_without_dead_times():
    # Wood & Berry (1973), from memory: G(0) = [[12.8, -18.9], [6.6, -19.4]] (xd, xb rows; reflux,
    # steam columns); every element carries a dead time, so B and D alone are zero for the MVs
    m = mp.make_model("wood_berry")
    lin = mp.linearize(m, mp.steady_state(m))
    assert np.allclose(lin.B, 0.0) and np.allclose(lin.D, 0.0)
    Bf, Df = lin.folded_inputs("mv")
    G0 = -lin.C @ np.linalg.solve(lin.A, Bf) + Df
    assert G0 == pytest.approx(np.array([[12.8, -18.9], [6.6, -19.4]]), rel=1e-9)
    assert np.allclose(G0, lin.gain())
    # the DV side folds the same way and agrees with gain("dv")
    Bdf, Ddf = lin.folded_inputs("dv")
    assert Bdf.shape == lin.Bd.shape
    assert np.allclose(-lin.C @ np.linalg.solve(lin.A, Bdf) + Ddf, lin.gain("dv"))
    with pytest.raises(mp.SettingsError, match=r"folded_inputs\(\): key 'role': expected 'mv' or 'dv', found 'cv'"):
        lin.folded_inputs("cv")
