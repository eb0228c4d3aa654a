"""The one projection of an MV command onto its hard limits and its rate limit.

Every controller forms its command through :func:`project_command` (the predictive controller
after a solve, a shifted plan, a hold or a failed estimate; the PID loops after their
algorithm), so no command outside a hard limit is ever sent, whatever a solver returned, however
far a limit stepped, wherever the run started and whatever the valve readback said.

The rule, per MV (``u`` asked, ``p`` the previous MV, ``[lo, hi]`` the hard limits, ``r`` the
largest move per sample)::

    v   = p                        where u is NaN (no request: hold)
    w   = min(max(v, p - r), p + r)                       the rate limit
    out = min(max(w, lo), hi)                             the hard limits, applied LAST

**Hard limits win.**  When both cannot hold -- the previous MV lies outside ``[lo, hi]`` by more
than ``r`` (a limit stepped past the MV, a run that starts outside a limit, a valve read back
beyond a limit) -- the command goes to the nearest hard limit in one move, larger than ``r``.
A rate limit protects equipment from fast moves; a hard limit is the range the MV may take at
all, and a command outside it is never sent.  Inside the limits the rate limit holds as usual.

Other cases: a limit of +-inf or NaN is no limit; a rate of inf or NaN is no rate limit; where
the previous MV is unknown (NaN) the rate limit cannot apply and only the hard limits do; where
neither a request nor a previous MV exists the result is NaN (no command: the actuator holds).
"""

from __future__ import annotations

import math

import numpy as np

from ..validation import fail

__all__ = ["project_command", "project_value", "limit_activity", "project_with_activity"]

#: numpy's float64 (one object: a native float array's dtype is it)
_FLOAT = np.dtype(float)


def project_command(u, u_prev, lo, hi, max_move, *, what: str = "project_command") -> np.ndarray:
    """The MV command sent: *u* projected onto the rate limit, then onto the hard limits.

    Parameters
    ----------
    u : array_like (nu,) or float
        The command asked for (absolute; NaN: none, hold the previous MV).
    u_prev : array_like
        The previous MV (absolute; the last command, or the valve position read back).
    lo, hi : array_like
        Hard limits (absolute; +-inf or NaN: none).  ``lo <= hi`` where both are given.
    max_move : array_like
        Largest move per sample (>= 0; inf or NaN: none).
    what : str
        Named in the error message.

    Returns
    -------
    ndarray
        The command, inside ``[lo, hi]`` wherever it is finite; see the module docstring for
        the rule when the rate limit and the hard limits cannot both hold (hard limits win).

    Raises
    ------
    SettingsError
        A low limit above its high limit, or a negative rate.

    Examples
    --------
    >>> project_command([3.0], [3.0], [0.0], [1.4], [0.1]).tolist()     # hard limits win
    [1.4]
    >>> project_command([0.9], [0.5], [0.0], [1.4], [0.1]).tolist()     # rate limit inside
    [0.6]
    """
    u = np.asarray(u, float)
    shape = u.shape
    cols = [_floats(a, shape) for a in (u, u_prev, lo, hi, max_move)]
    return np.array(_project(cols, what), float).reshape(shape)


def _project(cols, what):
    """:func:`project_value` per MV on the flat float lists (u, u_prev, lo, hi, max_move): a
    handful of MVs, where plain Python floats are much cheaper than numpy calls."""
    return [project_value(*row, what=f"{what} (MV {j})") for j, row in enumerate(zip(*cols))]


def _floats(a, shape) -> list[float]:
    """*a* as a flat list of floats of the shape of the command (a scalar is repeated)."""
    a = np.asarray(a, float)
    if a.shape == shape:
        return a.ravel().tolist()
    if a.ndim == 0:
        return [float(a)] * math.prod(shape)
    return np.broadcast_to(a, shape).ravel().tolist()


def project_value(u: float, p: float, lo: float, hi: float, r: float, *,
                  what: str = "project_value") -> float:
    """:func:`project_command` for one MV, on plain floats (the PID loops' per-loop path).

    The rule of the module docstring; a NaN compares False, so a NaN limit or rate is none.
    """
    if lo > hi:
        raise fail(what, "low", f"a low limit <= the high limit ({hi:g})", f"{lo:g}")
    if r < 0:
        raise fail(what, "rate", "a rate limit >= 0", f"{r:g}")
    if u != u:                      # no request: hold the previous MV
        u = p
        if u != u:
            return math.nan         # nothing known: no command
    if u > p + r:                   # the rate limit (skipped where p or r is NaN)
        u = p + r
    elif u < p - r:
        u = p - r
    if u < lo:                      # the hard limits last: they win
        u = lo
    elif u > hi:
        u = hi
    return u


