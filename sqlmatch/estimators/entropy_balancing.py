"""Entropy balancing (Hainmueller 2012, Political Analysis 20:25): the dual's Newton solver and
the effect's sandwich variance. Pure: sums in, numbers out; the sums come from one aggregate
query each (sqlmatch/matching/entropy_balancing.py).

Controls get weights w_j = exp(lam' z_j) / sum_k exp(lam' z_k) (uniform base weights), where z
are the moment functions centred at the enrolled units' means (and scaled, for conditioning).
The weights that make the weighted control means of z equal 0 while staying closest to uniform
(Kullback-Leibler divergence) solve the smooth convex dual

    minimise f(lam) = log sum_j exp(lam' z_j),
    gradient g = sum_j w_j z_j (the weighted control means of z),
    Hessian  H = sum_j w_j z_j z_j' - g g' (their weighted covariance),

which we minimise by Newton steps with step halving (Armijo's rule). A target outside the
controls' convex hull makes f unbounded below: the steps then grow and g never reaches 0.

The effect on the treated mu1 - mu0 solves stacked estimating equations (Zhao & Percival 2017,
Journal of Causal Inference 5(1), show entropy balancing is such an M-estimator and doubly robust
when the controls' outcome is linear in z; recalled), per unit with t treated, u the outcome (a
ratio's numerator), v = 1 (its denominator), w = exp(lam' z) times a constant:

    psi_1   = t (u - mu1 v)
    psi_0   = (1 - t) w (u - mu0 v)
    psi_lam = (1 - t) w (z - m)          (the balance conditions)
    psi_m   = t (z - m)                  (the targets: the enrolled means, estimated too)

with the sandwich V = J^-1 B J^-T (Stefanski & Boos 2002, The American Statistician 56:29), J
and B sums over units of the derivatives and the products of the psi (weighted_effect).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sqlmatch.estimators.weighting import WeightedEffect, difference_from_sandwich

ARMIJO = 1e-4  # sufficient decrease of the line search (Nocedal & Wright 2006, ch. 3; common practice)
MAX_HALVINGS = 20
MAX_CONDITION = 1e10  # of H, moments scaled to SD 1: beyond it the step is mostly rounding (ours)
ROUNDING = 1e-12  # relative: far above a double's rounding in a sum of a few million terms


@dataclass(frozen=True)
class DualValue:
    """One evaluation of the dual at lam: f, g, H, and the weights' dispersion."""

    value: float  # f(lam) = log sum exp(lam' z)
    gradient: np.ndarray  # weighted control means of z
    hessian: np.ndarray
    max_share: float  # largest weight / sum of weights
    effective: float  # Kish's effective number of controls (sum w)^2 / sum w^2


def dual_from_sums(top: float, s0: float, s1: np.ndarray, s2: np.ndarray, s0_sq: float) -> DualValue:
    """From sums of e = exp(lam' z - top) over the controls (top = max lam' z): s0 = sum e,
    s1 = sum e z, s2 = sum e z z', s0_sq = sum e^2. The largest e is 1."""
    g = s1 / s0
    h = s2 / s0 - np.outer(g, g)
    return DualValue(value=top + math.log(s0), gradient=g, hessian=h, max_share=1.0 / s0, effective=s0 * s0 / s0_sq)


@dataclass(frozen=True)
class Solution:
    lam: np.ndarray
    dual: DualValue  # at lam
    steps: int  # Newton steps taken (each one aggregate query, plus one per halving)
    evaluations: int


class BalanceFailed(Exception):
    """The dual did not reach balance: `reason` ("singular": collinear moments; "diverged": the
    targets out of reach), where it stopped."""

    def __init__(self, reason: str, lam: np.ndarray, dual: DualValue, steps: int):
        self.reason, self.lam, self.dual, self.steps = reason, lam, dual, steps
        super().__init__(reason)


