"""Commuter process, nearest_neighbour at defaults with and without the Abadie-Imbens (2011) bias
correction, seed for seed: estimate, SE and the expected truth of fare_per_trip, post_fare and
post_trips per run, as JSON lines. Usage: nearest_ratio_correction.py FIRST_SEED END_SEED OUT.jsonl
(benchmark-side; results in RESULTS_nearest_ratio_correction.md)."""
import sys, shutil, json, dataclasses
from pathlib import Path
HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent)); sys.path.insert(0, str(HERE))
import duckdb, numpy as np
from sqlmatch import api
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.spec import load_spec
from commuter_sim import build_commuter
seeds = range(int(sys.argv[1]), int(sys.argv[2]))
out = open(sys.argv[3], "a")
for seed in seeds:
    folder = Path(f"/tmp/nearest_ratio_correction/b{seed}")
    spec_path, truth = build_commuter(folder, units=10000, seed=seed, threads=1)
    db = folder / "commuter.duckdb"
    for bc in (True, False):
        con = duckdb.connect(str(db), config={"threads": 1})
        spec = load_spec(spec_path).with_overrides(method="nearest_neighbour")
        spec = dataclasses.replace(spec, matching=dataclasses.replace(spec.matching, bias_correction=bc))
        res = api.run(spec, engine=DuckDBEngine(str(db), connection=con), keep_tables=False)
        con.close()
        for o in ("fare_per_trip", "post_fare", "post_trips"):
            e = res.effect(o)
            out.write(json.dumps(dict(seed=seed, bc=bc, outcome=o, est=e.estimate, se=e.std_error, truth=truth[o]["expected_att"])) + "\n")
        out.flush()
    shutil.rmtree(folder, ignore_errors=True)
