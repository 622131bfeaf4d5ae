"""unit_measures with the events joined to the unit keys before the GROUP BY (as sqlmatch compiles it) against
the same statement with the GROUP BY first and the join after (as the floor query of scale.py does), on a
warehouse scale.py generated. A one-off comparison: the variant is made by editing the compiled statement's
text (not how sqlmatch builds SQL), each form runs twice, alternated, and the two tables are compared column
by column (equal up to the order of floating-point sums). Results: RESULTS_nearest.md, 2026-12-04 section."""
import sys, time, duckdb, re
sys.path.insert(0, str(__import__('pathlib').Path(__file__).resolve().parents[1]))
from sqlmatch.spec import load_spec
from sqlmatch.plan import build_plan
# usage: unit_measures_join_order.py WORKDIR/SIZE [MEMORY_LIMIT], a folder scale.py --keep left (bikeshare.duckdb, annual_pass.toml)
folder = sys.argv[1].rstrip('/'); limit = sys.argv[2] if len(sys.argv) > 2 else None
size = folder.rsplit('/', 1)[-1]
db = f'{folder}/bikeshare.duckdb'
spec = load_spec(f'{folder}/annual_pass.toml')
plan = build_plan(spec, 'duckdb')
step = plan.step('unit_measures')
(create,) = [s for s in step.statements if s.lstrip().upper().startswith('CREATE TABLE')]
# variant: aggregate the events first (as the floor does), then join the per-unit rows to the keys
a = create.index('), event_totals AS (')
b = create.index('), unknown_units AS (')
body = create[a:b]
i = body.index('  FROM "trips" AS e')
j = body.index('  GROUP BY')
select_part = body[len('), event_totals AS (\n'):i]
select_part = select_part.replace('    MAX(u.treated) AS treated,\n', '').replace('    MAX(u.in_study) AS in_study,\n', '')
where = body[i:j]
where = where.replace('''  LEFT JOIN unit_keys AS u
    ON e."rider_id" = u.unit_key
''', '')
where = re.sub(r'\s*AND /\*.*?\*/ \(\s*u\.in_study = 1 OR u\.unit_key IS NULL\s*\)', '', where, flags=re.S)
new = ('), event_sums AS (\n' + select_part + where + '  GROUP BY\n    e."rider_id"\n'
       '), event_totals AS (\n  SELECT a.*, u.treated, u.in_study\n  FROM event_sums AS a\n  LEFT JOIN unit_keys AS u\n    ON a.unit_key = u.unit_key\n'
       '  WHERE\n    u.in_study = 1 OR u.unit_key IS NULL\n')
variant = create[:a] + new + create[b:]
variant = variant.replace('annual_pass_measures__building', 'annual_pass_measures_variant')
cur = create.replace('annual_pass_measures__building', 'annual_pass_measures_current')
cfg = {'memory_limit': limit} if limit else {}
cfg['temp_directory'] = f'{folder}/unit_measures_spill'
con = duckdb.connect(db, config=cfg)
for name in ('annual_pass_measures_current', 'annual_pass_measures_variant'):
    con.execute(f'DROP TABLE IF EXISTS sqlmatch.{name}')
for rep in range(2):
    for label, sql in (('current', cur), ('variant', variant)) if rep == 0 else (('variant', variant), ('current', cur)):
        con.execute(f'DROP TABLE IF EXISTS sqlmatch.annual_pass_measures_{label}')
        t = time.perf_counter(); con.execute(sql); print(size, limit, label, round(time.perf_counter() - t, 2), flush=True)
cols = [r[0] for r in con.execute("SELECT column_name, data_type FROM information_schema.columns WHERE table_schema='sqlmatch' AND table_name='annual_pass_measures_current'").fetchall()]
types = dict(con.execute("SELECT column_name, data_type FROM information_schema.columns WHERE table_schema='sqlmatch' AND table_name='annual_pass_measures_current'").fetchall())
exprs = []
for c in cols:
    if types[c] == 'DOUBLE':
        exprs.append(f'MAX(ABS(a."{c}" - b."{c}") / GREATEST(1e-300, ABS(a."{c}"))) AS "{c}"')
    else:
        exprs.append(f'SUM(CASE WHEN a."{c}" IS DISTINCT FROM b."{c}" THEN 1 ELSE 0 END) AS "{c}"')
q = 'SELECT COUNT(*) AS n, COUNT(b.unit_key) AS joined, ' + ', '.join(exprs) + ' FROM sqlmatch.annual_pass_measures_current a LEFT JOIN sqlmatch.annual_pass_measures_variant b ON a.unit_key = b.unit_key'
r = con.execute(q).fetchone()
print(dict(zip(['n', 'joined'] + cols, r)))
print('variant rows', con.execute('SELECT COUNT(*) FROM sqlmatch.annual_pass_measures_variant').fetchone()[0])
for name in ('annual_pass_measures_current', 'annual_pass_measures_variant'):
    con.execute(f'DROP TABLE IF EXISTS sqlmatch.{name}')
