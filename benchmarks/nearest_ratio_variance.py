"""nearest_neighbour at its defaults on the demo or the commuter process, seed for seed: the run's
estimate and SE, and candidate variances recomputed in numpy from the run's kept rows (benchmark-side:
row-level reads here only), as JSON lines. Usage:
    nearest_ratio_variance.py demo|commuter FIRST:END OUT.jsonl [SQLMATCH_TREE]
(SQLMATCH_TREE: a checkout whose sqlmatch to run, e.g. an older commit's; default this repository).
Candidates (each the variance of the effect on the treated, sums over matched units, w a unit's
summed matching weight, N_1 the matched treated units; q the outcome, or for a ratio the linearised
u = (y - R_g x) / xbar_g):
  v_res   conditional Abadie-Imbens (2006) V, sigma2 from the score neighbour's difference of the
          residual of the group's regression on the numeric features (what sqlmatch did before)
  v_raw   the same from the raw outcome;  v_feat: sigma2 from the nearest same-group unit on the
          standardised numeric features (the paper's matching on the features)
  vbc_res v_res with the bias-correction term's sampling error: control j weighs w_j (1 / N_1 + d' S^-1 x~_j),
          d the treated-minus-matched-control feature means, S the controls' weighted centred cross-products
  vm_res  the population form (Abadie-Imbens 2006, section 4): sum over treated of (q_i - corrected
          matched mean - mean)^2 plus sum over controls of (w^2 - squared shares) sigma2 (vm_feat: sigma2 as v_feat;
          vm_rawnobc: uncorrected matched differences and raw sigma2, recorded, not reported)
Summary of one or more files (duplicate seeds counted once): nearest_ratio_variance.py summary OUT.jsonl ...
Results: RESULTS_nearest_ratio_variance.md."""
import sys, json, shutil
from pathlib import Path
REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, sys.argv[4] if len(sys.argv) > 4 else str(REPO)); sys.path.insert(0, str(REPO / "benchmarks"))
import duckdb, numpy as np
from scipy.spatial import cKDTree
from sqlmatch import api
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.spec import load_spec
from sqlmatch.demo_run import build_demo
from commuter_sim import build_commuter
if sys.argv[1] == "summary":
    import numpy as np
    rs = list({r["seed"]: r for f in sys.argv[2:] for r in map(json.loads, open(f))}.values())
    for o in [k for k in rs[0] if isinstance(rs[0][k], dict)]:
        x = [r[o] for r in rs]; err = np.array([a["est"] - a["truth"] for a in x]); sd = err.std(ddof=1)
        line = f"{o}: seeds {len(x)}, bias/SE {err.mean() / np.mean([a['se'] for a in x]):+.2f}, SD of errors {sd:.4f}"
        for k in ["se", "v_res", "v_raw", "v_feat", "vbc_res", "vm_res", "vm_feat"]:
            se = np.array([a[k] if k == "se" else a[k] ** 0.5 for a in x])
            line += f" | {k} SE/SD {se.mean() / sd:.2f} coverage {np.mean(np.abs(err) <= 1.959964 * se):.3f}"
        print(line)
    sys.exit()
process = sys.argv[1]; seeds = range(int(sys.argv[2].split(":")[0]), int(sys.argv[2].split(":")[1])); out = open(sys.argv[3], "a")

def nearest_same_group(X, g):
    """index of the nearest other unit of the same group on standardized X."""
    nb = np.full(len(g), -1)
    sd = X.std(axis=0); sd[sd == 0] = 1
    Z = X / sd
    for grp in (0, 1):
        idx = np.where(g == grp)[0]
        tree = cKDTree(Z[idx] + 1e-9 * np.random.default_rng(0).standard_normal(Z[idx].shape))
        d, k = tree.query(Z[idx], k=2)
        nb[idx] = idx[k[:, 1]]
    return nb

