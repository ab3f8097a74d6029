"""metadata.json: what every public column, code, method and threshold means.

Pure: builds a dict from the config, nothing is read or written here. No timestamps, so the same
config gives the same bytes.
"""

from __future__ import annotations

from pipeline import __version__
from pipeline.flags import Status, reason_descriptions
from pipeline.methods import intervals, variance
from pipeline.stages.ingest import REJECT_DESCRIPTIONS

_PROTECTED = (
    "Confidential figures cannot be narrowed down from the published ones below a protection level: "
    "where one could be recovered by subtraction (a parent area minus its other children, or 'all' minus the other "
    "categories), further figures are withheld with it (reason 'complementary'), and an audit by "
    "linear programming proves, before anything is published, that the published figures leave every "
    "confidential figure within a range at least as wide as the protection level (see "
    "'method.disclosure'). The protection level and the thresholds are defaults from common practice; "
    "the office's confidentiality rules and local law decide them.")
# what disclosure.same_persons did with indicators over the same persons, then the audit's edge
_SAME_PERSONS = {
    "together": "Indicators over the same persons print one sample size and weighted base per cell, so they "
                "are protected together: a figure withheld in one of them as confidential or complementary is "
                "withheld in all of them.",
    "apart": "Indicators over the same persons were protected one by one (disclosure.same_persons: apart): a "
             "figure withheld as confidential in one of them may have its sample size and weighted base printed "
             "in another's row, and the audit proves its protection within its own indicator's table only."}
_OUTSIDE = "Figures published outside this release are not part of the audit."

CAUTIONS = [
    "These figures are estimates from a sample and carry sampling error; the interval and the margin "
    "of error describe that error under the survey design, not errors of coverage, non-response or "
    "measurement.",
    "status 'caution' means the figure is printed but imprecise or resting on an approximation that "
    "may not hold; read it with its interval. status 'suppressed' means the figure is withheld, either "
    "because it is too unreliable to print or to protect the confidentiality of respondents.",
    "The reliability thresholds are defaults drawn from common practice. Each office must set them "
    "from its own quality standards before publishing.",
    "The disclosure rules here are a minimum. What may be published is decided by the office's "
    "confidentiality rules and by local law and policy, which take precedence over these defaults.",
]

_NOT_PROTECTED = (
    "Complementary suppression is switched off for this release (disclosure.complementary: false): a "
    "withheld cell may be recoverable by subtraction from published totals (a parent area minus its "
    "other children, or the 'all' category minus the other categories). Review it before making it public.")


def cautions(config) -> list[str]:
    """The cautions of a release, the last one on disclosure control: what it proves and how
    indicators over the same persons were protected, or, switched off, that nothing was."""
    dis = config.disclosure
    if not dis.complementary:
        return CAUTIONS + [_NOT_PROTECTED]
    return CAUTIONS + [f"{_PROTECTED} {_SAME_PERSONS[dis.same_persons]} {_OUTSIDE}"]


def _rounded(config) -> str:
    d = config.disclosure.decimals
    return "" if d is None else f" Rounded to {d} decimal places (halves up) in this file."