def solve(evaluate, p: int, max_steps: int = 50, tolerance: float = 1e-10) -> Solution:
    """Minimise the dual; `evaluate(lam)` runs one aggregate query and returns a DualValue.

    Stops when every weighted mean of z is within `tolerance` of its target (z in units of the
    controls' SD, so 1e-10 is far below any balance that matters). Raises BalanceFailed when H is
    singular (collinear moments) or balance is not reached in `max_steps` Newton steps."""
    lam = np.zeros(p)
    cur = evaluate(lam)
    evaluations = 1
    for step in range(max_steps + 1):
        g = cur.gradient
        if np.max(np.abs(g)) <= tolerance:
            return Solution(lam=lam, dual=cur, steps=step, evaluations=evaluations)
        if step == max_steps:
            break
        # H singular: at lam = 0 (uniform weights) the moments are collinear among the controls;
        # later, the weights have collapsed onto a face of the controls' convex hull, which
        # happens when the targets lie outside it. A solve would still return a step from rounding.
        if np.linalg.cond(cur.hessian) > MAX_CONDITION:
            raise BalanceFailed("singular" if step == 0 else "diverged", lam, cur, step)
        try:
            d = -np.linalg.solve(cur.hessian, g)
        except np.linalg.LinAlgError:
            raise BalanceFailed("singular", lam, cur, step) from None
        if not np.all(np.isfinite(d)):
            raise BalanceFailed("singular", lam, cur, step)
        slope = float(g @ d)
        t = 1.0
        for _ in range(MAX_HALVINGS):
            trial = evaluate(lam + t * d)
            evaluations += 1
            if not math.isfinite(trial.value):
                pass
            elif trial.value <= cur.value + ARMIJO * t * slope:
                break
            # near the optimum the decrease is below the rounding of f (sums over many units): take
            # the step when f stays within that rounding and the gradient shrinks
            elif trial.value <= cur.value + ROUNDING * max(1.0, abs(cur.value)) and np.max(np.abs(trial.gradient)) < np.max(np.abs(g)):
                break
            t /= 2
        else:
            # no decrease left to find: at the limit of floating point, or the step is useless
            if np.max(np.abs(g)) <= 1e3 * tolerance:
                return Solution(lam=lam, dual=cur, steps=step, evaluations=evaluations)
            raise BalanceFailed("diverged", lam, cur, step)
        lam, cur = lam + t * d, trial
    raise BalanceFailed("diverged", lam, cur, max_steps)


# ---------------------------------------------------------------- the effect and its variance


@dataclass(frozen=True)
class MomentSums:
    """Sums over units that do not depend on the outcome (z is the p moment functions; w the
    stored control weight)."""

    n_treated: float
    treated_z: np.ndarray  # sum_t z
    treated_zz: np.ndarray  # sum_t z z'
    control_w: float  # sum_c w
    control_w2: float  # sum_c w^2
    control_wz: np.ndarray  # sum_c w z
    control_wzz: np.ndarray  # sum_c w z z'
    control_w2z: np.ndarray  # sum_c w^2 z
    control_w2zz: np.ndarray  # sum_c w^2 z z'


@dataclass(frozen=True)
class TermSums:
    """One outcome's sums (u, v as in the module docstring)."""

    t_v: float
    t_u: float
    t_uu: float
    t_uv: float
    t_vv: float
    t_uz: np.ndarray
    t_vz: np.ndarray
    c_wv: float
    c_wu: float
    c_w2uu: float
    c_w2uv: float
    c_w2vv: float
    c_w2u: float
    c_w2v: float
    c_wuz: np.ndarray
    c_wvz: np.ndarray
    c_w2uz: np.ndarray
    c_w2vz: np.ndarray


def weighted_effect(s: MomentSums, o: TermSums, level: float = 0.95) -> WeightedEffect:
    """mu1 - mu0 and its sandwich variance; parameters (mu1, mu0, lam, m) as in the module docstring."""
    nan = math.nan
    if o.t_v <= 0 or o.c_wv <= 0 or s.n_treated <= 0:
        return WeightedEffect(nan, None, None, None, nan, nan, np.full((2, 2), nan))
    mu1, mu0 = o.t_u / o.t_v, o.c_wu / o.c_wv
    m = s.treated_z / s.n_treated
    p = len(m)
    k = 2 + 2 * p
    lam_, m_ = slice(2, 2 + p), slice(2 + p, k)
    jac = np.zeros((k, k))
    jac[0, 0] = -o.t_v
    jac[1, 1] = -o.c_wv
    jac[1, lam_] = (o.c_wuz - mu0 * o.c_wvz)  # d psi_0 / d lam = w (u - mu0 v) z'
    jac[lam_, lam_] = s.control_wzz - np.outer(m, s.control_wz)  # sum w (z - m) z'
    jac[lam_, m_] = -s.control_w * np.eye(p)
    jac[m_, m_] = -s.n_treated * np.eye(p)
    meat = np.zeros((k, k))
    meat[0, 0] = o.t_uu - 2 * mu1 * o.t_uv + mu1**2 * o.t_vv
    meat[1, 1] = o.c_w2uu - 2 * mu0 * o.c_w2uv + mu0**2 * o.c_w2vv
    r1z = (o.t_uz - mu1 * o.t_vz) - m * (o.t_u - mu1 * o.t_v)  # sum_t (u - mu1 v)(z - m)
    meat[0, m_] = meat[m_, 0] = r1z
    r0z = (o.c_w2uz - mu0 * o.c_w2vz) - m * (o.c_w2u - mu0 * o.c_w2v)  # sum_c w^2 (u - mu0 v)(z - m)
    meat[1, lam_] = meat[lam_, 1] = r0z
    meat[lam_, lam_] = s.control_w2zz - np.outer(s.control_w2z, m) - np.outer(m, s.control_w2z) + s.control_w2 * np.outer(m, m)
    meat[m_, m_] = s.treated_zz - s.n_treated * np.outer(m, m)
    return difference_from_sandwich(mu1, mu0, jac, meat, level)


