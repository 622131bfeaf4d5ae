"""The study's design as the reports state it: what was compared, on which features, with which
cut points, propensity model and caliper, and where the numbers came from (provenance). Plain
data read from the spec, the fitted model and the run's aggregates; no statistics here."""

from __future__ import annotations

import datetime as dt

from sqlmatch.spec import Spec


def study_design(spec: Spec, r: dict, model=None) -> dict:
    """A JSON-ready description of the study and the run (see results.json "design", "provenance")."""
    from sqlmatch.matching import method_for

    m = spec.matching
    method = method_for(m.method)
    design: dict = {
        "treatment": spec.treatment_words,
        "control_pool": spec.control_pool,
        "eligibility": list(spec.filter_texts),
        "features": [_feature(f) for f in spec.features],
        "outcomes": [{"name": o.name, "aggregate": o.aggregate, "kind": o.kind, **({"twin": o.twin} if o.twin else {})} for o in spec.outcomes],
        "method": m.method,
        "method_description": method.description,
        "groups_word": method.groups_word,
    }
    if m.method == "coarsened_exact":
        from sqlmatch.matching.coarsened_exact import CUTS_STEP, SMD_LIMIT, coarsenings

        used = r[CUTS_STEP].one() if CUTS_STEP in r else {}
        design["matched_on"] = [_coarsening(c, used.get(f"{c.feature}__bins"), SMD_LIMIT) for c in coarsenings(spec)]
    elif m.method == "score_bins":
        how = (
            "subclasses chosen from the data: split at the median until the score and the model's numeric features are balanced (computed in the warehouse)"
            if m.bins is None
            else f"{m.bins} subclasses at quantiles of the enrolled units' scores (boundaries computed in the warehouse)"
        )
        design["matched_on"] = [{"feature": "propensity score", "how": how}]
        design["matched_on"] += [{"feature": f, "how": "exact levels"} for f in m.block_on]
        design["common_support"] = m.common_support
    elif m.method == "nearest_neighbour":
        from sqlmatch.matching.nearest_neighbour import distance_features

        distance = "logit propensity score" if m.distance == "score" else f"{m.distance.replace('_', ' ')} distance on {', '.join(distance_features(spec))}"
        design["matched_on"] = [{"feature": "propensity score" if m.distance == "score" else ", ".join(distance_features(spec)), "how": f"nearest {m.controls_per_treated} control(s) on the {distance}"}]
        design["matched_on"] += [{"feature": f, "how": "exact levels"} for f in m.block_on]
        caliper = {"sd": m.caliper}
        row = r["candidate_pairs"].one() if "candidate_pairs" in r else None
        if row is not None and row.get("width") is not None:
            caliper["width"] = float(row["width"])  # in logit units: caliper x the pooled SD of the logit score
        design["caliper"] = caliper
        design["controls_per_treated"] = m.controls_per_treated
        design["reuse_controls"] = m.reuse_controls
        design["bias_correction"] = m.bias_correction and m.reuse_controls
    elif m.method == "entropy_balancing":
        from sqlmatch.matching.entropy_balancing import design_entry, load_fit

        # a scheduled run: the SQL applied the fit kept beside the spec
        design.update(design_entry(spec, r, model if model is not None else load_fit(spec)))
    if method.uses_score:
        if model is None:  # a scheduled run: the SQL applied the model kept beside the spec
            from sqlmatch.propensity import load_model

            model = load_model(spec)
        p = spec.propensity
        design["propensity"] = {
            "features": list(p.features),
            "log1p": list(p.log1p),
            "ridge": p.ridge,
            "sample_controls": p.sample_controls,
            "terms": p.terms,
        }
        if model is not None:
            from sqlmatch.propensity import describe_column

            design["propensity"]["fitted_on"] = model.fitted_on
            design["propensity"]["iterations"] = model.iterations
            design["propensity"]["selection"] = list(model.selection)
            design["propensity"]["coefficients"] = [
                {"term": describe_column(c), "coefficient": float(b)} for c, b in zip(model.columns, model.coefficients)
            ]
    return design


def provenance(spec: Spec, dialect: str, timings: dict | None = None) -> dict:
    """Which sqlmatch, spec and engine produced the numbers, and when."""
    import hashlib

    from sqlmatch import __version__
    from sqlmatch.plan import spec_fingerprint

    raw = spec.source_path.read_bytes() if spec.source_path is not None and spec.source_path.is_file() else None
    return {
        "sqlmatch_version": __version__,
        "spec_file": str(spec.source_path) if spec.source_path is not None else None,
        "spec_sha256": hashlib.sha256(raw).hexdigest() if raw is not None else None,
        "plan_fingerprint": spec_fingerprint(spec),
        "engine": dialect,
        "finished_at": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        # None on the scheduler path: the scheduler ran the SQL, sqlmatch only read its tables
        "sql_seconds": round(sum(timings.values()), 3) if timings else None,
    }


def _feature(f) -> dict:
    out = {"name": f.name, "aggregate": f.aggregate, "categorical": f.categorical}
    if f.measure:
        out["measure"] = f.measure
    if f.attribute:
        out["attribute"] = f.attribute
    if f.expression_text:
        out["expression"] = f.expression_text
    if f.missing:
        out["missing"] = f.missing
    return out


def _coarsening(c, bins_used=None, smd_limit=0.1) -> dict:
    if c.kind == "exact":
        return {"feature": c.feature, "how": "exact levels"}
    if c.kind == "cuts":
        return {"feature": c.feature, "how": "cut points", "cut_points": list(c.cuts)}
    if c.kind == "quantiles":
        used = int(bins_used) if bins_used is not None else c.bins
        if used != c.bins:
            # refined in the warehouse (coarsened_exact_refine): say so, and why
            return {"feature": c.feature, "how": f"{used} equal-count bins (cut points computed in the warehouse; {c.bins} left |SMD| > {smd_limit:g} after matching)", "bins": used}
        return {"feature": c.feature, "how": f"{c.bins} equal-count bins (cut points computed in the warehouse)", "bins": used}
    return {"feature": c.feature, "how": "equal-width bins, Sturges' number (computed in the warehouse)"}
