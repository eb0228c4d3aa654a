r"""What a control engineer checks in a linear model before trusting a multivariable design.

Pure numerics on gain matrices and :class:`~mpcproto.linear.LinearModel` objects (layer 2: no
controller, no plotting).

:func:`gain_matrix_analysis`
    Singular values and condition number of the steady-state gain matrix, unscaled and scaled by the
    variables' ranges (a condition number depends on units: only the scaled one says something about
    the unit), the weak output and input directions (the singular vectors of the smallest singular
    value: the CV combination the MVs can hardly move, and the MV combination that hardly moves
    anything), collinear MV pairs (two columns of the scaled gain matrix pointing nearly the same
    way), ``det G(0)``, the RGA (Bristol 1966) and, for a pairing, the Niederlinski index.
:func:`niederlinski_index`
    ``NI = det G(0) / prod_i g_ii(0)`` with the paired elements on the diagonal (Niederlinski 1971).
    With integral action in every loop, ``NI < 0`` means the closed loop is unstable for any tuning
    once one loop is opened (for 2x2 systems also a necessary condition), the integrity test of the
    trade (Grosdidier, Morari & Holt 1985; conditions quoted from memory).
:func:`rga_at_frequency`
    The RGA of the complex transfer matrix ``G(jw)`` (dead times included exactly), which says how
    strongly loops interact at the frequencies where they act, not only at steady state.
:func:`sampling_advice`
    Suggested prediction and control horizons and a sample-time check from the model's dominant time
    constants and dead times.

Thresholds used for the plain warnings (all rules of thumb; their sources are named where we have
one, else marked):

* scaled condition number above 10: directionality worth a look; above 100: ill-conditioned, small
  model errors in the weak direction decide the control moves (common practice, no source);
* RGA elements above 5-10 in magnitude: the plant is sensitive to input uncertainty and inverse-based
  control (and a decoupler) is risky (Skogestad & Postlethwaite, *Multivariable Feedback Control*,
  2nd ed., 2005, section 3.4, from memory); a negative relative gain of a chosen pair: the loop
  changes sign when the others open;
* two MV columns whose scaled gains make an angle below ~10 degrees (cosine above 0.985): the MVs act
  almost as one (common practice, no source).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .validation import fail, shown
from .linear import INTEGRATOR_TOL, open_loop_class
from .linear import rga as _rga

__all__ = ["GainAnalysis", "gain_matrix_analysis", "niederlinski_index", "rga_at_frequency",
           "transfer_matrix_at", "SamplingAdvice", "sampling_advice", "COND_WARN", "COND_BAD",
           "RGA_LARGE", "COLLINEAR_COSINE"]

#: scaled condition number above which the directionality is reported (common practice, no source)
COND_WARN = 10.0
#: scaled condition number above which the gain matrix is called ill-conditioned (common practice)
COND_BAD = 100.0
#: RGA element magnitude above which the design is called sensitive to input uncertainty
#: (Skogestad & Postlethwaite 2005, section 3.4, from memory: "larger than about 5-10")
RGA_LARGE = 5.0
#: cosine of the angle between two scaled MV columns above which the MVs are called collinear
#: (about 10 degrees; common practice, no source)
COLLINEAR_COSINE = 0.985


def _matrix(K: Any, what: str) -> np.ndarray:
    K = np.asarray(K, dtype=float)
    if K.ndim != 2 or K.size == 0:
        raise fail(what, "K", "a non-empty 2-D gain matrix (CVs x MVs)", f"shape {K.shape}")
    if not np.all(np.isfinite(K)):
        raise fail(what, "K", "finite gains",
                   "non-finite entries (a CV that integrates has no steady-state gain)",
                   "analyse the settling part of the unit, or use the integrating channels' ramp "
                   "rates as gains")
    return K


def niederlinski_index(K: Any, pairing: Sequence[int]) -> float:
    """Niederlinski index of a square gain matrix for a one-to-one pairing.

    Parameters
    ----------
    K : array_like (n, n)
        Steady-state gains, CVs down, MVs across.
    pairing : sequence of int
        ``pairing[i]`` is the MV index paired with CV ``i``.

    Returns
    -------
    float
        ``det(Kp) / prod(diag(Kp))`` with ``Kp = K[:, pairing]``.
    """
    K = _matrix(K, "niederlinski_index()")
    n = K.shape[0]
    if K.shape[1] != n:
        raise fail("niederlinski_index()", "K", "a square gain matrix", f"shape {K.shape}")
    p = [int(j) for j in pairing]
    if sorted(p) != list(range(n)):
        raise fail("niederlinski_index()", "pairing",
                   f"a permutation of 0..{n - 1} (one MV per CV)", repr(list(pairing)))
    Kp = K[:, p]
    diag = np.prod(np.diag(Kp))
    if diag == 0:
        raise fail("niederlinski_index()", "pairing", "non-zero paired gains",
                   "a paired gain of zero (the pairing puts an MV on a CV it does not move)")
    return float(np.linalg.det(Kp) / diag)


@dataclass
class GainAnalysis:
    """Result of :func:`gain_matrix_analysis` (every array CVs x MVs or per direction)."""

    cv_names: tuple[str, ...]
    mv_names: tuple[str, ...]
    singular_values: np.ndarray
    condition_number: float
    scaled_singular_values: np.ndarray
    scaled_condition_number: float
    weak_output_direction: dict[str, float]
    weak_input_direction: dict[str, float]
    collinear_mvs: list[dict[str, Any]]
    determinant: float | None
    rga: np.ndarray | None
    niederlinski: float | None
    pairing: list[tuple[str, str]] | None
    warnings: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        def fin(v):
            return None if v is None or not math.isfinite(v) else float(v)

        return {
            "cv_names": list(self.cv_names), "mv_names": list(self.mv_names),
            "singular_values": [float(s) for s in self.singular_values],
            "condition_number": fin(self.condition_number),
            "scaled_singular_values": [float(s) for s in self.scaled_singular_values],
            "scaled_condition_number": fin(self.scaled_condition_number),
            "weak_output_direction": self.weak_output_direction,
            "weak_input_direction": self.weak_input_direction,
            "collinear_mvs": self.collinear_mvs,
            "determinant": fin(self.determinant) if self.determinant is not None else None,
            "rga": None if self.rga is None else self.rga.tolist(),
            "niederlinski": fin(self.niederlinski) if self.niederlinski is not None else None,
            "pairing": None if self.pairing is None else [list(p) for p in self.pairing],
            "warnings": list(self.warnings),
        }


def _cond(s: np.ndarray) -> float:
    return float(s[0] / s[-1]) if s[-1] > 0 else math.inf


def _scales(v: Any, n: int, what: str) -> np.ndarray:
    if v is None:
        return np.ones(n)
    a = np.asarray(v, dtype=float).reshape(-1)
    if a.shape != (n,) or not np.all(np.isfinite(a)) or np.any(a <= 0):
        raise fail("gain_matrix_analysis()", what,
                   f"{n} finite numbers > 0 (the span of each variable that counts as one unit)",
                   shown(v))
    return a


def gain_matrix_analysis(K: Any, *, cv_names: Sequence[str] | None = None,
                         mv_names: Sequence[str] | None = None, cv_scales: Any = None,
                         mv_scales: Any = None,
                         pairing: Sequence[tuple[str, str]] | None = None) -> GainAnalysis:
    """Conditioning, directions, collinearity, RGA and integrity of a steady-state gain matrix.

    Parameters
    ----------
    K : array_like (ny, nu)
        Steady-state gains dy/du, CVs down, MVs across (engineering units).
    cv_names, mv_names : sequence of str, optional
    cv_scales, mv_scales : array_like, optional
        The size of each variable that counts as one unit (e.g. its operating range); the scaled
        matrix is ``diag(1/cv_scales) K diag(mv_scales)``.  Default 1 (then scaled = unscaled).
    pairing : sequence of (cv, mv) name pairs, optional
        A one-to-one pairing of a square matrix for the Niederlinski index.

    Returns
    -------
    GainAnalysis
        With plain-text ``warnings`` for an ill-conditioned matrix, large RGA elements, negative
        paired relative gains, a negative Niederlinski index and collinear MVs.
    """
    K = _matrix(K, "gain_matrix_analysis()")
    ny, nu = K.shape
    cvn = tuple(cv_names) if cv_names is not None else tuple(f"y{i}" for i in range(ny))
    mvn = tuple(mv_names) if mv_names is not None else tuple(f"u{j}" for j in range(nu))
    if len(cvn) != ny or len(mvn) != nu:
        raise fail("gain_matrix_analysis()", "cv_names" if len(cvn) != ny else "mv_names",
                   f"{ny} CV and {nu} MV names", f"{len(cvn)} and {len(mvn)}")
    sy = _scales(cv_scales, ny, "cv_scales")
    su = _scales(mv_scales, nu, "mv_scales")
    Ks = K / sy[:, None] * su[None, :]
    s = np.linalg.svd(K, compute_uv=False)
    U, ss, Vt = np.linalg.svd(Ks)
    k = min(ny, nu) - 1
    weak_out = U[:, k] * np.sign(U[np.argmax(np.abs(U[:, k])), k])
    weak_in = Vt[k] * np.sign(Vt[k][np.argmax(np.abs(Vt[k]))])
    warnings: list[str] = []
    cond_s = _cond(ss)
    if cond_s > COND_BAD:
        warnings.append(f"the scaled gain matrix is ill-conditioned (condition number {cond_s:.3g} > "
                        f"{COND_BAD:g}): the CV direction {_direction(weak_out, cvn)} is hard to move, "
                        f"and moves in it rest on small model gains")
    elif cond_s > COND_WARN:
        warnings.append(f"the scaled gain matrix has strong directions (condition number "
                        f"{cond_s:.3g} > {COND_WARN:g}); weakest CV direction "
                        f"{_direction(weak_out, cvn)}")
    collinear = []
    norms = np.linalg.norm(Ks, axis=0)
    for a in range(nu):
        for b in range(a + 1, nu):
            if norms[a] == 0 or norms[b] == 0:
                continue
            c = float(abs(Ks[:, a] @ Ks[:, b]) / (norms[a] * norms[b]))
            if c > COLLINEAR_COSINE:
                ang = math.degrees(math.acos(min(1.0, c)))
                collinear.append({"mvs": [mvn[a], mvn[b]], "cosine": c, "angle_deg": ang})
                warnings.append(f"MVs {mvn[a]} and {mvn[b]} act almost alike on the CVs (angle "
                                f"between their scaled gain columns {ang:.1f} deg)")
    det = rg = ni = None
    pair_names = None
    if ny == nu:
        det = float(np.linalg.det(K))
        if cond_s < 1e12:
            rg = _rga(K)
            big = np.abs(rg) > RGA_LARGE
            if big.any():
                i, j = np.unravel_index(int(np.argmax(np.abs(rg))), rg.shape)
                warnings.append(f"RGA element ({cvn[i]}, {mvn[j]}) = {rg[i, j]:.3g}: large relative "
                                f"gains (> {RGA_LARGE:g}) make the unit sensitive to MV errors")
        if pairing is not None:
            perm = _pairing_indices(pairing, cvn, mvn)
            ni = niederlinski_index(K, perm)
            pair_names = [(cvn[i], mvn[perm[i]]) for i in range(ny)]
            if ni < 0:
                warnings.append(f"Niederlinski index {ni:.3g} < 0: with integral action in every "
                                f"loop this pairing is unstable for any tuning once a loop is "
                                f"opened (no integrity)")
            if rg is not None:
                for i in range(ny):
                    if rg[i, perm[i]] < 0:
                        warnings.append(f"pair {cvn[i]}-{mvn[perm[i]]} has a negative relative gain "
                                        f"({rg[i, perm[i]]:.3g}): the loop changes sign when the "
                                        f"other loops open")
    return GainAnalysis(cvn, mvn, s, _cond(s), ss, cond_s,
                        dict(zip(cvn, map(float, weak_out))), dict(zip(mvn, map(float, weak_in))),
                        collinear, det, rg, ni, pair_names, warnings)


def _direction(v: np.ndarray, names: Sequence[str]) -> str:
    parts = [f"{c:+.2f} {n}" for c, n in zip(v, names) if abs(c) >= 0.05]
    return "(" + ", ".join(parts) + ")"


def _pairing_indices(pairing, cvn, mvn) -> list[int]:
    perm = [-1] * len(cvn)
    for item in pairing:
        try:
            c, m = item
        except (TypeError, ValueError):
            raise fail("gain_matrix_analysis()", "pairing", "(cv, mv) name pairs",
                       shown(item)) from None
        if c not in cvn or m not in mvn:
            raise fail("gain_matrix_analysis()", "pairing",
                       f"known names (CVs {list(cvn)}, MVs {list(mvn)})",
                       f"({c!r}, {m!r}), which names an unknown variable")
        perm[cvn.index(c)] = mvn.index(m)
    if sorted(perm) != list(range(len(cvn))):
        raise fail("gain_matrix_analysis()", "pairing", "every CV paired with its own MV",
                   repr(list(pairing)))
    return perm


def transfer_matrix_at(lin: Any, w: float) -> np.ndarray:
    """The complex MV->CV transfer matrix ``G(jw)`` of a :class:`~mpcproto.linear.LinearModel`,
    dead times included exactly (each delayed input column is multiplied by ``exp(-jw theta)``).
    """
    if not (isinstance(w, (int, float)) and math.isfinite(w) and w >= 0):
        raise fail("transfer_matrix_at()", "w", "a finite frequency >= 0", shown(w))
    A = np.asarray(lin.A, float)
    nx = A.shape[0]
    B = np.asarray(lin.B, complex).copy()
    D = np.asarray(lin.D, complex).copy()
    for k, (role, i, theta) in enumerate(lin.delays):
        if role != "mv":
            continue
        e = np.exp(-1j * w * theta)
        B[:, i] += lin.Bz[:, k] * e
        D[:, i] += lin.Dz[:, k] * e
    M = 1j * w * np.eye(nx) - A
    return np.asarray(lin.C, float) @ np.linalg.solve(M, B) + D


def rga_at_frequency(lin: Any, w: float | Sequence[float]) -> np.ndarray:
    """RGA of ``G(jw)`` (complex, ``G * inv(G).T`` element-wise) at one or several frequencies.

    Returns an array (n, n) for a scalar ``w`` and (len(w), n, n) for a sequence.  At ``w = 0`` it
    equals the steady-state RGA (for a unit with no integrating channel).  Frequencies are in
    radians per time unit of the model.
    """
    ws = np.atleast_1d(np.asarray(w, float))
    out = []
    for wk in ws:
        G = transfer_matrix_at(lin, float(wk))
        if G.shape[0] != G.shape[1]:
            raise fail("rga_at_frequency()", "lin", "as many CVs as MVs", f"shape {G.shape}")
        if np.linalg.cond(G) > 1e12:
            raise fail("rga_at_frequency()", "w", "frequencies where G(jw) is invertible",
                       f"G(jw) singular at w = {wk:g}")
        out.append(G * np.linalg.inv(G).T)
    arr = np.array(out)
    return arr[0] if np.ndim(w) == 0 else arr


@dataclass
class SamplingAdvice:
    """Result of :func:`sampling_advice` (times in the model's time unit)."""

    sample_time: float
    dominant_time_constant: float | None
    fastest_time_constant: float | None
    largest_dead_time: float
    settling_time: float | None
    suggested_horizon: int | None
    suggested_control_horizon: int | None
    warnings: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


def sampling_advice(lin: Any, Ts: float) -> SamplingAdvice:
    """Prediction horizon, control horizon and a sample-time check for a linear model.

    Rules (times from the stable real parts of the poles and the dead times of the MV channels):

    * settling time of the slowest channel ~ 4 dominant time constants + the largest dead time
      (98 % of a first-order step; common practice, no source); suggested prediction horizon N =
      that settling time in samples (the prediction must see the unit settle; common practice);
    * control horizon M ~ N/4 (between N/4 and N/3 is usual; from memory, Seborg, Edgar &
      Mellichamp, *Process Dynamics and Control*, the MPC chapter);
    * sample time: at most a tenth of the dominant time constant (Seborg, Edgar & Mellichamp, from
      memory) and, for a fast mode the MPC must act on, well below that mode's time constant;
      a dead time under one sample is invisible to the controller (common practice, no source).
    """
    if not (isinstance(Ts, (int, float)) and math.isfinite(Ts) and Ts > 0):
        raise fail("sampling_advice()", "Ts", "a finite number > 0", shown(Ts))
    poles = np.linalg.eigvals(np.asarray(lin.A, float)) if np.size(lin.A) else np.zeros(0)
    tol = INTEGRATOR_TOL * max(1.0, float(np.max(np.abs(poles)))) if poles.size else 0.0
    stable = poles[poles.real < -tol]
    taus = -1.0 / stable.real if stable.size else np.zeros(0)
    dead = [float(th) for (r, _, th) in lin.delays if r == "mv"]
    theta = max(dead) if dead else 0.0
    warns: list[str] = []
    if open_loop_class(poles) in ("integrating", "unstable"):
        warns.append("the unit has integrating or unstable modes: no settling time; choose the "
                     "prediction horizon from how fast those CVs must be brought back")
    if not taus.size:
        return SamplingAdvice(float(Ts), None, None, theta, None, None, None, warns)
    dom, fast = float(taus.max()), float(taus.min())
    settle = 4.0 * dom + theta
    N = max(1, int(math.ceil(settle / Ts)))
    M = max(1, int(round(N / 4)))
    if Ts > 0.1 * dom:
        warns.append(f"sample time {Ts:g} is more than a tenth of the dominant time constant "
                     f"{dom:.3g}: the controller samples the unit coarsely")
    if N > 300:
        warns.append(f"the unit settles in {settle:.3g} = {N} samples: a horizon this long makes the "
                     f"controller slow to build; a longer sample time may do")
    for th in dead:
        if 0 < th < Ts:
            warns.append(f"a dead time of {th:g} is below one sample ({Ts:g})")
            break
    return SamplingAdvice(float(Ts), dom, fast, theta, settle, N, M, warns)
