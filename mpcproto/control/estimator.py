"""Offset-free state estimation: a steady-state Kalman filter on a disturbance-augmented model.

The controller model (deviation variables, sample time ``Ts``)::

    x[k+1] = A x[k] + B u[k] + Bd d[k] + Bw w[k]
    y[k]   = C x[k] + D u[k-1] + Dd d[k] + Cw w[k]            w[k+1] = w[k]

is augmented with one constant disturbance state ``w_i`` per CV (Muske & Badgwell 2002;
Pannocchia & Rawlings 2003 give the detectability condition; :meth:`DisturbanceEstimator.build`
refuses a model that breaks it, because the Riccati equation then has no stabilizing solution).
Per CV the disturbance enters either

``"output"``
    as a bias on that CV (``Cw = I`` column): fast, the usual default, exact for a sensor offset;
``"input"``
    through the MVs, in the direction ``B @ pinv(G)[:, i]`` whose steady-state effect is a unit
    change of CV *i* alone (G: steady-state MV gains; for an integrating model, the step response
    after ``nx + 20`` samples instead): it moves through the process dynamics like a load change,
    so an unmeasured feed disturbance is rejected without the slow open-loop tail of an output
    bias.  A CV that integrates (a level) needs it: an output bias on an integrator is not
    observable apart from the integrating state.

``"auto"`` (the default) takes ``"input"`` for integrating CVs and ``"output"`` for the others.

The filter gain comes from the steady-state prior covariance of the augmented model
(:func:`scipy.linalg.solve_discrete_are`).  When only some CVs report at a sample (analyzers), the
gain for that subset is ``P C_S' (C_S P C_S' + R_S)^-1`` with the same steady-state prior ``P``
(an approximation: between two analyzer samples the true covariance grows beyond the every-sample
``P``, so the analyzer correction is somewhat timid; a time-varying filter would be exact).

Late measurements
-----------------
A measurement carries ``taken_at``.  The estimator keeps the last ``history`` samples (prior
estimate, inputs and every measurement used there).  A value taken at an earlier sample is stored
at *that* sample (the sample nearest to ``taken_at``) and the filter is re-run from there to now,
so the correction enters where the information belongs and is carried forward through the model
rather than being compared with today's prediction.  Values older than the history are dropped and
counted; non-finite values are rejected and flagged.
"""

from __future__ import annotations

import struct
from collections.abc import Mapping
from typing import Any

import numpy as np
import scipy.linalg as sla

from ..exceptions import NotBuiltError
from ..validation import Interval, Names, Options, check, fail, shown

#: the owner of the estimator's setting errors; keys are its arguments, per CV
#: ``disturbance.<cv>``, ``measurement_noise.<cv>``, ``disturbance_noise.<cv>`` (the predictive
#: controller places them at its own keys, ``cv.<cv>.disturbance``...)
OWNER = "DisturbanceEstimator"

__all__ = ["DisturbanceEstimator"]

DISTURBANCE_MODELS = ("auto", "output", "input")
#: what :meth:`DisturbanceEstimator.update` returns when every CV was measured now (the same
#: object each time: a caller may test ``info is NO_EVENTS``; never mutate it)
NO_EVENTS: dict[str, Any] = {"rejected": (), "late": (), "too_old": ()}


#: the attributes :meth:`DisturbanceEstimator._row_views` makes (not copied: rebuilt)
_ROW_VIEWS = ("_priors", "_posts", "_us", "_ds", "_yvals", "_xs", "_ws")

#: a float's 8 bytes as numpy stores a float64 (native order)
_pack_float = struct.Struct("=d").pack


def _finite_sum(values: list[float]) -> bool:
    """True only where every value is finite (their sum is finite: a NaN or an infinity makes
    it NaN or infinite); False may also mean an overflow of a finite set (ask numpy then)."""
    total = sum(values)
    return total - total == 0.0

_DETECTABLE = ("a disturbance model the estimator can detect ('output' disturbances, or an "
               "'input' model only where MVs reach the CV)")


