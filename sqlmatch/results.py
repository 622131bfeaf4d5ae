"""Results as dataclasses. JSON, Markdown and HTML are renderings of these (see report/)."""

from __future__ import annotations

import html
import json
import math
from dataclasses import asdict, dataclass, field

from sqlmatch.privacy import count_text, flow_texts, hidden_parts, sample_flow, suppress_counts as _suppress_counts, suppress_histograms, suppress_levels

ASSUMPTIONS = (
    "No unmeasured confounding: after matching on the listed features, enrolment is as good as random. "
    "Anything that drives both enrolment and the outcome and is not among the features biases the estimate; "
    "the sensitivity figures say how strong such a factor would have to be.",
    "Overlap: every enrolled unit has comparable non-enrolled units. Enrolled units without a match are dropped, "
    "so the estimate describes the matched enrolled units only.",
    "No interference: one unit's enrolment does not change another unit's outcome.",
    "The windows are fixed in advance: features come strictly before the enrolment month and outcomes strictly after it; "
    "other window choices can give other answers.",
    "What the intervals are for: the average effect on the enrolled units this study kept, given their features "
    "(how enrolment changes their expected outcomes). The realised difference in this cohort's outcomes also varies "
    "by chance around that average, and other enrolees have other features: as an interval for either, it can be "
    "too narrow, most of all for a 0/1 outcome close to 0 or 1 or an effect that differs much between units.",
    "These figures inform, and do not replace, judgement about the programme.",
)


#: What each kind of warning is about: `sqlmatch run --fail-on KIND,...` exits 1 on those kinds.
WARNING_KINDS = {
    "coverage": "the events do not cover the windows, or belong to units missing from the units table",
    "balance": "a feature still differs between the groups after matching: |SMD| above 0.1",
    "kept": "matching kept under 90% of the enrolled units, so the effect describes the kept ones only",
    "design": "a choice of the study's design that changes what the effect means (a post window opening in the cohort month)",
    "placebo": "the placebo check ([placebo]) found an effect where there can be none",
    "model": "the stored propensity model no longer fits the units it scores",
    "method": "a caution of the matching method, such as controls reused by nearest neighbours",
    "missing": "what a missing-value policy did to units without a value",
    "features": "a feature that carries no information: NULL or constant for every unit",
}


class Caution(str):
    """A warning's text (it is a str, so reports and tests read it as one) with its kind, one of
    WARNING_KINDS."""

    kind: str

    def __new__(cls, text: str, kind: str):
        if kind not in WARNING_KINDS:
            raise ValueError(f"unknown warning kind {kind!r}")
        self = super().__new__(cls, text)
        self.kind = kind
        return self

    def __reduce__(self):
        return (Caution, (str(self), self.kind))


def warning_kind(text: str) -> str | None:
    return getattr(text, "kind", None)


