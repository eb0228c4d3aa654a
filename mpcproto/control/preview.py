"""Setpoint preview: a setpoint program known in advance, as per-stage CV references.

With ``setpoint_preview`` on, :class:`~mpcproto.control.mpc.PredictiveController` takes the
setpoints expected over its prediction horizon (``setpoint_program``: rows = samples t, t+Ts,
..., columns = CVs; the closed loop passes the known part of the scenario's setpoint signals).
:func:`stage_references` turns them into

* the setpoint at the end of the horizon (row N), from which the steady target is computed (the
  target the dynamic QP rests at, the MVs' preferred values and the terminal cost's state), and
* per stage k = 1..N, the program's departure from that end value, ``sp(t + k Ts) - sp(t + N Ts)``;
  the dynamic QP's reference for a CV at stage k is its band value (the steady target's CV
  value, or the end setpoint without steady target) plus that departure.  When the target meets
  the end setpoint, the reference is the previewed setpoint itself at every stage.

Only CVs that have a setpoint now are previewed; a NaN entry in the program is the setpoint now
(a setpoint that starts or ends within the horizon is not previewed).  Rows past the program's
end repeat its last row.  With a constant program every departure is zero and the QP is the one
without preview.  The departures enter the condensed QP's gradient only (one matrix-vector
product; no rebuild) and the sparse statement's band parameters through its input map.
"""

from __future__ import annotations

import numpy as np

from ..exceptions import SettingsError

__all__ = ["stage_references", "rows_by_sample"]


def rows_by_sample(value, ncols: int, key: str, columns: str) -> np.ndarray:
    """*value* as an (n, ncols) float array of rows by sample (a single row may be 1-D).

    Raises :class:`SettingsError` naming *key* when it is not such an array with n >= 1.
    """
    try:
        a = np.asarray(value, float)
    except (TypeError, ValueError):
        raise SettingsError(owner="PredictiveController", key=key,
                            expected=f"an array of numbers of shape (n, {ncols})",
                            found=type(value).__name__) from None
    if a.ndim == 1:
        a = a[None, :]
    if a.ndim != 2 or a.shape[1] != ncols or a.shape[0] < 1:
        raise SettingsError(owner="PredictiveController", key=key,
                            expected=f"shape (n, {ncols}) (rows: samples from now, columns: "
                                     f"{columns} in model order)",
                            found=f"shape {np.shape(value)}")
    return a


def stage_references(program, sp_now: np.ndarray, N: int) -> tuple[np.ndarray, np.ndarray]:
    """``(sp_end, departures)`` of a setpoint program over a horizon of *N* samples.

    Parameters
    ----------
    program : array (n, ny)
        Setpoints (absolute) at t, t+Ts, ...; rows past the end repeat the last one; NaN: the
        setpoint now.
    sp_now : ndarray (ny,)
        The setpoints now (NaN: none; such a CV is not previewed).
    N : int
        Prediction horizon.

    Returns
    -------
    sp_end : ndarray (ny,)
        The setpoints at t + N Ts (NaN where there is no setpoint now).
    departures : ndarray (N * ny,)
        ``sp(t + k Ts) - sp_end`` for k = 1..N, stage after stage (entry ``(k-1)*ny + i``), zero
        for CVs without a setpoint.

    Raises
    ------
    SettingsError
        When *program* is not an (n, ny) array of numbers with n >= 1.
    """
    P = rows_by_sample(program, sp_now.shape[0], "setpoint_program", "CVs")
    P = P[np.minimum(np.arange(N + 1), P.shape[0] - 1)]
    has = np.isfinite(sp_now)
    P = np.where(np.isfinite(P) & has, P, sp_now)
    sp_end = P[N].copy()
    dep = np.where(has, P[1:] - sp_end, 0.0)
    return sp_end, dep.ravel()