def disclosure_text(config) -> dict:
    """What the protect stage does, with the thresholds in force (pipeline.stages.protect)."""
    dis = config.disclosure
    k = dis.min_respondents
    respondents = k if dis.protection.respondents is None else dis.protection.respondents
    out = {
        "primary": f"A cell is withheld when 0 < x < {k} or 0 < n − x < {k} (x sampled persons with the "
                   f"characteristic, n in the base: threshold rule on unweighted counts)"
                   + (f", or when x = 0 or x = n in a cell of fewer than {dis.unanimous_below} persons "
                      "(everyone's answer would be known); both carry the code 'few_respondents'"
                      if dis.unanimous_below else
                      "; a cell where none (or all) of the sampled persons have the characteristic is "
                      "not protected as such (disclosure.unanimous_below is off)") + ".",
        "rounding": (f"Weighted counts and bases are rounded to the nearest {dis.round_counts_to}"
                     if dis.round_counts_to else "Weighted counts and bases are not rounded")
                    + ("; estimates, errors and intervals to " + f"{dis.decimals} decimal places"
                       if dis.decimals is not None else "; estimates are not rounded") + " (halves up).",
    }
    if not dis.complementary:
        out["complementary"] = "Not applied (disclosure.complementary: false); no audit was run."
        return out
    out.update({
        "complementary": "Further cells are withheld (code 'complementary') so that no confidential cell can be "
                         "worked out from the additive relations of the release (a parent area is the sum of "
                         "its children, 'all' the sum of its categories), for the weighted count, the weighted "
                         "base and the sample size alike. They are chosen by a mixed-integer program "
                         f"(HiGHS) that hides as little as possible (cost '{dis.cost}': "
                         + ("each hidden cell counts 2 to the power of its steps above the finest cells, so "
                            "detail is hidden before totals" if dis.cost == "cells" else
                            "the weighted base of each hidden cell") +
                         "), with capacity cuts from the audit until every confidential cell is protected "
                         "(Fischetti & Salazar-González 2000, JASA 95:916; Hundepool et al. 2012, Statistical "
                         f"Disclosure Control, Wiley). After {dis.time_limit_seconds:g} s the program gives way "
                         "to a greedy choice, audited the same way.",
        "protection_level": f"For every confidential cell, the range of values a reader can work out from the "
                            f"published figures of its indicator (and of those over the same persons) must be "
                            f"at least max({dis.protection.relative:g} × the value, "
                            f"{respondents} × the cell's mean weight) wide for the weighted count of the side "
                            f"with fewer than {k} respondents (with, or without, the characteristic)"
                            + (" or, under the unanimous rule, with none" if dis.unanimous_below else "")
                            + f", and at least {respondents} wide for the sample size (common practice; set by "
                              "the office).",
        "audit": "Audited: the weighted count with the characteristic, the weighted count without it (base − "
                 "count) and the sample size, each over its own additive table. Before publication, linear "
                 "programs (HiGHS) take the reader's view: every "
                 "relation holds, published counts lie within their rounding intervals (narrowed by the "
                 "printed estimate), sample sizes are exact, withheld figures are at least 0 and at most the "
                 "grand total, and what reason codes say about a withheld cell's sample size holds. For every "
                 "confidential cell they prove a range at least as wide as the protection level; if any falls "
                 "short the release is refused and nothing is published.",
    })
    return out


def column_descriptions(config, domain_names) -> dict[str, str]:
    est = config.estimation
    cols = {
        "indicator": "Indicator name (see 'indicators').",
        "geo_level": f"Geography level: one of {', '.join(config.level_names)}.",
        "geo_code": "Code of the geographic unit at that level.",
        "geo_name": "Name of the geographic unit.",
    }
    for name in domain_names:
        cols[name] = f"Category of domain '{name}', or 'all' for every category together."
    cols.update({
        "estimate": "Estimated proportion, in [0, 1]: weighted count / weighted base." + _rounded(config),
        "std_error": "Standard error of the estimate under the survey design (see 'method.variance')."
                     + _rounded(config),
        "ci_lower": f"Lower bound of the {est.confidence:.0%} confidence interval (see 'method.interval')."
                    + _rounded(config),
        "ci_upper": f"Upper bound of the {est.confidence:.0%} confidence interval." + _rounded(config),
        "margin_of_error": f"Margin of error at {est.margin_confidence:.0%} confidence: z × standard error."
                           + _rounded(config),
        "cv": "Coefficient of variation: standard error / estimate (empty when the estimate is 0)." + _rounded(config),
        "sample_size": "Unweighted number of sampled records in the base (the denominator).",
        "weighted_base": "Estimated population in the base (sum of weights)"
                         + (f", rounded to the nearest {config.disclosure.round_counts_to}."
                            if config.disclosure.round_counts_to else "."),
        "weighted_count": "Estimated population with the characteristic (sum of weights)"
                          + (f", rounded to the nearest {config.disclosure.round_counts_to}."
                             if config.disclosure.round_counts_to else "."),
        "design_effect": "Design effect: design variance / (p̂q̂/n)." + _rounded(config),
        "effective_n": "Effective sample size: p̂q̂ / design variance, at most the sample size." + _rounded(config),
        "status": "published, caution or suppressed (see 'status_codes').",
        "reasons": "';'-separated reason codes (see 'reason_codes'); empty when none applies.",
        "note": "Footnote for a reader, explaining the reason codes.",
    })
    return cols


def _variance_text(config) -> str:
    design = config.design
    if design.variance == "simple_random":
        return ("p̂q̂/n (simple random sampling), times the finite population correction (1 − n/N) where "
                "the geography lookup gives the population N and the sample exceeds 10% of it (common "
                "practice); N is known only for cells whose domains are all 'all', and for an indicator "
                "with a narrower universe it is an upper bound, so the correction is conservative")
    if design.variance == "kish":
        return "p̂q̂/n_eff with n_eff = (Σw)²/Σw² (Kish 1992, J. Official Statistics 8:183)"
    if design.variance == "linearization":
        return _linearization_text(design.linearization)
    reps = design.replicates
    return (f"Replicate weights {reps.prefix}1..{reps.prefix}{reps.count}, method {reps.method}: "
            f"{variance.REPLICATE_DESCRIPTIONS[reps.method]}")


