"""Minimal realizations, steady-state gains of channels and transmission zeros of a state-space
model (the analysis under :class:`mpcproto.LinearModel`).

Channels and zeros are computed on *minimal* realizations (controllable and observable parts, by
orthogonal projections after a diagonal balancing; see :func:`minimal_realization`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import scipy.linalg as sla

__all__ = ["minimal_realization", "transmission_zeros", "INTEGRATOR_TOL"]

#: relative size (to the largest eigenvalue magnitude, at least 1) below which an eigenvalue counts
#: as an integrator (s = 0), and the real part above which a mode counts as unstable: the one
#: classification of the package (linear models, reports, tuning)
INTEGRATOR_TOL = 1e-10


# ---------------------------------------------------------------------------------------------
# minimal realizations, channel gains and transmission zeros


def _orth(M: np.ndarray, tol: float) -> np.ndarray:
    """Orthonormal basis of the range of M (singular values above tol)."""
    if M.size == 0:
        return np.zeros((M.shape[0], 0))
    U, sv, _ = np.linalg.svd(M, full_matrices=False)
    return U[:, sv > tol]


def _krylov_basis(A: np.ndarray, B: np.ndarray, tol: float) -> np.ndarray:
    """Orthonormal basis of the smallest A-invariant subspace containing range(B) (staircase)."""
    n = A.shape[0]
    V = _orth(B, tol)
    while 0 < V.shape[1] < n:
        W = _orth(np.hstack([V, A @ V]), tol)
        if W.shape[1] == V.shape[1]:
            break
        V = W
    return V


def minimal_realization(A: np.ndarray, B: np.ndarray, C: np.ndarray,
                        tol: float = 1e-9) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The controllable and observable part (Am, Bm, Cm) of (A, B, C), by orthogonal projections.

    The state is first balanced by a diagonal similarity (``scipy.linalg.matrix_balance``) and A, B,
    C are normalized, so rank decisions do not depend on units.  Then the controllable subspace V
    of (A, B) is built (the Krylov space of B under A, one orthonormal block at a time), and within
    it the orthogonal complement W of the unobservable subspace (the Krylov space of C^T under A^T).
    ``tol`` is the relative singular-value threshold for the rank decisions.  The result is a
    realization of the same transfer matrix (in other state coordinates).
    """
    A = np.atleast_2d(np.asarray(A, float))
    n = A.shape[0]
    B = np.asarray(B, float).reshape(n, -1)
    C = np.asarray(C, float).reshape(-1, n)
    if n == 0:
        return A, B, C
    _, (sc, _) = sla.matrix_balance(A, permute=False, separate=True)
    A = A * (1.0 / sc)[:, None] * sc[None, :]
    B = B / sc[:, None]
    C = C * sc[None, :]
    na = np.linalg.norm(A, 2) or 1.0
    nb = np.linalg.norm(B, 2) or 1.0
    nc = np.linalg.norm(C, 2) or 1.0
    An = A / na
    V = _krylov_basis(An, B / nb, tol)
    Ac, Bc, Cc = V.T @ A @ V, V.T @ B, C @ V
    if Ac.shape[0] == 0:
        return Ac, Bc, Cc
    W = _krylov_basis(Ac.T / na, Cc.T / nc, tol)
    return W.T @ Ac @ W, W.T @ Bc, Cc @ W


def _ss_gain(Am: np.ndarray, bm: np.ndarray, cm: np.ndarray, d: float, *,
             discrete: bool) -> tuple[float, bool, float | None]:
    """(gain, integrating, ramp rate) of a minimal SISO realization.

    Continuous: gain = d + c (0 I - A)^-1 b; discrete: d + c (I - A)^-1 b.  With a (simple) pole at
    s = 0 (z = 1) the gain is infinite and the ramp rate -- the slope of the step response per time
    unit (per sample) -- is the residue c v w^T b / (w^T v), v and w right and left null vectors.
    """
    n = Am.shape[0]
    if n == 0:
        return float(d), False, None
    M = (np.eye(n) - Am) if discrete else -Am
    scale = max(1.0, float(np.max(np.abs(M))))
    U, sv, Vt = np.linalg.svd(M)
    if sv[-1] > INTEGRATOR_TOL * scale:
        return float(d + (cm @ np.linalg.solve(M, bm)).item()), False, None
    v, w = Vt[-1], U[:, -1]
    denom = float(w @ v)
    ramp = float((cm @ v).item() * (w @ bm).item() / denom) if abs(denom) > 1e-12 else math.nan
    gain = math.copysign(math.inf, ramp) if (ramp == ramp and ramp != 0) else math.inf
    return gain, True, ramp


def _gain_matrix(A: np.ndarray, B: np.ndarray, C: np.ndarray, D: np.ndarray, *,
                 discrete: bool) -> np.ndarray:
    """Steady-state gains channel by channel (minimal SISO realization of each; see
    :func:`_ss_gain`): ``inf`` only where that channel integrates."""
    K = np.zeros((C.shape[0], B.shape[1]))
    for i in range(C.shape[0]):
        for j in range(B.shape[1]):
            Am, bm, cm = minimal_realization(A, B[:, [j]], C[[i]])
            K[i, j] = _ss_gain(Am, bm, cm, D[i, j], discrete=discrete)[0]
    return K


