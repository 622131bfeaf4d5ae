"""Two calibration runs side by side (a script, not a test): the raw JSON files calibration.py
writes (--raw), summarised by its own `summarise`, one markdown row per process, method and
estimate present in both, coverage of the expected and of the matched-treated truth, bias over
the mean SE (against both), SE/SD, before -> after.

    python3 benchmarks/calibration_compare.py BEFORE.json AFTER.json [--label "computed cuts"]
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from calibration import summarise  # noqa: E402


def _f(x, fmt):
    return "n/a" if x is None or (isinstance(x, float) and math.isnan(x)) else format(x, fmt)


def rows(before: dict, after: dict, label: str = "") -> list[str]:
    b = {(s["process"], s["method"], s["row"]): s for s in summarise(before["records"], before["failures"])}
    a = {(s["process"], s["method"], s["row"]): s for s in summarise(after["records"], after["failures"])}
    out = []
    for key in [k for k in a if k in b and "(unmatched)" not in k[2]]:
        x, y = b[key], a[key]
        cells = [key[0], key[1] + (f" ({label})" if label else ""), key[2], f"{x['n']} / {y['n']}"]
        cells.append(f"{_f(x['coverage'], '.3f')} → {_f(y['coverage'], '.3f')}")
        cells.append(f"{_f(x['coverage_matched'], '.3f')} → {_f(y['coverage_matched'], '.3f')}")
        cells.append(f"{_f(x['bias_over_se'], '+.2f')} → {_f(y['bias_over_se'], '+.2f')}")
        bm = lambda s: s["bias_matched"] / s["mean_se"] if s["mean_se"] else math.nan  # noqa: E731
        cells.append(f"{_f(bm(x), '+.2f')} → {_f(bm(y), '+.2f')}")
        cells.append(f"{_f(x['se_over_sd'], '.2f')} → {_f(y['se_over_sd'], '.2f')}")
        cells.append(f"{_f(x['mean_se'], '.4f')} → {_f(y['mean_se'], '.4f')}")
        out.append("| " + " | ".join(cells) + " |")
    return out


HEADER = (
    "| process | method | estimate | seeds (before / after) | coverage (expected) | coverage (matched treated) | bias/SE | bias/SE vs matched | SE/SD | mean SE |\n"
    "|---|---|---|---:|---:|---:|---:|---:|---:|---:|"
)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("before", type=Path)
    parser.add_argument("after", type=Path)
    parser.add_argument("--label", default="")
    args = parser.parse_args(argv)
    load = lambda p: json.loads(p.read_text(encoding="utf-8"))  # noqa: E731
    print(HEADER)
    print("\n".join(rows(load(args.before), load(args.after), args.label)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
