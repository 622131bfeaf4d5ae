"""Commuter process, default nearest-neighbour run: the Abadie-Imbens (2011) correction recomputed in pandas with other regressors (district dummies, squares and products, log1p terms), estimate - truth over the treated kept in SEs. Usage: nearest_commuter_corrections.py RIDERS SEED,SEED (benchmark-side: reads rows)."""
import sys, shutil, json
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent)); sys.path.insert(0, str(HERE))
import duckdb, numpy as np, pandas as pd
from sqlmatch import api
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.spec import load_spec
from commuter_sim import build_commuter
Path("/tmp/nearest_diagnosis").mkdir(exist_ok=True)
size = int(sys.argv[1]); seeds = [int(s) for s in sys.argv[2].split(",")]
rows = []
for seed in seeds:
    folder = Path(f"/tmp/nearest_diagnosis/b{seed}")
    spec_path, truth = build_commuter(folder, units=size, seed=seed, threads=1)
    db = folder / "commuter.duckdb"
    con = duckdb.connect(str(db), config={"threads": 1})
    spec = load_spec(spec_path).with_overrides(method="nearest_neighbour")
    res = api.run(spec, engine=DuckDBEngine(str(db), connection=con))
    w = con.execute('SELECT w.*, u.trips1 - u.trips0 AS t_trips, u.fare1 - u.fare0 AS t_fare, u.active1 - u.active0 AS t_active FROM sqlmatch.commuter_pass_weighted_units w LEFT JOIN commuter_unit_truth u ON u.rider_id = w.unit_key WHERE w.match__weight IS NOT NULL').df()
    con.close(); shutil.rmtree(folder, ignore_errors=True)
    w = w.astype({"pre_trips": float, "pre_fare": float, "commute_km": float})
    lev = sorted(w.home_district.unique())
    def X(df, kind):
        base = [df.pre_trips, df.pre_fare, df.commute_km]
        if kind in ("dist", "quad_dist", "log_dist"):
            base += [(df.home_district == l).astype(float) for l in lev[1:]]
        if kind in ("quad", "quad_dist"):
            num = [df.pre_trips, df.pre_fare, df.commute_km]
            base += [a * b for i, a in enumerate(num) for b in num[i:]]
        if kind in ("log", "log_dist"):
            base += [np.log1p(df.pre_trips), np.log1p(df.pre_fare), np.log1p(df.commute_km)]
        return np.column_stack([np.ones(len(df))] + [np.asarray(b, float) for b in base])
    t, c = w[w.treated == 1], w[w.treated == 0]
    truth_m = {"post_trips": t.t_trips.mean(), "post_fare": t.t_fare.mean(), "active_last_month": t.t_active.mean()}
    for outcome in ("post_trips", "post_fare", "active_last_month"):
        e = res.effect(outcome)
        raw = t[outcome].mean() - np.average(c[outcome], weights=c.match__weight)
        r = dict(seed=seed, outcome=outcome, se=e.std_error, sql=(e.estimate - truth_m[outcome]) / e.std_error, none=(raw - truth_m[outcome]) / e.std_error)
        for kind in ("linear", "dist", "quad", "quad_dist", "log", "log_dist"):
            Xc, Xt = X(c, kind), X(t, kind)
            sw = np.sqrt(c.match__weight.to_numpy())
            beta, *_ = np.linalg.lstsq(Xc * sw[:, None], c[outcome].to_numpy(float) * sw, rcond=None)
            shift = beta @ (Xt.mean(axis=0) - np.average(Xc, axis=0, weights=c.match__weight))
            r[kind] = (raw - shift - truth_m[outcome]) / e.std_error
        rows.append(r); print(json.dumps({k: (round(v, 2) if isinstance(v, float) else v) for k, v in r.items()}), flush=True)
