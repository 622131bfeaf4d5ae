"""Independent check, numpy and statsmodels only (no sqlmatch): the propensity-weighted ATT / ATC with
the sandwich variance of the stacked estimating equations (Lunceford & Davidian 2004, Statistics in
Medicine 23:2937; Jacobian in closed form) on a unit-level copy of benchmarks/commuter_sim.py's
process (its own latent draws, take-up and June activity), for the binary outcome active in June,
with a FIXED score model: `linear` (pre_trips, commute_km, district), `log` (the take-up model's
own form) or `rich` (linear, log1p of both, commute_km squared: about the terms the stepwise search
chooses). Prints mean SE, SD of the estimates and of the errors against the expected effect of the
target group, and coverage, over R replicates of 10,000 riders. Used in
RESULTS_calibration_estimands.md to tell the sandwich's behaviour with a fixed model from that
with data-chosen terms.

    python3 benchmarks/estimand_ipw_check.py 300 linear log rich
"""
import sys, numpy as np, statsmodels.api as sm
from pathlib import Path
sys.path.insert(0, str(Path(__file__).resolve().parent))
import commuter_sim as cs
R = int(sys.argv[1]); n = 10000
def fit_one(rng, estimand, form):
    district, commute, rate, fm = cs._latent(rng, n)
    pre = rng.poisson(rate * cs.SEASON[cs.PRE].sum())
    p = cs._takeup(pre, commute, district)
    t = (rng.random(n) < p).astype(float)
    tau = cs._tau(pre)
    j0 = rng.poisson(rate * cs.SEASON[cs.JUNE]); j1 = j0 + rng.poisson(tau)
    y = np.where(t == 1, j1 > 0, j0 > 0).astype(float)
    truth = np.mean((np.exp(-rate * cs.SEASON[cs.JUNE]) * (1 - np.exp(-tau)))[t == (0 if estimand == "atc" else 1)])
    d = np.column_stack([(district == k).astype(float) for k in range(1, 5)])
    if form == "rich":
        X = np.column_stack([np.ones(n), pre, commute, d, np.log1p(pre), np.log1p(commute), commute**2])
    else:
        f = pre.astype(float) if form == "linear" else np.log1p(pre)
        X = np.column_stack([np.ones(n), f, commute if form == "linear" else np.log(commute), d])
    b = sm.Logit(t, X).fit(disp=0).params
    e = 1 / (1 + np.exp(-X @ b))
    if estimand == "atc":
        a = np.where(t == 1, (1 - e) / e, 1.0); g = np.where(t == 1, -a, 0.0)
    else:
        a = np.where(t == 1, 1.0, e / (1 - e)); g = np.where(t == 1, 0.0, a)
    mu1 = np.sum(t * a * y) / np.sum(t * a); mu0 = np.sum((1 - t) * a * y) / np.sum((1 - t) * a)
    P = np.column_stack([t * a * (y - mu1), (1 - t) * a * (y - mu0), (t - e)[:, None] * X])
    k = 2 + X.shape[1]; J = np.zeros((k, k))
    J[0, 0] = -np.sum(t * a); J[1, 1] = -np.sum((1 - t) * a)
    J[0, 2:] = (t * g * (y - mu1)) @ X; J[1, 2:] = ((1 - t) * g * (y - mu0)) @ X
    J[2:, 2:] = -(X * (e * (1 - e))[:, None]).T @ X
    Ji = np.linalg.inv(J); V = Ji @ (P.T @ P) @ Ji.T
    return mu1 - mu0, np.sqrt(V[0, 0] + V[1, 1] - 2 * V[0, 1]), truth
for form in sys.argv[2:]:
    for est in ("att", "atc"):
        rng = np.random.default_rng(7)
        out = np.array([fit_one(rng, est, form) for _ in range(R)])
        err = out[:, 0] - out[:, 2]
        cover = np.mean(np.abs(err) <= 1.96 * out[:, 1])
        print(f"{form:6} {est}: mean SE {out[:,1].mean():.5f}  SD est {out[:,0].std(ddof=1):.5f}  SD err {err.std(ddof=1):.5f}  SE/SDerr {out[:,1].mean()/err.std(ddof=1):.2f}  coverage {cover:.3f}  bias {err.mean():+.5f}", flush=True)
