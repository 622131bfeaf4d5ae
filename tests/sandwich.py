"""The sandwich covariance of stacked estimating equations computed on the rows, for tests that
check the warehouse's aggregate formulas against it (Stefanski & Boos 2002, The American
Statistician 56:29): V = J^-1 B J^-T with B the sum over units of psi psi' at the estimates and J
the derivative of sum psi, taken here by central finite differences (independent of the analytic
derivatives the library uses)."""

from __future__ import annotations

import numpy as np


def sandwich_covariance(psi, theta: np.ndarray, steps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(V, P): psi(theta) gives one row per unit and one column per equation; `steps` is the
    finite-difference step of each parameter."""
    P = psi(theta)
    J = np.empty((len(theta), len(theta)))
    for k in range(len(theta)):
        up, down = theta.copy(), theta.copy()
        up[k] += steps[k]
        down[k] -= steps[k]
        J[:, k] = (psi(up).sum(axis=0) - psi(down).sum(axis=0)) / (2 * steps[k])
    bread = np.linalg.inv(J)
    return bread @ (P.T @ P) @ bread.T, P


def relative_steps(theta: np.ndarray, first: int, scale: np.ndarray | None = None, size: float = 1e-6) -> np.ndarray:
    """size * max(1, |theta_k|) for the first `first` parameters (means), size * scale_k for the rest
    (coefficients, whose step is set by the scale of the columns they multiply)."""
    rest = np.ones(len(theta) - first) if scale is None else np.asarray(scale, dtype=float)
    return size * np.concatenate([np.maximum(1.0, np.abs(theta[:first])), rest])