def level_effects(s: MomentSums, levels: list[TermSums]):
    """Per subgroup level l the weighted difference mu1_l - mu0_l (the level's enrolled mean and its
    non-enrolled units' weighted mean) and the sandwich covariance of all of them. The stacked
    equations are those of weighted_effect with a pair per level,

        psi_1l = t 1[l] (u - mu1_l v),    psi_0l = (1 - t) w 1[l] (u - mu0_l v),

    zero outside the level, beside the study's own balance conditions and targets (lam and m,
    fitted on every unit; `s` holds the study-wide moment sums). A unit is in one level, so the
    levels' equations meet only through lam and m: that is where their covariance comes from
    (Stefanski & Boos 2002, The American Statistician 56:29, for the stacking). With one level
    holding every unit this is weighted_effect."""
    from sqlmatch.estimators.weighting import LevelEffects

    L, p = len(levels), len(s.treated_z)
    k = 2 * L + 2 * p
    lam_, m_ = slice(2 * L, 2 * L + p), slice(2 * L + p, k)
    est = np.full(L, math.nan)
    if s.n_treated <= 0:
        return LevelEffects(est, np.full((L, L), math.nan))
    m = s.treated_z / s.n_treated
    jac, meat, grad = np.zeros((k, k)), np.zeros((k, k)), np.zeros((L, k))
    for i, o in enumerate(levels):
        if o.t_v <= 0 or o.c_wv <= 0:
            return LevelEffects(est, np.full((L, L), math.nan))
        mu1, mu0 = o.t_u / o.t_v, o.c_wu / o.c_wv
        a, b = 2 * i, 2 * i + 1
        jac[a, a], jac[b, b] = -o.t_v, -o.c_wv
        jac[b, lam_] = o.c_wuz - mu0 * o.c_wvz
        meat[a, a] = o.t_uu - 2 * mu1 * o.t_uv + mu1**2 * o.t_vv
        meat[b, b] = o.c_w2uu - 2 * mu0 * o.c_w2uv + mu0**2 * o.c_w2vv
        meat[a, m_] = meat[m_, a] = (o.t_uz - mu1 * o.t_vz) - m * (o.t_u - mu1 * o.t_v)
        meat[b, lam_] = meat[lam_, b] = (o.c_w2uz - mu0 * o.c_w2vz) - m * (o.c_w2u - mu0 * o.c_w2v)
        est[i] = mu1 - mu0
        grad[i, a], grad[i, b] = 1.0, -1.0
    jac[lam_, lam_] = s.control_wzz - np.outer(m, s.control_wz)
    jac[lam_, m_] = -s.control_w * np.eye(p)
    jac[m_, m_] = -s.n_treated * np.eye(p)
    meat[lam_, lam_] = s.control_w2zz - np.outer(s.control_w2z, m) - np.outer(m, s.control_w2z) + s.control_w2 * np.outer(m, m)
    meat[m_, m_] = s.treated_zz - s.n_treated * np.outer(m, m)
    try:
        bread = np.linalg.inv(jac)
    except np.linalg.LinAlgError:
        return LevelEffects(est, np.full((L, L), math.nan))
    return LevelEffects(est, grad @ bread @ meat @ bread.T @ grad.T)