class DisturbanceEstimator:
    """Steady-state Kalman filter for plant states plus one integrating disturbance per CV.

    Parameters
    ----------
    dmodel : DiscreteLinearModel
        The controller's model (deviation variables around ``dmodel.op``).
    disturbance : mapping of CV name to {"auto", "output", "input"}, or str
        Disturbance model per CV (a single string applies to every CV).  ``"auto"`` (default):
        ``"input"`` for a CV that integrates (a level), ``"output"`` otherwise.
    state_noise : float
        Process noise variance on every plant state, per squared ``state_scale`` (delay states
        get none: they are exact).
    state_scale : array_like (nx,) or None
        Size of one unit of each state (the state noise of state *i* is
        ``state_noise * state_scale[i]**2``).  None: 1 for every state (engineering units).  A
        single variance in engineering units is wrong for a unit whose states differ in size
        (a mass fraction of 0.02 next to a temperature of 350 K): the small state then gets a
        noise of its own size per sample and the filter explains every CV error as a state jump
        that the model lets decay, instead of as a lasting disturbance (no integral action).
    disturbance_noise : mapping of CV name to float, or float
        Variance of the per-sample change of each disturbance state: larger = faster integral action.
    measurement_noise : mapping of CV name to float, or float
        Measurement noise variance per CV (engineering units squared).
    history : int
        Samples kept for late measurements (longest analyzer delay in samples, plus margin).
        DVs enter :meth:`update` as deviations; pass 0 for a DV that is unknown or not to be used.

    Notes
    -----
    Call :meth:`build` before use.  After it, ``gain_`` (full measurement set), ``P_`` (prior
    covariance), ``A_``, ``C_`` (augmented matrices) and ``Bw_``, ``Cw_`` are set.
    """

    def __init__(self, dmodel, *, disturbance: Mapping[str, str] | str = "auto",
                 state_noise: float = 1e-4, disturbance_noise: Mapping[str, float] | float = 1e-2,
                 measurement_noise: Mapping[str, float] | float = 1e-3, history: int = 60,
                 state_scale=None):
        self.dmodel = dmodel
        self.state_scale = state_scale
        self.disturbance = disturbance
        self.state_noise = state_noise
        self.disturbance_noise = disturbance_noise
        self.measurement_noise = measurement_noise
        self.history = history
        self.is_built = False

    # ------------------------------------------------------------------ helpers
    def _per_cv(self, value, what: str, kind=float):
        names = list(self.dmodel.cv_names)
        if isinstance(value, Mapping):
            for k in value:
                check(k, Names("CV", tuple(names)), owner=OWNER, key=what)
            default = {"disturbance": "auto", "disturbance_noise": 1e-2,
                       "measurement_noise": 1e-3}[what]
            return [value.get(n, default) for n in names]
        return [value] * len(names)

    @staticmethod
    def _positive(v, what: str, allow_zero=False) -> float:
        return check(v, Interval(float, 0, None, closed="both" if allow_zero else "neither"),
                     owner=OWNER, key=what)

    # ------------------------------------------------------------------ build
    def build(self) -> "DisturbanceEstimator":
        """Validate the settings, form the augmented model and solve the Riccati equation."""
        m = self.dmodel
        A, B, C = np.asarray(m.A, float), np.asarray(m.B, float), np.asarray(m.C, float)
        nx, nu, ny = A.shape[0], B.shape[1], C.shape[0]
        kinds = self._per_cv(self.disturbance, "disturbance")
        for n, k in zip(m.cv_names, kinds):
            check(k, Options(DISTURBANCE_MODELS, noun="a disturbance model"), owner=OWNER,
                  key=f"disturbance.{n}")
        qw = [self._positive(v, f"disturbance_noise.{n}")
              for n, v in zip(m.cv_names, self._per_cv(self.disturbance_noise, "disturbance_noise"))]
        rv = [self._positive(v, f"measurement_noise.{n}")
              for n, v in zip(m.cv_names, self._per_cv(self.measurement_noise, "measurement_noise"))]
        qx = self._positive(self.state_noise, "state_noise", allow_zero=True)
        check(self.history, Interval(int, 1, None, noun="a number of samples"), owner=OWNER,
              key="history")
        Bw = np.zeros((nx, ny))
        Cw = np.zeros((ny, ny))
        integrating = self.integrating_cvs(A, C)
        kinds = [("input" if integrating[i] else "output") if k == "auto" else k
                 for i, k in enumerate(kinds)]
        if any(k == "input" for k in kinds):
            if integrating.any() or not np.all(np.isfinite(m.gain("mv"))):
                # no steady-state gain: use the step response after T samples instead
                T = nx + 20
                S, Ak = np.zeros((nx, nu)), np.eye(nx)
                for _ in range(T):
                    S += Ak @ B
                    Ak = Ak @ A
                G = C @ S + np.asarray(m.D, float)
            else:
                G = m.gain("mv")
            Gp = np.linalg.pinv(G)
        for i, k in enumerate(kinds):
            if k == "output":
                if integrating[i]:
                    raise fail(OWNER, f"disturbance.{m.cv_names[i]}", "'input' or 'auto' for a "
                               "CV that integrates (a level, an inventory): an 'output' "
                               "disturbance on it cannot be told apart from the integrating "
                               "state", "'output'")
                Cw[i, i] = 1.0
            else:
                col = B @ Gp[:, i]
                if np.linalg.norm(col) < 1e-12:
                    raise fail(OWNER, f"disturbance.{m.cv_names[i]}", "'output' or 'auto' for "
                               "a CV no MV moves (an 'input' disturbance acts through the MVs)",
                               "'input'")
                Bw[:, i] = col
        self.kinds_ = tuple(kinds)
        self.Bw_, self.Cw_ = Bw, Cw
        na = nx + ny
        Aa = np.zeros((na, na))
        Aa[:nx, :nx] = A
        Aa[:nx, nx:] = Bw
        Aa[nx:, nx:] = np.eye(ny)
        Ca = np.hstack([C, Cw])
        Q = np.zeros((na, na))
        npl = m.n_plant_states
        if self.state_scale is None:
            sxs = np.ones(nx)
        else:
            sxs = np.asarray(self.state_scale, float).reshape(-1)
            if sxs.shape != (nx,) or not np.all(np.isfinite(sxs)) or np.any(sxs <= 0):
                raise fail(OWNER, "state_scale", f"{nx} finite numbers > 0 (one per state)",
                           shown(self.state_scale))
        Q[np.arange(npl), np.arange(npl)] = qx * sxs[:npl] ** 2
        Q[nx + np.arange(ny), nx + np.arange(ny)] = qw
        R = np.diag(rv)
        try:
            P = sla.solve_discrete_are(Aa.T, Ca.T, Q, R)
        except (np.linalg.LinAlgError, ValueError) as exc:
            # scipy's own words (a foreign exception's text) are the note
            raise fail(OWNER, "disturbance", _DETECTABLE, "no stabilizing solution of the "
                       "Riccati equation of the augmented model", note=str(exc)) from None
        if not np.all(np.isfinite(P)):
            raise fail(OWNER, "disturbance", _DETECTABLE, "a Riccati solution that is not finite")
        self.A_, self.C_, self.P_, self.R_ = Aa, Ca, P, R
        self.Ba_ = np.vstack([B, np.zeros((ny, nu))])
        self.Bda_ = np.vstack([np.asarray(m.Bd, float), np.zeros((ny, m.nd))])
        self.D_, self.Dd_ = np.asarray(m.D, float), np.asarray(m.Dd, float)
        self._has_D, self._has_Dd = bool(np.any(self.D_ != 0)), bool(np.any(self.Dd_ != 0))
        self._has_Bd = bool(np.any(self.Bda_ != 0))
        self._gains: dict[bytes, np.ndarray] = {}
        self.gain_ = self._gain(np.ones(ny, bool))
        self.nx_, self.na_, self.ny_ = nx, na, ny
        self._Ts = float(m.Ts)
        self._all_true, self._all_true_a = np.ones(ny, bool).tobytes(), np.ones(na, bool).tobytes()
        self.is_built = True
        self.reset()
        return self

    @staticmethod
    def integrating_cvs(A: np.ndarray, C: np.ndarray) -> np.ndarray:
        """Bool per CV: does the CV see a mode of A at exactly 1 (an integrator)?"""
        nx = A.shape[0]
        if nx == 0:
            return np.zeros(C.shape[0], bool)
        V = sla.null_space(np.eye(nx) - A, rcond=1e-10)
        if V.size == 0:
            return np.zeros(C.shape[0], bool)
        return np.linalg.norm(C @ V, axis=1) > 1e-9 * max(1.0, np.abs(C).max())

    def _gain(self, mask: np.ndarray) -> np.ndarray:
        key = mask.tobytes()
        L = self._gains.get(key)
        if L is None:
            Cs = self.C_[mask]
            S = Cs @ self.P_ @ Cs.T + self.R_[np.ix_(mask, mask)]
            L = np.linalg.solve(S, Cs @ self.P_).T
            self._gains[key] = L
        return L

    def _check(self):
        if not self.is_built:
            raise NotBuiltError("DisturbanceEstimator is not built; call .build() first.")

    # ------------------------------------------------------------------ running
    def reset(self, x0: np.ndarray | None = None, t0: float = 0.0) -> None:
        """Start at deviation state *x0* (default 0) with zero disturbance estimates, at time *t0*."""
        self._check()
        H = int(self.history) + 1
        na, ny = self.na_, self.ny_
        self._t0 = float(t0)
        self._k = 0                       # index of the current sample (time t0 + k Ts)
        nu = self.dmodel.nu
        # ring buffers indexed by k % H: prior and posterior estimates, the input applied from
        # sample k to k+1, the DV deviation at sample k
        self._H = H
        self._prior, self._post = np.zeros((H, na)), np.zeros((H, na))
        self._u, self._d = np.zeros((H, nu)), np.zeros((H, self.dmodel.nd))
        self._yval = np.zeros((H, ny))
        self._row_views()
        # which CVs were used at each sample: _full[s] (every CV, the common path: the row of
        # _ymask is not written), else the row of _ymask (_marked[s]: the row has entries)
        self._ymask = np.zeros((H, ny), bool)
        self._full, self._marked = [False] * H, [False] * H
        self._all_cvs = np.ones(ny, bool)
        self._shape_y = (ny,)
        xa = np.zeros(na)
        if x0 is not None:
            xa[: self.nx_] = np.asarray(x0, float).reshape(-1)
        self._prior[0] = xa
        self._post[0] = xa
        self._u_prev = np.zeros(nu)       # the input before sample 0 (later: a view of the last)
        self._started = False
        self._finite_k = -1               # the sample whose posterior update found finite
        self.counts = {"rejected_nonfinite": 0, "late_used": 0, "too_old": 0}

    def _row_views(self) -> None:
        """The ring buffers' rows as views (a list index is cheaper than a numpy one on the
        per-sample path); rebuilt after a copy, which would otherwise copy each view apart."""
        self._priors, self._posts, self._us = list(self._prior), list(self._post), list(self._u)
        self._ds, self._yvals = list(self._d), list(self._yval)
        self._xs = [r[: self.nx_] for r in self._post]
        self._ws = [r[self.nx_:] for r in self._post]

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        for k in _ROW_VIEWS:
            state.pop(k, None)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        if "_prior" in state:
            self._row_views()

    def sample_index(self, t: float) -> int:
        """Nearest sample index of time *t* (sample 0 at the reset time)."""
        return int(round((float(t) - self._t0) / self.dmodel.Ts))

    def update(self, t: float, y_dev: np.ndarray, taken_at: np.ndarray, fresh: np.ndarray,
               d_dev: np.ndarray) -> dict[str, Any]:
        """Correct the estimate at time *t* with the fresh values (deviation CVs).

        Returns a dict with ``rejected`` (CV indices with fresh non-finite values), ``late`` (CV
        indices used at an earlier sample) and ``too_old`` (dropped).
        """
        if not self.is_built:
            self._check()
        Ts = self._Ts
        # sample_index(t) (round gives an int; float(t) for a time of another type)
        k = round(((t if type(t) is float else float(t)) - self._t0) / Ts)
        H = self._H
        if self._started:
            if k != self._k + 1:
                raise fail("DisturbanceEstimator.update()", "t",
                           f"the next sample (index {self._k + 1}, "
                           f"t={self._t0 + (self._k + 1) * Ts:g})",
                           f"t={t:g} (index {k})", "Call predict() once per sample.")
        else:
            if k != self._k:
                # first update after reset: align the clock on the first call
                self._t0 = float(t) - self._k * Ts
                k = self._k
        self._k = k
        slot = k % H
        self._ds[slot][...] = d_dev                     # (the row's view: self._d[slot] = d_dev)
        y_dev = np.asarray(y_dev, float)
        fresh = np.asarray(fresh, bool)
        taken_at = np.asarray(taken_at, float)
        half = 0.5 * Ts
        # the common case, every CV measured now: first a cheap test (bytes compared: all
        # fresh, every value taken at t bit for bit) whose values' finiteness is read from the
        # correction (below), then the full test
        quick = (fresh.tobytes() == self._all_true and y_dev.shape == self._shape_y
                 and taken_at.tobytes() == _pack_float(t) * self.ny_ and t - half < t < t + half)
        if quick or (fresh.all() and np.isfinite(y_dev).all()
                     and taken_at.min() > t - half and taken_at.max() < t + half):
            self._full[slot] = True
            self._yvals[slot][...] = y_dev              # (self._yval[slot] = y_dev)
            xa = self._priors[slot]
            yhat = self.C_.dot(xa)
            if self._has_D:
                yhat += self.D_.dot(self._us[(k - 1) % H] if k > 0 else self._u_prev)
            if self._has_Dd:
                yhat += self.Dd_.dot(d_dev)
            post = self._posts[slot]
            np.add(xa, self.gain_.dot(y_dev - yhat), post)    # (out by position: cheaper)
            # a finite posterior (its sum finite) means finite values: a NaN or an infinity
            # among them makes every entry of the correction NaN or infinite (each entry sums
            # a gain times each value); it is also estimate()'s answer for this sample.  Else
            # numpy decides: values not all finite take the general path (the posterior is
            # written again there), finite ones keep this posterior
            if _finite_sum(post.tolist()):
                self._finite_k = k
            elif quick and not np.isfinite(y_dev).all():
                self._full[slot] = False
                quick = None
            if quick is not None:
                self._started = True
                return NO_EVENTS
        rejected, late, too_old = [], [], []
        first = k
        for i in np.flatnonzero(fresh):
            v = y_dev[i]
            if not np.isfinite(v) or not np.isfinite(taken_at[i]):
                rejected.append(int(i))
                continue
            j = min(self.sample_index(taken_at[i]), k)
            if j < k - (H - 1) or j < 0:
                too_old.append(int(i))
                continue
            s = j % H
            self._ymask[s, i] = True
            self._marked[s] = True
            self._yval[s, i] = v
            if j < k:
                late.append(int(i))
                first = min(first, j)
        self.counts["rejected_nonfinite"] += len(rejected)
        self.counts["late_used"] += len(late)
        self.counts["too_old"] += len(too_old)
        # re-run the filter from the earliest sample that received a value
        for j in range(first, k + 1):
            s = j % H
            xa = self._prior[s].copy()
            mask = self._all_cvs if self._full[s] else self._ymask[s]
            if mask.any():
                u_held = self._u[(j - 1) % H] if j > 0 else self._u_prev
                yhat = self.C_ @ xa + self.D_ @ u_held + self.Dd_ @ self._d[s]
                L = self._gain(mask)
                xa = xa + L @ (self._yval[s, mask] - yhat[mask])
            self._post[s] = xa
            if j < k:
                self._propagate(s, (j + 1) % H, True)
        self._started = True
        return {"rejected": rejected, "late": late, "too_old": too_old}

    def _propagate(self, s: int, nxt: int, dvs: bool) -> None:
        """The prior of the sample after slot *s* from the posterior, the input and (*dvs*:
        always, or only where Bd is not zero) the DVs of slot *s*: ``A post + B u + Bd d``,
        summed in that order, written into the ring."""
        prior = self._priors[nxt]
        np.dot(self.A_, self._posts[s], prior)          # (ufuncs' out by position: cheaper)
        np.add(prior, self.Ba_.dot(self._us[s]), prior)
        if dvs:
            np.add(prior, self.Bda_.dot(self._ds[s]), prior)

    def predict(self, u_dev: np.ndarray, *, less: np.ndarray | None = None) -> None:
        """Propagate to the next sample with the MVs *u_dev* applied from now on (deviation;
        with *less*: ``u_dev - less``, the absolute MVs and the operating point's, subtracted
        into the estimator's own buffer)."""
        if not self.is_built:
            self._check()
        H = self._H
        k = self._k
        s = k % H
        nxt = (k + 1) % H
        u = self._us[s]
        if less is None:
            u[...] = u_dev                              # (self._u[s] = u_dev)
        else:
            np.subtract(u_dev, less, u)
        self._propagate(s, nxt, self._has_Bd)
        self._full[nxt] = False
        if self._marked[nxt]:
            self._ymask[nxt] = False
            self._marked[nxt] = False
        self._u_prev = u                 # a view: the slot is not written again before it is read

    def revise_input(self, u_dev: np.ndarray) -> None:
        """Replace the MVs of the last :meth:`predict` by those actually applied (readback).

        Call after :meth:`predict` and before the next :meth:`update`: the prior of the coming
        sample is recomputed with *u_dev* (deviation), and a re-run for a late measurement uses
        it too, so a stuck or clipped valve does not show up as a disturbance.
        """
        self._check()
        H = self._H
        s = self._k % H
        self._u[s] = np.asarray(u_dev, float)
        self._propagate(s, (self._k + 1) % H, self._has_Bd)
        self._u_prev = self._us[s]

    def estimate(self) -> tuple[np.ndarray, np.ndarray, bool]:
        """``(state, disturbance_estimate, finite)``: the two current estimates (views, as the
        properties return them) and whether every entry of both is finite."""
        k = self._k
        s = k % self._H
        if self._finite_k == k:             # update found it finite
            return self._xs[s], self._ws[s], True
        post = self._posts[s]
        return (self._xs[s], self._ws[s], _finite_sum(post.tolist())
                or np.isfinite(post).tobytes() == self._all_true_a)

    @property
    def state(self) -> np.ndarray:
        """Current filtered plant (and delay) state, deviation variables."""
        return self._xs[self._k % self._H]

    @property
    def disturbance_estimate(self) -> np.ndarray:
        """Current estimate of the per-CV disturbance states."""
        return self._ws[self._k % self._H]