def _num(x):
    """JSON-safe number: NaN and infinities become null (inside dicts and lists too)."""
    if x is None:
        return None
    if isinstance(x, dict):
        return {k: _num(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_num(v) for v in x]
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def _short(x: float | None) -> str:
    """A number for a one-line summary: 4 significant digits; "–" when missing or not finite."""
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "–"
    return f"{x:.4g}"


@dataclass(frozen=True)
class Interval:
    """A point estimate with its standard error and 95% interval (None where undefined)."""

    estimate: float | None
    std_error: float | None = None
    ci_low: float | None = None
    ci_high: float | None = None


@dataclass(frozen=True)
class Effect:
    outcome: str
    kind: str  # continuous | binary | ratio
    estimator: str
    estimate: float
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    n_treated: int
    n_control: int
    mean_treated: float | None
    mean_control: float | None
    # whose effect: att on the enrolled (treated), atc on the comparison units, ate on everyone in
    # the matched strata ([matching] estimand)
    estimand: str = "att"
    # the same comparison before matching
    naive: Interval = Interval(None)
    # relative lift: effect / comparison mean (= mean_treated / mean_control - 1); binary: RR - 1
    lift: Interval = Interval(None)
    # binary outcomes: risk ratio p_1 / p_0 (the risk difference is `estimate`)
    risk_ratio: Interval | None = None
    # the matched comparison adjusted by a within-stratum regression on the numeric features
    # (count, sum and 0/1 outcomes); the headline when [effect] regression_adjustment = true, and
    # then `unadjusted` holds the plain matched comparison
    adjusted: Interval | None = None
    adjusted_for: tuple[str, ...] = ()
    unadjusted: Interval | None = None
    # difference-in-differences: effect on (outcome - did_twin), the twin a pre-window feature
    did_twin: str | None = None
    did: Interval | None = None
    # e_value, e_value_ci, robustness_value, robustness_value_alpha, partial_r2, t_statistic, df,
    # rosenbaum (+ rosenbaum_reason when null), sentence, and what they were computed from
    sensitivity: dict = field(default_factory=dict)


# the Effect fields that hold an Interval (flattened to `<field>.<part>` columns in effects_frame)
INTERVAL_FIELDS = ("naive", "lift", "risk_ratio", "adjusted", "unadjusted", "did")


@dataclass(frozen=True)
class BalanceRow:
    covariate: str
    kind: str  # numeric | binary | level
    mean_treated_before: float | None
    mean_control_before: float | None
    smd_before: float | None
    variance_ratio_before: float | None
    mean_treated_after: float | None
    mean_control_after: float | None
    smd_after: float | None
    variance_ratio_after: float | None


@dataclass(frozen=True)
class MatchingSummary:
    method: str
    n_treated: int
    n_treated_matched: int
    n_control: int
    n_control_matched: int
    strata: int
    strata_dropped: int
    n_treated_outside_support: int = 0
    n_control_outside_support: int = 0
    # weighting methods: Kish's effective numbers of weighted units, (sum w)^2 / sum w^2, per group
    effective_controls: float | None = None
    effective_treated: float | None = None
    # weighting methods: the weights' mean and range over every weighted unit (both groups)
    weight_mean: float | None = None
    weight_min: float | None = None
    weight_max: float | None = None
    stabilised_weights: bool = False


@dataclass(frozen=True)
class SubgroupLevel:
    level: str
    n_treated: int
    n_control: int
    effect: Interval
    withheld: bool = False  # too few units to show (report.min_cell_size)


@dataclass(frozen=True)
class SubgroupEffects:
    """One outcome's effect in each level of one subgroup, and a test of equal effects across the levels."""

    subgroup: str
    describes: str
    outcome: str
    levels: tuple[SubgroupLevel, ...]
    q: float | None = None
    df: int | None = None
    p_value: float | None = None
    # Cochran's Q (independent levels); weighting: the Wald statistic with the levels' shared-score covariance
    test: str = "Cochran's Q"

    def shown(self, min_cell: int) -> list[dict]:
        """The levels as outputs show them: a level's counts and effect withheld when either group
        is small, and (complementary suppression) one more level's when exactly one is withheld,
        so the levels cannot be subtracted from the matched totals."""
        hidden: set[str] = set()
        for group in ("n_treated", "n_control"):
            parts = {x.level: getattr(x, group) for x in self.levels}
            hidden |= hidden_parts(parts, sum(parts.values()), min_cell)
        hidden |= {x.level for x in self.levels if x.withheld}
        if len(hidden) == 1 and len(self.levels) > 1:
            rest = sorted((x.n_treated, x.level) for x in self.levels if x.level not in hidden)
            if rest:
                hidden.add(rest[0][1])
        out = []
        for x in self.levels:
            if x.level in hidden:
                out.append({"level": x.level, "n_treated": None, "n_control": None, **{k: None for k in asdict(x.effect)}, "withheld": True})
            else:
                out.append({"level": x.level, "n_treated": x.n_treated, "n_control": x.n_control, **{k: _num(v) for k, v in asdict(x.effect).items()}, "withheld": False})
        return out

    def to_dict(self, min_cell: int) -> dict:
        levels = self.shown(min_cell)
        return {"subgroup": self.subgroup, "describes": self.describes, "outcome": self.outcome, "levels": levels,
                "heterogeneity": {"test": self.test, "q": _num(self.q), "df": self.df, "p_value": _num(self.p_value)}}


@dataclass(frozen=True)
class PlaceboCheck:
    """The same design placed `months_before` earlier ([placebo]): the cohort is still the treated
    group, but every window it reads ends before anyone in it enrolled, so each true effect is zero."""

    months_before: int
    results: "StudyResults"  # the placebo study's own results (its tables are <study>_placebo_*)

    def readings(self) -> list[str]:
        out = []
        for e in self.results.effects:
            if e.ci_low is None or e.ci_high is None:
                out.append(f"{e.outcome}: {e.estimate:.3g}, no interval.")
            elif e.ci_low <= 0.0 <= e.ci_high:
                out.append(f"{e.outcome}: {e.estimate:.3g} [{e.ci_low:.3g}, {e.ci_high:.3g}]: no effect where there can be none, as it should be.")
            else:
                out.append(
                    f"{e.outcome}: {e.estimate:.3g} [{e.ci_low:.3g}, {e.ci_high:.3g}]: an effect where there can be none. Before "
                    "enrolling, the enrolled units already differed from their matched comparison units in a way the features do "
                    "not capture; the same difference may be in the main estimate. (With several outcomes, one interval in "
                    "twenty misses zero by chance.)"
                )
        return out

    def to_dict(self) -> dict:
        r = self.results
        return {
            "months_before": self.months_before,
            "windows": r.windows,
            "effects": [{k: r._effect_record(e)[k] for k in ("outcome", "estimate", "std_error", "ci_low", "ci_high")} for e in r.effects],
            "matching": r._matching_dict(),
            "warnings": list(r.warnings),
            "readings": self.readings(),
        }


@dataclass
class StudyResults:
    study: str
    cohort: str
    dialect: str
    windows: dict
    matching: MatchingSummary
    balance: list[BalanceRow]
    effects: list[Effect]
    rows_fetched: int
    min_cell_size: int
    imbalance: dict | None = None  # multivariate L1 before/after matching (Iacus, King & Porro)
    histograms: dict | None = None  # binned feature and score distributions by group, for plots
    assumptions: tuple[str, ...] = ASSUMPTIONS
    demo_truth: dict[str, float] | None = None
    run_id: str | None = None  # set when the run was recorded in the results history table
    warnings: list[str] = field(default_factory=list)  # data problems worth a reader's attention
    timings: dict[str, float] = field(default_factory=dict)
    design: dict | None = None  # what was compared and how (sqlmatch.design.study_design)
    provenance: dict | None = None  # sqlmatch version, spec hash, plan fingerprint, engine, time
    placebo: PlaceboCheck | None = None  # [placebo]: the same design before anyone enrolled
    subgroups: list[SubgroupEffects] = field(default_factory=list)  # [[subgroups]]

    def effect(self, outcome: str) -> Effect:
        for e in self.effects:
            if e.outcome == outcome:
                return e
        raise KeyError(f"no outcome {outcome!r}; the outcomes are: {', '.join(e.outcome for e in self.effects) or '(none)'}")

    def effects_frame(self):
        """One row per outcome (the Effect fields but sensitivity; nested figures as columns such
        as `lift.ci_low`), as in results.json: counts below min_cell_size are missing."""
        import pandas as pd

        interval_fields = list(Interval.__dataclass_fields__)
        columns = []
        for f in Effect.__dataclass_fields__:
            if f in INTERVAL_FIELDS:
                columns += [f"{f}.{g}" for g in interval_fields]
            elif f != "sensitivity":
                columns.append(f)
        rows = []
        for e in self.effects:
            record = self._effect_record(e)
            flat = {}
            for k, v in record.items():
                if k in INTERVAL_FIELDS:
                    flat.update({f"{k}.{g}": (v or {}).get(g) for g in interval_fields})
                elif k != "sensitivity":
                    flat[k] = v
            rows.append(flat)
        return pd.DataFrame(rows, columns=columns)

    def balance_frame(self):
        """One row per covariate (or level), the BalanceRow fields, as in results.json."""
        import pandas as pd

        rows = [{k: _num(v) for k, v in asdict(b).items()} for b in suppress_levels(self.balance, self.matching, self.min_cell_size)]
        return pd.DataFrame(rows, columns=list(BalanceRow.__dataclass_fields__))

    def _effect_record(self, e: Effect) -> dict:
        return _suppress_counts({k: _num(v) for k, v in asdict(e).items()}, self.min_cell_size)

    def _flow_text(self, group: str, row: str) -> str:
        """A count of the matching summary as the reports show it (small or revealing ones withheld)."""
        return flow_texts(self.matching, self.min_cell_size)[group][row]

    def __repr__(self) -> str:
        m, f = self.matching, self._flow_text
        lines = [
            f"StudyResults: study {self.study!r}, cohort {self.cohort}, method {m.method}",
            f"  matched: {f('treated', 'matched')} of {f('treated', 'in_study')} enrolled, "
            f"{f('control', 'matched')} of {f('control', 'in_study')} comparison units",
        ]
        for e in self.effects:
            lines.append(f"  {e.outcome}: {_short(e.estimate)} (95% interval {_short(e.ci_low)} to {_short(e.ci_high)})")
        if self.warnings:
            lines.append(f"  {len(self.warnings)} warning(s): see .warnings")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        m, esc, cell = self.matching, html.escape, self.min_cell_size
        head = (
            f"<p><b>{esc(self.study)}</b>, cohort {esc(self.cohort)}, method {esc(m.method)}: "
            f"{esc(self._flow_text('treated', 'matched'))} of {esc(self._flow_text('treated', 'in_study'))} enrolled matched</p>"
        )
        header = "".join(f"<th>{esc(h)}</th>" for h in ("outcome", "kind", "effect", "95% interval", "enrolled", "comparison"))
        body = "".join(
            "<tr>"
            + "".join(
                f"<td>{esc(v)}</td>"
                for v in (
                    e.outcome,
                    e.kind,
                    _short(e.estimate),
                    f"{_short(e.ci_low)} to {_short(e.ci_high)}",
                    count_text(e.n_treated, cell),
                    count_text(e.n_control, cell),
                )
            )
            + "</tr>"
            for e in self.effects
        )
        return f"<div>{head}<table><thead><tr>{header}</tr></thead><tbody>{body}</tbody></table></div>"

    def to_dict(self) -> dict:
        out = {
            "study": self.study,
            "cohort": self.cohort,
            "dialect": self.dialect,
            "windows": self.windows,
            "matching": self._matching_dict(),
            "balance": [{k: _num(v) for k, v in asdict(b).items()} for b in suppress_levels(self.balance, self.matching, self.min_cell_size)],
            "imbalance": self.imbalance,
            "histograms": suppress_histograms(self.histograms, self.min_cell_size),
            "effects": [self._effect_record(e) for e in self.effects],
            "warnings": [str(w) for w in self.warnings],
            "warning_kinds": [warning_kind(w) for w in self.warnings],
            "rows_fetched": self.rows_fetched,
            "min_cell_size": self.min_cell_size,
            "assumptions": list(self.assumptions),
            "design": self.design,
            "provenance": self.provenance,
        }
        if self.demo_truth is not None:
            out["demo_truth"] = self.demo_truth
        if self.placebo is not None:
            out["placebo"] = self.placebo.to_dict()
        if self.subgroups:
            out["subgroups"] = [s.to_dict(self.min_cell_size) for s in self.subgroups]
        return out

    def _matching_dict(self) -> dict:
        """The matching summary with every small count, and any count that would reveal one by
        subtraction, withheld (privacy.sample_flow)."""
        out = _suppress_counts(asdict(self.matching), self.min_cell_size)
        flow = sample_flow(self.matching, self.min_cell_size)
        for group, rows in flow.items():
            out[f"n_{group}"] = rows["in_study"]
            out[f"n_{group}_matched"] = rows["matched"]
            out[f"n_{group}_outside_support"] = rows["outside_support"]
            out[f"n_{group}_no_comparable"] = rows["no_comparable"]
        return out

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2) + "\n"