def _degrees_of_freedom_text(config) -> str:
    design = config.design
    if design.degrees_of_freedom is not None:
        return f"{design.degrees_of_freedom}, as set in design.degrees_of_freedom"
    return {"simple_random": "n − 1", "kish": "n − 1",
            "replicate": "R − 1 (number of replicates minus one; common practice)",
            "linearization": "per cell, the clusters minus the strata that hold records of the cell's base "
                             "(at least 1)"}[design.variance]


def _linearization_text(lin) -> str:
    strata = f"strata {lin.strata!r}" if lin.strata else "one stratum (no strata given)"
    fpc = (f"f_h = n_h/N_h with N_h from column {lin.population_clusters!r} (first-stage finite population "
           "correction)" if lin.population_clusters else "f_h = 0 (no finite population correction)")
    return ("Taylor linearization (Woodruff 1971, JASA 66:411; Binder 1983, Int. Statistical Review 51:279): "
            "u_i = w_i (y_i − p̂)/Σw for records in the cell's base and 0 for every other record, summed to "
            "cluster totals u_hi; v = Σ_h (1 − f_h) · n_h/(n_h − 1) · Σ_i (u_hi − ū_h)², clusters treated as "
            f"drawn with replacement within strata. Design: {strata}, clusters {lin.clusters!r}, {fpc}. "
            "n_h counts the sampled clusters of stratum h in the whole sample (clusters with at least one "
            "accepted record); domains keep every cluster, the data are never subset. Strata with one "
            f"sampled cluster ({lin.single_cluster_strata}): "
            f"{variance.SINGLE_CLUSTER_DESCRIPTIONS[lin.single_cluster_strata]}.")


def build_metadata(config, domain_names) -> dict:
    s = config.settings
    rel, dis, est = s.reliability, s.disclosure, s.estimation
    design = s.design
    variance_text = _variance_text(config)
    return {
        "release": {"name": s.release.name, "title": s.release.title, "publisher": s.release.publisher,
                    "description": s.release.description.strip()},
        "produced_by": {"software": "ratebook", "version": __version__},
        "cautions": cautions(config),
        "columns": column_descriptions(config, domain_names),
        "status_codes": {
            Status.PUBLISHED.value: "Printed without reservation.",
            Status.CAUTION.value: "Printed, to be read with care (see reasons).",
            Status.SUPPRESSED.value: "Withheld: every figure column is empty (see reasons).",
        },
        "reason_codes": reason_descriptions(config),
        "method": {
            "estimate": "p̂ = Σw·y / Σw over the records of the base (ratio estimator).",
            "variance": variance_text,
            "weight": design.weight,
            "degrees_of_freedom": _degrees_of_freedom_text(config),
            "interval": {"name": est.interval, "confidence": est.confidence,
                         "description": intervals.METHOD_DESCRIPTIONS[est.interval],
                         "sample_size_used": "effective sample size (equal to the sample size under simple random sampling)"},
            "margin_of_error": {"confidence": est.margin_confidence,
                                "description": "z × standard error with z = Φ⁻¹(1 − α/2)"},
            "item_nonresponse": "A record in an indicator's universe whose condition columns are missing "
                                "leaves that indicator's base (it is not counted as 'no').",
            "disclosure": disclosure_text(config),
            # every method a config may choose, so a reader can compare with what this release used
            "available_intervals": dict(intervals.METHOD_DESCRIPTIONS),
            "available_replicate_methods": dict(variance.REPLICATE_DESCRIPTIONS),
        },
        "thresholds": {
            "reliability": rel.model_dump() if rel.standard == "custom" else {
                "standard": "nchs_2017",
                "description": "NCHS Data Presentation Standards for Proportions (Parker et al. 2017, Vital "
                               "Health Stat 2(175)): Korn–Graubard 95% interval; withheld when the effective "
                               "sample size is under 30, the interval is 30 points wide or more, or wider than "
                               "5 points and more than 130% of the estimate; flagged for review when the "
                               "degrees of freedom are under 8 or the estimate is 0 or 1."},
            "disclosure": dis.model_dump(),
        },
        "indicators": {name: ind.model_dump() for name, ind in s.indicators.items()},
        "domains": {name: dom.model_dump(exclude_none=True) for name, dom in s.domains.items()},
        "tables": [t.model_dump() for t in s.tables],
        "geography_levels": config.level_names,
        "reject_codes": {r.value: text for r, text in REJECT_DESCRIPTIONS.items()},
    }
