"""Decentralized PID loops: the baseline the MPC has to beat.

Each :class:`PIDLoop` moves one MV to hold one CV.  The algorithm is the textbook discrete PID of
Astrom & Hagglund (*Advanced PID Control*, ISA 2006, section 3.6, from memory), in the ideal
(non-interacting) form with gain ``K``, integral time ``Ti`` and derivative time ``Td``:

* proportional action on a weighted setpoint: ``P = K (b r - y)`` (``b`` = setpoint weight);
* derivative on the measurement only (a setpoint step does not kick the valve), filtered with time
  constant ``Td/N`` and discretized by backward difference:
  ``D = Td/(Td + N h) * D - K Td N/(Td + N h) * (y - y_prev)``;
* integral by forward Euler with **anti-windup by back-calculation (tracking)**: when the output
  is limited the integral is driven towards the value that makes the unlimited output equal the
  limited one, with tracking time ``Tt``:
  ``I[k] = I[k-1] + K h/Ti (r - y)[k-1] + h/Tt (u - v)[k-1]``, ``v = P + I + D``,
  ``u = limit(v)``;
  default ``Tt = sqrt(Ti Td)`` (``Ti`` without derivative), as Astrom & Hagglund suggest;
* bumpless start: at the first sample the integral is set so that the output equals the MV at the
  operating point.

``h`` is the time since the loop last acted: a loop on an analyzer that reports every few minutes
acts only when a fresh result arrives (``on_fresh=True``, the default) and holds its output in
between, so it neither integrates a stale error nor winds up.  A NaN reading holds the output and
reports the status ``fallback_hold``.  The limits applied are the operating limits and the rate
limit the simulator passes in ``Targets``, through the one projection of
:func:`mpcproto.control.limits.project_value` (every MV, held outputs and MVs without a loop too:
a command outside a hard limit is never sent; where a limit stepped past the output by more than
the rate allows, the hard limit wins); the actuator may clip further (a stuck or saturated
valve, an actuator rate limit).  With MV readback (``step(..., u_applied=...)``, the valve
positions actually applied over the last sample; common practice, no source) the tracking term
uses the *applied* value instead of the loop's own limited output: ``(u_applied - v)``, so the
integral does not wind up behind a valve that does not follow.  Without readback (None or NaN)
the loop only knows its own limits.  With readback, a valve that did not move although its
command differs from its position (stuck or saturated) is counted (``n_mvs_not_following``) and
gives the status ``mv_not_following``.

PID loop spec keys (:func:`pid_loop_from_spec`)
------------------------------------------------
``cv``, ``mv``, ``gain`` (required); ``integral_time`` (default: none, P/PD only),
``derivative_time`` (0), ``setpoint_weight`` (1), ``derivative_filter`` (N, 10),
``tracking_time`` (see above), ``on_fresh`` (true).

Pairing: :func:`suggest_pairing` picks the MV for each CV from the relative gain array (Bristol
1966): the one-to-one pairing with positive relative gains closest to 1.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..exceptions import SettingsError
from ..linear import rga as _rga
from ..model import suggest
from ..validation import Names, check, fail
from ..operating import OperatingPoint
from .base import (STATUS_HOLD, STATUS_MV_NOT_FOLLOWING, STATUS_OK, ControlOutput, Measurement,
                   Targets)
from .limits import project_value

__all__ = ["PIDLoop", "PIDController", "pid_loop_from_spec", "suggest_pairing", "Pairing",
           "low_frequency_gain", "pid_output"]


@dataclass(frozen=True)
class PIDLoop:
    """Settings of one loop (ideal form; see module docstring)."""

    cv: str
    mv: str
    gain: float
    integral_time: float = math.inf
    derivative_time: float = 0.0
    setpoint_weight: float = 1.0
    derivative_filter: float = 10.0
    tracking_time: float | None = None
    on_fresh: bool = True
    rule: str = ""

    def __post_init__(self) -> None:
        w = f"PIDLoop {self.cv}<-{self.mv}"

        def chk(name: str, v: Any, cond, expect: str) -> None:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or math.isnan(v) or not cond(v):
                raise SettingsError(owner=w, key=name, expected=expect, found=repr(v))

        chk("gain", self.gain, lambda v: math.isfinite(v) and v != 0, "a finite non-zero number")
        chk("integral_time", self.integral_time, lambda v: v > 0,
            "a number > 0 (inf = no integral action)")
        chk("derivative_time", self.derivative_time, lambda v: math.isfinite(v) and v >= 0,
            "a number >= 0")
        chk("setpoint_weight", self.setpoint_weight, lambda v: 0 <= v <= 1, "a number in [0, 1]")
        chk("derivative_filter", self.derivative_filter, lambda v: math.isfinite(v) and v > 0,
            "a number > 0")
        if self.tracking_time is not None:
            chk("tracking_time", self.tracking_time, lambda v: v > 0, "a number > 0")

    @property
    def tt(self) -> float:
        """Tracking time actually used by the anti-windup."""
        if self.tracking_time is not None:
            return float(self.tracking_time)
        if self.derivative_time > 0 and math.isfinite(self.integral_time):
            return math.sqrt(self.integral_time * self.derivative_time)
        return float(self.integral_time)

    def as_dict(self) -> dict[str, Any]:
        d = {"cv": self.cv, "mv": self.mv, "gain": self.gain,
             "integral_time": self.integral_time if math.isfinite(self.integral_time) else None,
             "derivative_time": self.derivative_time, "setpoint_weight": self.setpoint_weight,
             "derivative_filter": self.derivative_filter, "tracking_time": self.tracking_time,
             "on_fresh": self.on_fresh}
        if self.rule:
            d["rule"] = self.rule
        return d


_LOOP_KEYS = ("cv", "mv", "gain", "integral_time", "derivative_time", "setpoint_weight",
              "derivative_filter", "tracking_time", "on_fresh")


def pid_loop_from_spec(spec: Mapping[str, Any] | PIDLoop, *, what: str) -> PIDLoop:
    """A :class:`PIDLoop` from a plain dict (keys in the module docstring)."""
    if isinstance(spec, PIDLoop):
        return spec
    if not isinstance(spec, Mapping):
        raise fail(what, None, "a PID loop table", repr(spec))
    for k in spec:
        if k not in _LOOP_KEYS:
            raise SettingsError(owner=what, key=str(k),
                                expected=f"one of the keys {', '.join(_LOOP_KEYS)}",
                                found=f"the unknown key '{k}'{suggest(str(k), _LOOP_KEYS)}")
    for k in ("cv", "mv", "gain"):
        if k not in spec:
            raise SettingsError(owner=what, key=k, expected=f"the key '{k}' (a PID loop needs it)",
                                found=f"keys {', '.join(spec)}")
    for k in ("cv", "mv"):
        if not isinstance(spec[k], str) or not spec[k]:
            raise SettingsError(owner=what, key=k, expected="a variable name (a string)",
                                found=f"{spec[k]!r:.60}")
    kw = dict(spec)
    if kw.get("integral_time") is None:
        kw.pop("integral_time", None)
    for k in ("gain", "integral_time", "derivative_time", "setpoint_weight", "derivative_filter",
              "tracking_time"):
        if k in kw and kw[k] is not None:
            try:
                if isinstance(kw[k], bool):
                    raise TypeError
                kw[k] = float(kw[k])
            except (TypeError, ValueError, OverflowError):
                raise SettingsError(owner=what, key=k, expected="a number",
                                    found=f"{spec[k]!r:.60}") from None
    if "on_fresh" in kw and not isinstance(kw["on_fresh"], bool):
        raise SettingsError(owner=what, key="on_fresh", expected="true or false",
                            found=repr(kw["on_fresh"]))
    try:
        return PIDLoop(**kw)
    except SettingsError as exc:
        raise exc.replace(owner=what) from None


@dataclass
class _LoopState:
    i: float = 0.0
    d: float = 0.0
    y_prev: float = math.nan
    t_last: float = math.nan
    u: float = math.nan
    e_prev: float = 0.0
    aw_prev: float = 0.0
    v_prev: float = math.nan
    started: bool = False



def readback_list(u_applied: Any, n: int, who: str) -> list[float] | None:
    """The MV readback of a step call as a list of *n* floats (None: no readback)."""
    if u_applied is None:
        return None
    ua = np.asarray(u_applied, float).reshape(-1)
    if ua.shape != (n,):
        raise fail(f"{who}.step()", "u_applied", f"{n} entries (MV order)",
                   f"shape {np.shape(u_applied)}")
    return ua.tolist()


def pid_output(lp: PIDLoop, st: _LoopState, t: float, y: float, r: float,
               u_read: float = math.nan, bias: float = 0.0) -> float:
    """One sample of the PID algorithm of the module docstring for loop *lp* with state *st*:
    the unlimited output ``v = P + I + D + bias`` (the caller limits it and stores the tracking
    error ``st.aw_prev = u_limited - v``).  ``u_read``: the output applied over the last sample
    (readback, in the loop's output unit; NaN = unknown); ``bias``: a signal added to the output
    (feedforward), inside the anti-windup loop so that the integral tracks the limited total.
    Shared by :class:`PIDController` and the structures of :mod:`mpcproto.control.regulatory`.
    """
    K, Td, N = lp.gain, lp.derivative_time, lp.derivative_filter
    if not st.started:
        st.i = st.u - bias - K * (lp.setpoint_weight * r - y)
        st.d, st.y_prev, st.t_last, st.started = 0.0, y, t, True
        st.e_prev = st.aw_prev = 0.0
    h = t - st.t_last if t > st.t_last else 0.0
    if math.isfinite(u_read) and math.isfinite(st.v_prev):
        # readback: track what the valve did, not what the loop asked for
        st.aw_prev = u_read - st.v_prev
    if h > 0 and math.isfinite(lp.integral_time):
        # forward Euler over the interval just ended, with back-calculation of the
        # limited output (anti-windup): I += K h/Ti e + h/Tt (u - v)
        st.i += K * h / lp.integral_time * st.e_prev + h / lp.tt * st.aw_prev
    if Td > 0 and h > 0:
        st.d = Td / (Td + N * h) * st.d - K * Td * N / (Td + N * h) * (y - st.y_prev)
    v = K * (lp.setpoint_weight * r - y) + st.i + st.d + bias
    st.e_prev, st.v_prev = r - y, v
    st.y_prev, st.t_last = y, t
    return v


class PIDController:
    """Several PID loops side by side (decentralized control); implements the controller protocol.

    Parameters
    ----------
    cv_names, mv_names : sequence of str
        The model's CVs and MVs in declaration order (``model.cv_names``, ``model.mv_names``).
    loops : sequence of PIDLoop or spec dicts
        One loop per paired MV; each CV and each MV at most once.  MVs without a loop stay at their
        operating-point value.
    name : str
        Reported in trajectories and scorecards (default ``"pid"``).
    """

    def __init__(self, cv_names: Sequence[str], mv_names: Sequence[str],
                 loops: Sequence[PIDLoop | Mapping[str, Any]], *, name: str = "pid"):
        self.name = str(name)
        self.cv_names, self.mv_names = tuple(cv_names), tuple(mv_names)
        self.loops = [pid_loop_from_spec(lp, what=f"PID loops[{i}]") for i, lp in enumerate(loops)]
        if not self.loops:
            raise fail("PIDController", "loops", "at least one loop", "none")
        seen_cv: set[str] = set()
        seen_mv: set[str] = set()
        for i, lp in enumerate(self.loops):
            for role, names, seen, v in (("CV", self.cv_names, seen_cv, lp.cv),
                                         ("MV", self.mv_names, seen_mv, lp.mv)):
                check(v, Names(role, tuple(names)), owner="PIDController",
                      key=f"loops[{i}].{role.lower()}")
                if v in seen:
                    raise fail("PIDController", f"loops[{i}].{role.lower()}", f"a {role} no "
                               f"other loop uses (each {role} may be in one loop only)",
                               f"'{v}', used by an earlier loop")
                seen.add(v)
        self._idx = [(self.cv_names.index(lp.cv), self.mv_names.index(lp.mv)) for lp in self.loops]
        self._diag_keys = [f"integral.{lp.mv}" for lp in self.loops]
        self._u0 = np.zeros(len(self.mv_names))
        self._state: list[_LoopState] = []

    @classmethod
    def for_model(cls, model: Any, loops: Sequence[PIDLoop | Mapping[str, Any]], *,
                  name: str = "pid") -> "PIDController":
        """Loops on a model's CVs and MVs."""
        return cls(model.cv_names, model.mv_names, loops, name=name)

    def reset(self, op: OperatingPoint, t0: float = 0.0) -> None:
        self._u0 = np.asarray(op.u, float).copy()
        self._state = [_LoopState(u=float(self._u0[j])) for _, j in self._idx]
        self._u_last = self._u0.tolist()               # the last command sent, every MV
        self._cmd_prev = self._u0.tolist()
        self._ua_prev = [math.nan] * len(self.mv_names)

    def describe(self) -> dict[str, Any]:
        """What the controller has: structure, measurements used and tuning (JSON-able)."""
        return {"kind": "pid", "structure": [f"{len(self.loops)} single loop(s)"],
                "measured_cvs": sorted({lp.cv for lp in self.loops}), "measured_dvs_used": [],
                "mv_flows_used": [], "tuning": {"loops": [lp.as_dict() for lp in self.loops]}}

    @property
    def integrals(self) -> np.ndarray:
        """Current integral terms, one per loop (for tests and diagnostics)."""
        return np.array([s.i for s in self._state])

    def step(self, t: float, meas: Measurement, dv: np.ndarray, targets: Targets,
             dv_forecast: np.ndarray | None = None, *,
             u_applied: np.ndarray | None = None) -> ControlOutput:
        """One sample of every loop; ``u_applied`` (optional): the MVs applied over the last
        sample (readback, NaN = unknown), used by the anti-windup tracking."""
        if not self._state:
            raise fail(f"PIDController '{self.name}'", "step()", "a call of reset(op) before step()",
                       "step() called first", code="not_started")
        ua = readback_list(u_applied, len(self.mv_names), f"PIDController '{self.name}'")
        u_ask = self._u0.copy()           # MVs without a loop stay at the operating point
        held = 0
        saturated = 0
        # plain Python floats: scalar arithmetic on them is much cheaper than on numpy scalars
        ys, sps = meas.y.tolist(), targets.setpoint.tolist()
        fresh = meas.fresh.tolist()
        acted: list[tuple[_LoopState, int, float]] = []
        for lp, (ci, mj), st in zip(self.loops, self._idx, self._state):
            y = ys[ci]
            r = sps[ci]
            if not math.isfinite(y) or not math.isfinite(r):
                held += not math.isfinite(y)
                u_ask[mj] = st.u
                continue
            if lp.on_fresh and not fresh[ci] and st.started:
                u_ask[mj] = st.u
                continue
            v = pid_output(lp, st, t, y, r, ua[mj] if ua is not None else math.nan)
            u_ask[mj] = v
            acted.append((st, mj, v))
        # every MV (acting, held or without a loop) through the one projection: rate limit from
        # the last command, then the hard limits, which win (mpcproto.control.limits)
        lo, hi = targets.mv_low.tolist(), targets.mv_high.tolist()
        rate = targets.mv_rate.tolist() if targets.mv_rate is not None else [math.inf] * len(lo)
        ul = [project_value(a, p, lo[j], hi[j], rate[j],
                            what=f"PIDController '{self.name}' ({self.mv_names[j]})")
              for j, (a, p) in enumerate(zip(u_ask.tolist(), self._u_last))]
        u_out = np.array(ul)
        for st, mj, v in acted:
            saturated += ul[mj] != v
            st.aw_prev = ul[mj] - v
        for st, (_, mj) in zip(self._state, self._idx):
            st.u = ul[mj]
        self._u_last = ul
        not_following = 0
        if ua is not None:
            # a valve that did not move although the loop moved its command (stuck, saturated)
            for (_, mj), st in zip(self._idx, self._state):
                a = ua[mj]
                if (math.isfinite(a) and math.isfinite(self._ua_prev[mj])
                        and abs(a - self._ua_prev[mj]) <= 1e-9 * max(1.0, abs(a))
                        and abs(self._cmd_prev[mj] - a) > 1e-6 * max(1.0, abs(a))):
                    not_following += 1
            self._ua_prev = list(ua)
        self._cmd_prev = ul
        status = STATUS_OK
        if held:
            status = STATUS_HOLD
        elif not_following:
            status = STATUS_MV_NOT_FOLLOWING
        diag: dict[str, float] = {"loops_held": held, "loops_saturated": saturated,
                                  "n_mvs_not_following": not_following}
        for key, st in zip(self._diag_keys, self._state):
            diag[key] = st.i
        return ControlOutput(u=u_out, status=status, diagnostics=diag)


# ---------------------------------------------------------------------------------- pairing
@dataclass
class Pairing:
    """Result of :func:`suggest_pairing`."""

    pairs: list[tuple[str, str]]                 # (cv, mv)
    rga: np.ndarray
    cv_names: tuple[str, ...]
    mv_names: tuple[str, ...]
    relative_gains: dict[str, float] = field(default_factory=dict)  # "cv<-mv": lambda
    low_frequency: bool = False                  # True if the RGA was taken at a low frequency

    def as_dict(self) -> dict[str, Any]:
        return {"pairs": [{"cv": c, "mv": m, "relative_gain": self.relative_gains[f"{c}<-{m}"]}
                          for c, m in self.pairs],
                "rga": self.rga.tolist(), "cv_names": list(self.cv_names),
                "mv_names": list(self.mv_names), "low_frequency": self.low_frequency}


def low_frequency_gain(lin: Any, s: float | None = None) -> np.ndarray:
    """Transfer matrix ``G(s) = C (sI - A)^-1 B + D`` (MV->CV, delays folded) at a small real s.

    Used for pairing when a CV integrates (a level): the RGA is unchanged by scaling a row, so the
    RGA of ``G(s)`` at a low frequency gives the steady-state pairing information even where
    ``G(0)`` is infinite.  Default ``s``: 1e-4 times the slowest non-zero pole magnitude.
    """
    Bf, Df = lin.folded_inputs("mv")
    A, C = lin.A, lin.C
    if s is None:
        mags = np.abs(np.linalg.eigvals(A)) if A.size else np.zeros(0)
        mags = mags[mags > 1e-10 * max(1.0, mags.max() if mags.size else 1.0)]
        s = 1e-4 * (mags.min() if mags.size else 1.0)
    n = A.shape[0]
    return C @ np.linalg.solve(s * np.eye(n) - A, Bf) + Df


def suggest_pairing(lin: Any, *, cvs: Sequence[str] | None = None,
                    mvs: Sequence[str] | None = None) -> Pairing:
    """Pair CVs with MVs from the relative gain array of a :class:`mpcproto.LinearModel`.

    Among all one-to-one pairings of the (square) selection, pairings on a negative relative gain
    are ruled out (Bristol 1966; common practice: such a loop changes sign when the others open),
    and the one whose relative gains are closest to 1 (least sum of ``|ln lambda|``) is chosen.
    Integrating CVs are handled with the RGA at a low frequency (:func:`low_frequency_gain`).

    Raises
    ------
    SettingsError
        A non-square selection, an unknown name, a singular gain matrix, or no pairing with all
        relative gains positive.
    """
    cv_all, mv_all = tuple(lin.cv_names), tuple(lin.mv_names)
    cvs = tuple(cvs) if cvs is not None else cv_all
    mvs = tuple(mvs) if mvs is not None else mv_all
    for sel, all_, role in ((cvs, cv_all, "CV"), (mvs, mv_all, "MV")):
        for n in sel:
            check(n, Names(role, all_), owner="suggest_pairing", key=f"{role.lower()}s")
    if len(cvs) != len(mvs):
        raise fail("suggest_pairing", "cvs", f"as many CVs as MVs ({len(mvs)} MVs: {', '.join(mvs)})",
                   f"{len(cvs)} CVs ({', '.join(cvs)})", "Pass cvs=/mvs= to choose a square selection.")
    ri = [cv_all.index(c) for c in cvs]
    cj = [mv_all.index(m) for m in mvs]
    K = lin.gain("mv")[np.ix_(ri, cj)]
    low = False
    if not np.all(np.isfinite(K)):
        K = low_frequency_gain(lin)[np.ix_(ri, cj)]
        low = True
    L = _rga(K)
    n = len(cvs)
    best, best_cost = None, math.inf
    perms = itertools.permutations(range(n)) if n <= 8 else None
    if perms is None:
        raise fail("suggest_pairing", "cvs", "at most 8 loops to search (select fewer CVs and MVs)",
                   f"{n} loops")
    for perm in perms:
        lam = np.array([L[i, perm[i]] for i in range(n)])
        if np.any(lam <= 0):
            continue
        cost = float(np.sum(np.abs(np.log(lam))))
        if cost < best_cost:
            best, best_cost = perm, cost
    if best is None:
        raise fail("suggest_pairing", "cvs",
                   "a selection with a pairing whose relative gains are all positive",
                   f"a negative relative gain in every one-to-one pairing (RGA = "
                   f"{np.round(L, 3).tolist()})", "decentralized PID is not advisable for this "
                   "selection", code="negative_rga")
    pairs = [(cvs[i], mvs[best[i]]) for i in range(n)]
    rel = {f"{cvs[i]}<-{mvs[best[i]]}": float(L[i, best[i]]) for i in range(n)}
    return Pairing(pairs=pairs, rga=L, cv_names=cvs, mv_names=mvs, relative_gains=rel,
                   low_frequency=low)