def _channel(A: np.ndarray, b: np.ndarray, c: np.ndarray, d: float) -> dict[str, Any]:
    """Minimal SISO realization of one channel with its gain, poles, zeros and (num, den)."""
    Am, bm, cm = minimal_realization(A, b.reshape(-1, 1), c.reshape(1, -1))
    n = Am.shape[0]
    d = float(d)
    scale = max(1.0, float(np.max(np.abs(Am)))) if n else 1.0
    connected = bool(n > 0 or abs(d) > 0)
    gain, integrating, ramp = _ss_gain(Am, bm, cm, d, discrete=False)
    poles = np.linalg.eigvals(Am) if n else np.zeros(0, complex)
    poles = np.where(np.abs(poles) <= INTEGRATOR_TOL * scale, 0.0, poles)  # integrators at 0
    if n:
        from scipy.signal import ss2tf

        num, den = ss2tf(Am, bm, cm, np.array([[d]]))
        num = np.atleast_1d(np.squeeze(num))
        nz = np.abs(num) > 1e-10 * max(1.0, float(np.max(np.abs(num))))
        num = num[np.argmax(nz):] if np.any(nz) else np.zeros(1)
        zeros_ = np.roots(num) if len(num) > 1 else np.zeros(0, complex)
    else:
        num, den, zeros_ = np.array([d]), np.array([1.0]), np.zeros(0, complex)
    return {"gain": float(gain), "poles": poles, "zeros": zeros_, "num": num, "den": np.atleast_1d(den),
            "connected": connected, "integrating": integrating, "ramp_rate": ramp}


def _pencil_zeros(A: np.ndarray, B: np.ndarray, C: np.ndarray, D: np.ndarray) -> np.ndarray:
    """Finite generalized eigenvalues of the square Rosenbrock pencil."""
    nx = A.shape[0]
    M = np.block([[A, B], [C, D]])
    N = np.zeros_like(M)
    N[:nx, :nx] = np.eye(nx)
    if M.size == 0:
        return np.zeros(0, complex)
    with np.errstate(all="ignore"):
        ev = sla.eigvals(M, N)
    ev = ev[np.isfinite(ev)]
    scale = max(1.0, float(np.max(np.abs(M))))
    return ev[np.abs(ev) < 1e8 * scale]


def _normal_rank(A, B, C, D, rng) -> int:
    """Normal rank of G(s) = C (sI - A)^-1 B + D, from its values at two random complex points."""
    n = A.shape[0]
    r = 0
    for _ in range(2):
        s = complex(rng.standard_normal(), rng.standard_normal()) * max(1.0, float(np.max(np.abs(A), initial=0)))
        G = D + (C @ np.linalg.solve(s * np.eye(n) - A, B) if n else 0)
        sv = np.linalg.svd(np.atleast_2d(G), compute_uv=False)
        r = max(r, int(np.sum(sv > 1e-10 * max(1.0, float(sv[0]) if sv.size else 1.0))))
    return r


def transmission_zeros(A: np.ndarray, B: np.ndarray, C: np.ndarray, D: np.ndarray) -> np.ndarray:
    """Finite transmission zeros of (A, B, C, D); see :meth:`LinearModel.zeros` for the method."""
    A = np.atleast_2d(np.asarray(A, float))
    nx = A.shape[0]
    B = np.asarray(B, float).reshape(nx, -1)
    C = np.asarray(C, float).reshape(-1, nx)
    D = np.asarray(D, float).reshape(C.shape[0], B.shape[1])
    Am, Bm, Cm = minimal_realization(A, B, C)
    nu, ny = Bm.shape[1], Cm.shape[0]
    rng = np.random.default_rng(12345)  # fixed: the squaring-down is an internal device
    if nu == 0 or ny == 0 or _normal_rank(Am, Bm, Cm, D, rng) < min(nu, ny):
        return np.zeros(0, complex)
    if nu == ny:
        z = _pencil_zeros(Am, Bm, Cm, D)
    else:
        sets = []
        for _ in range(2):
            if ny > nu:
                Wt = rng.standard_normal((nu, ny))
                sets.append(_pencil_zeros(Am, Bm, Wt @ Cm, Wt @ D))
            else:
                V = rng.standard_normal((nu, ny))
                sets.append(_pencil_zeros(Am, Bm @ V, Cm, D @ V))
        z = np.array([z1 for z1 in sets[0]
                      if np.any(np.abs(sets[1] - z1) <= 1e-6 * max(1.0, abs(z1)))], dtype=complex)
    return np.sort_complex(z.astype(complex))


def _controllability_reach(A: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Columns b, Ab, A^2 b, ... stacked: a CV row times this is non-zero iff the path is connected."""
    n = A.shape[0]
    cols = [b]
    for _ in range(max(n - 1, 0)):
        cols.append(A @ cols[-1])
    return np.column_stack(cols) if cols else np.zeros((0, 0))