for seed in seeds:
    folder = Path(f"/tmp/nearest_ratio_variance/{process}{seed}")
    if process == "demo":
        spec_path = build_demo(folder, riders=12000, seed=seed); db = folder / "bikeshare.duckdb"
        c0 = duckdb.connect(str(db), read_only=True)
        truth = {o: dict(expected_att=float(e)) for o, e in c0.execute("SELECT outcome, true_att FROM demo_truth").fetchall()}; c0.close()
    else:
        spec_path, truth = build_commuter(folder, units=10000, seed=seed, threads=1); db = folder / "commuter.duckdb"
    con = duckdb.connect(str(db), config={"threads": 1})
    spec = load_spec(spec_path).with_overrides(method="nearest_neighbour")
    res = api.run(spec, engine=DuckDBEngine(str(db), connection=con), keep_tables=True)
    s, n = spec.work_schema, spec.name
    W = con.execute(f'select w.*, u.score, u.control_group from "{s}"."{n}_weighted_units" w join "{s}"."{n}_nearest_neighbour_units" u using (unit_key) where w.match__weight is not null order by w.unit_key').df()
    M = con.execute(f'select m.treated_key, u.unit_key as control_key, m.share from "{s}"."{n}_nearest_neighbour_matches" m join "{s}"."{n}_nearest_neighbour_units" u on u.treated = 0 and u.control_group = m.control_group').df()
    con.close(); shutil.rmtree(folder, ignore_errors=True)
    feats = [f.name for f in spec.numeric_features]
    X = W[feats].to_numpy(float); g = W.treated.to_numpy(); w = W.match__weight.to_numpy(float)
    pos = {k: i for i, k in enumerate(W.unit_key)}
    ti = M.treated_key.map(pos).to_numpy(); ci = M.control_key.map(pos).to_numpy(); sh = M.share.to_numpy(float)
    t = g == 1; c = g == 0; N1 = t.sum()
    # weighted regression of controls on features (the bias correction's slopes)
    def slopes(q, mask):
        ww = w[mask]; Xm = X[mask]; xb = ww @ Xm / ww.sum(); Xc = Xm - xb
        S = (Xc * ww[:, None]).T @ Xc
        b = np.linalg.lstsq(S, (Xc * ww[:, None]).T @ (q[mask] - ww @ q[mask] / ww.sum()), rcond=None)[0]
        return b, xb, S, Xc
    # neighbours: score order within group (as the SQL), and AI-2006 feature matching
    order = np.lexsort((W.unit_key.to_numpy(), W.score.round(10).to_numpy(), g))
    nb_s = np.full(len(g), -1)
    sc = W.score.round(10).to_numpy()
    for grp in (0, 1):
        o = order[g[order] == grp]
        for j, i in enumerate(o):
            before = sc[i] - sc[o[j - 1]] if j > 0 else np.inf
            after = sc[o[j + 1]] - sc[i] if j + 1 < len(o) else np.inf
            nb_s[i] = o[j - 1] if before <= after else o[j + 1]
    nb_f = nearest_same_group(X, g)
    rec = dict(process=process, seed=seed, n1=int(N1))
    for e in res.effects:
        if e.outcome not in truth: continue
        if e.kind == "ratio":
            num = W[f"{e.outcome}__num"].to_numpy(float); den = W[f"{e.outcome}__den"].to_numpy(float)
            x1 = den[t].mean(); x0 = w[c] @ den[c] / w[c].sum()
            R1 = num[t].sum() / den[t].sum(); R0 = w[c] @ num[c] / (w[c] @ den[c])
            q = np.where(t, (num - R1 * den) / x1, (num - R0 * den) / x0)
        else:
            q = W[e.outcome].to_numpy(float)
        b0, xb0, S0, Xc0 = slopes(q, c); b1, xb1, S1, _ = slopes(q, t)
        d = X[t].mean(axis=0) - xb0
        beta = {0: b0, 1: b1}
        resid = q - np.where(t, X @ b1, X @ b0)
        s2_res = (resid - resid[nb_s]) ** 2 / 2          # current: score neighbour, residual
        s2_raw = (q - q[nb_s]) ** 2 / 2                   # score neighbour, raw
        s2_feat = (q - q[nb_f]) ** 2 / 2                  # AI 2006: nearest on the features
        w2 = np.where(t, 1.0, w ** 2)
        V = lambda s2: (w2 * s2).sum() / N1 ** 2
        # bias-correction term: controls' coefficient w (1/N1 + d'S^-1 x~)
        cc = w[c] * (1 / N1 + Xc0 @ np.linalg.solve(S0, d))
        Vbc = lambda s2: s2[t].sum() / N1 ** 2 + (cc ** 2 * s2[c]).sum()
        # marginal (PATT) version: treated part from matched differences (bias corrected)
        a = np.bincount(ti, weights=sh * (q[ci] + (X[ti] - X[ci]) @ b0), minlength=len(g))
        ai = (q - a)[t]
        share2 = np.bincount(ci, weights=sh ** 2, minlength=len(g))
        Vm = lambda s2: (((ai - ai.mean()) ** 2).sum() + ((w[c] ** 2 - share2[c]) * s2[c]).sum()) / N1 ** 2
        ar = (q - np.bincount(ti, weights=sh * q[ci], minlength=len(g)))[t]
        Vm_raw = (((ar - ar.mean()) ** 2).sum() + ((w[c] ** 2 - share2[c]) * s2_raw[c]).sum()) / N1 ** 2
        rec[e.outcome] = dict(est=e.estimate, se=e.std_error, truth=truth[e.outcome]["expected_att"],
            v_res=V(s2_res), v_raw=V(s2_raw), v_feat=V(s2_feat), vbc_res=Vbc(s2_res), vbc_feat=Vbc(s2_feat),
            vm_res=Vm(s2_res), vm_rawnobc=Vm_raw, vm_feat=Vm(s2_feat), dstd=list(d / X[c].std(axis=0)),
            vt_res=s2_res[t].sum()/N1**2, vt_feat=s2_feat[t].sum()/N1**2, vc_res=(w2*s2_res)[c].sum()/N1**2, vc_feat=(w2*s2_feat)[c].sum()/N1**2)
    out.write(json.dumps(rec) + "\n"); out.flush()
    print(seed, flush=True)