def limit_activity(u, u_prev, lo, hi, max_move, *, rel_tol: float = 1e-6
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Which MVs of a projected command sit at a hard limit, at the rate limit, or moved more
    than the rate limit because the hard limits won (all boolean arrays, MV order).

    The tolerance is ``rel_tol * max(1, |u|)`` (the solver tolerance scale).
    """
    u = np.asarray(u, float)
    shape = u.shape
    cols = [_floats(x, shape) for x in (u, u_prev, lo, hi, max_move)]
    return _activity(cols, shape, rel_tol)


def _activity(cols, shape, rel_tol):
    """:func:`limit_activity` on the flat float lists (u, u_prev, lo, hi, max_move)."""
    at_limit, at_rate, over_rate = [], [], []
    for v, p, a, b, r in zip(*cols):
        lim, rate, over = _active(v, p, a, b, r, rel_tol)
        at_limit.append(lim)
        at_rate.append(rate)
        over_rate.append(over)
    return (np.array(at_limit, bool).reshape(shape), np.array(at_rate, bool).reshape(shape),
            np.array(over_rate, bool).reshape(shape))


def _active(v, p, a, b, r, rel_tol):
    """``(at a hard limit, at the rate limit, moved more than the rate)`` of one projected MV
    *v* (previous *p*, limits *a*, *b*, rate *r*); tolerance ``rel_tol * max(1, |v|)``."""
    tol = rel_tol * max(1.0, abs(v))
    move = abs(v - p)
    return (abs(v - a) <= tol or abs(v - b) <= tol), abs(move - r) <= tol, move > r + tol


def project_with_activity(u, u_prev, lo, hi, max_move, *, what: str = "project_command",
                          rel_tol: float = 1e-6, summary: bool = False):
    """:func:`project_command` and the :func:`limit_activity` of its result in one pass:
    ``(command, at_limit, at_rate, over_rate)`` (the inputs converted once; the same
    arithmetic as the two calls).

    With ``summary=True`` (what a controller step records; the activity counted in the same
    pass instead of three boolean arrays): ``(command, clipped, at_limit, n_at_rate,
    n_over_rate)`` with ``clipped`` the largest ``|command - u|`` (0.0 for no MV; NaN where a
    command or a request is NaN, as ``np.abs(command - u).max(initial=0.0)``), ``at_limit`` the
    list of flat indices at a hard limit and the two counts as ints.  In this form each input
    may also be a list of floats of the command's length (taken as it is: no conversion).
    """
    if summary and type(u) is list:
        shape = (len(u),)
        n = shape[0]
        # lists taken as they are, a flat float array listed (a controller's previous MVs)
        if type(u_prev) is np.ndarray and u_prev.dtype is _FLOAT and u_prev.shape == shape:
            ps = u_prev.tolist()
        else:
            ps = u_prev if type(u_prev) is list and len(u_prev) == n else _floats(u_prev, shape)
        if not (type(lo) is list and type(hi) is list and type(max_move) is list
                and len(lo) == len(hi) == len(max_move) == n):
            lo, hi, max_move = (a if type(a) is list and len(a) == n else _floats(a, shape)
                                for a in (lo, hi, max_move))
        out, clipped, at_limit, n_rate, n_over = _project_counted(u, ps, lo, hi, max_move, what,
                                                                  rel_tol)
        return np.array(out, float), clipped, at_limit, n_rate, n_over
    u = np.asarray(u, float)
    shape = u.shape
    if len(shape) == 1:                 # the common case: flat lists without broadcasting
        cols = [u.tolist()]
        for a in (u_prev, lo, hi, max_move):
            a = np.asarray(a, float)
            cols.append(a.tolist() if a.shape == shape else _floats(a, shape))
    else:
        cols = [_floats(a, shape) for a in (u, u_prev, lo, hi, max_move)]
    if summary:
        out, clipped, at_limit, n_rate, n_over = _project_counted(*cols, what, rel_tol)
        return np.array(out, float).reshape(shape), clipped, at_limit, n_rate, n_over
    out = _project(cols, what)
    cols[0] = out
    return (np.array(out, float).reshape(shape),) + _activity(cols, shape, rel_tol)


def _project_counted(us, ps, los, his, rs, what, rel_tol):
    """:func:`project_value` per MV and its activity (:func:`_active`) counted, in one loop (a
    controller step's common path: an index list and two counts instead of three arrays)."""
    out, at_limit = [], []
    n_rate = n_over = 0
    clipped = 0.0
    j = 0
    for v0, p, a, b, r in zip(us, ps, los, his, rs):
        if a > b or r < 0:                      # refused: the message names the MV
            project_value(v0, p, a, b, r, what=f"{what} (MV {j})")
        v = project_value(v0, p, a, b, r)       # (checked above: cannot refuse)
        out.append(v)
        if v != v0:                             # (a NaN difference, once there, stays)
            d = abs(v - v0)
            if (d > clipped or d != d) and clipped == clipped:
                clipped = d
        lim, rate, over = _active(v, p, a, b, r, rel_tol)
        if lim:
            at_limit.append(j)
        n_rate += rate
        n_over += over
        j += 1
    return out, clipped, at_limit, n_rate, n_over
