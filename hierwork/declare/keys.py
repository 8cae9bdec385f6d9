"""The spec's keys: one table (``SPEC_KEYS``) of types, defaults, ranges and one-line docs.

Loading (:mod:`hierwork.declare.spec`), the JSON Schema for editors and the
README's key reference (:mod:`hierwork.declare.schema`) are all derived from
it, so they cannot drift apart.
"""
from __future__ import annotations

import re
from dataclasses import dataclass

from hierwork.declare.remedies import parse_policy
from hierwork.declare.variants import parse_variants
from hierwork.plan.families import FAMILY_NAMES

FORMAT = "hierwork/1"
REQUIRED = object()
PARAMETERISATIONS = ("auto", "centred", "non_centred", "partial")
_SLUG = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]*\Z")


@dataclass(frozen=True)
class Key:
    """One entry of the spec's key table.

    ``kind`` is one of ``str int float bool choice list section named prior
    predictor reference batch``; ``section`` has fixed ``fields`` (a section
    whose default is None stays None when absent); ``named`` maps user-chosen
    names to values of schema ``item``; ``list`` holds items of schema ``item``;
    ``reference`` is text or a number, kept as written;
    ``batch`` values are validated by ``check(value, where)`` (variants and remedies parsers).
    """

    kind: str
    doc: str
    default: object = REQUIRED
    choices: tuple = ()
    low: float | None = None
    high: float | None = None
    open_low: bool = False
    open_high: bool = False
    pattern: re.Pattern | None = None
    fields: dict | None = None
    item: "Key | None" = None
    check: object = None


COLUMN_KEYS = {
    "column": Key("str", "Column name."),
    "type": Key("choice", "How the column enters: numeric as given, or categorical (treatment coding).",
                "auto", choices=("auto", "numeric", "categorical")),
    "reference": Key("str", "Reference level of a categorical predictor (default: the first in sort order).",
                     None),
    "transform": Key("choice", "Numeric predictors: enter as log(column) (values > 0), sqrt(column) "
                     "(values >= 0) or standardised(column) ((x - mean) / SD of the fitted data).", None,
                     choices=("log", "sqrt", "standardise")),
}

PREDICTOR_KEYS = {
    **COLUMN_KEYS,
    "column": Key("str", "Column name (required unless the entry is an 'interaction').", None),
    "interaction": Key("list", "Instead of 'column': two or more predictor columns (each listed in "
                       "'predictors') whose terms are multiplied, numeric or categorical; terms are "
                       "named a:b (engine_hours:sea_state=rough).", None, item=Key("str", "a predictor column")),
}

FACTOR_KEYS = {
    "column": Key("str", "Column holding the group labels (default: the factor's name).", None),
    "varying": Key("list", "Terms that vary by group: 'intercept' and numeric predictors (slopes).",
                   ["intercept"], item=Key("str", "a term")),
    "predictors": Key("list", "Group-level predictors: columns constant within each group, numeric "
                      "or categorical (dummy-coded against a reference level, as population predictors).",
                      [], item=Key("predictor", "a column name, or {column, type, reference, transform}",
                                   fields=COLUMN_KEYS)),
    "within": Key("str", "Name of the factor this one is nested in (labels repeat across parents).", None),
    "parameterisation": Key("choice", "How the group effects are sampled; 'partial': each group weighted by "
                            "how informative its data are; 'auto' decides from the data.",
                            "auto", choices=PARAMETERISATIONS),
    "spread": Key("choice", "Residual SD: one for all rows ('fixed'), or each group its own ('varying'; "
                  "normal and Student-t outcomes), partially pooled on the log scale.", "fixed",
                  choices=("fixed", "varying")),
}

SPEC_KEYS = {
    "format": Key("choice", "Spec format version; lets later versions migrate old files.",
                  choices=(FORMAT,)),
    "name": Key("str", "Slug naming the run: letters, digits, '-', '_'.", pattern=_SLUG),
    "title": Key("str", "Human title shown in reports.", None),
    "data": Key("str", "CSV or Parquet file, relative to the spec file."),
    "outcome": Key("section", "The outcome and its family.", fields={
        "column": Key("str", "Outcome column."),
        "family": Key("choice", "Likelihood family (link: identity, logit or log; README, \"Families\").", "normal",
                      choices=FAMILY_NAMES),
        "trials": Key("str", "binomial / beta_binomial: column with the number of trials.", None),
        "exposure": Key("str", "poisson / negative_binomial / zero_inflated_poisson: column of exposures (log offset).", None),
        "known_sd": Key("str", "normal: column of known per-row standard errors (meta-analysis).", None),
        "levels": Key("list", "ordinal: the outcome's levels from lowest to highest (labels or scores); "
                      "default: the whole numbers from the smallest to the largest observed score.", None,
                      item=Key("str", "a level")),
    }),
    "missing": Key("choice", "Rows with a missing value in a column the model uses: 'error' stops with "
                   "a message naming them; 'drop' removes them (check, plan.json and the report "
                   "count the rows removed per column).", "error", choices=("error", "drop")),
    "predictors": Key("list", "Population-level terms shared by all groups.", [],
                      item=Key("predictor", "a column name, or {column, type, reference}",
                               fields=PREDICTOR_KEYS)),
    "groups": Key("named", "Grouping factors, one entry each, keyed by the factor's name.",
                  item=Key("section", "a grouping factor", fields=FACTOR_KEYS)),
    "priors": Key("named", "Priors by parameter name; unset ones get documented defaults.", {},
                  item=Key("prior", "{distribution: {parameter: value}}")),
    "sampling": Key("section", "Sampler settings.", {}, fields={
        "chains": Key("int", "Number of chains.", 4, low=1, high=64),
        "warmup": Key("int", "Warm-up (tuning) iterations per chain.", 1000, low=50),
        "draws": Key("int", "Kept draws per chain.", 1000, low=50),
        "target_accept": Key("float", "NUTS target acceptance rate.", 0.9, low=0.5, high=1.0,
                             open_high=True),
        "max_treedepth": Key("int", "NUTS maximum tree depth.", 10, low=4, high=15),
        "seed": Key("int", "Random seed: the same seed gives the same numbers.", 20261202, low=0),
        "cores": Key("int", "Processes for chains (default: chains, at most the CPU count).", None, low=1),
        "engine": Key("choice", "NUTS implementation: PyMC's own, nutpie, or 'auto': the one predicted to "
                      "sample faster (compile plus leapfrog steps x gradient cost; check prints both).",
                      "auto", choices=("auto", "pymc", "nutpie")),
        "path": Key("choice", "Likelihood form: collapsed (normal, effects integrated out), semi_collapsed (normal, "
                    "the factor with most groups integrated out, the others sampled), reduced (per "
                    "cell: sufficient statistics for normal, summed identical rows for bernoulli, binomial "
                    "and poisson), or per-row; 'auto' takes the fastest exact one that applies "
                    "(docs/fast-path.md).",
                    "auto", choices=("auto", "collapsed", "semi_collapsed", "reduced", "plain")),
    }),
    "gate": Key("section", "Convergence checks that must pass before results count.", {}, fields={
        "r_hat_max": Key("float", "Largest rank-normalised split R-hat allowed.", 1.01, low=1.0),
        "ess_bulk_min": Key("float", "Smallest bulk effective sample size allowed.", 400, low=0),
        "ess_tail_min": Key("float", "Smallest tail effective sample size allowed.", 400, low=0),
        "divergences_max": Key("int", "Most divergent transitions allowed.", 0, low=0),
        "bfmi_min": Key("float", "Smallest E-BFMI of any chain.", 0.3, low=0),
        "treedepth_share_max": Key("float", "Largest share of draws that hit the maximum tree depth.",
                                   0.05, low=0, high=1),
    }),
    "estimates": Key("section", "How estimates are summarised.", {}, fields={
        "interval": Key("float", "Probability of the central interval reported (lower, upper).", 0.94,
                        low=0.5, high=1.0, open_high=True),
        "compare_pooling": Key("bool", "Also fit complete and no pooling and compare all three by PSIS-LOO "
                               "(pooling_comparison.csv; two more small fits).", False),
        "at": Key("named", "Reference values at which groups are compared, by predictor: 'mean' (of the "
                  "data), 'zero', a number, or a level of a categorical predictor (default: 'mean' for "
                  "numeric predictors, the reference level for categorical ones).", {},
                  item=Key("reference", "mean, zero, a number or a level")),
        "rate_per": Key("float", "Counts (poisson, negative_binomial, zero_inflated_poisson): rates are per "
                        "this many units of exposure (e.g. 1000 for a rate per 1,000 hours).", 1.0, low=0,
                        open_low=True),
        "target": Key("section", "A value on the outcome's scale to judge groups against: "
                      "p_beyond_target per group.", None, fields={
                          "value": Key("float", "The target (a probability, a rate per rate_per, or the "
                                       "outcome's units)."),
                          "direction": Key("choice", "Which side of the value is beyond the target.", "above",
                                           choices=("above", "below")),
                      }),
        "rank_k": Key("int", "p_top and p_bottom: probability of being among the k highest or lowest groups.",
                      3, low=1),
        "contrasts": Key("list", "Pairs of groups to compare on the outcome's scale (contrasts.csv).", [],
                         item=Key("section", "a pair of groups of one factor", fields={
                             "factor": Key("str", "The grouping factor (a name under 'groups')."),
                             "groups": Key("list", "Two group labels [A, B]: the difference is A - B.",
                                           item=Key("str", "a group label")),
                         })),
    }),
    # -- batch keys (owned by hierwork/batch, see docs/batch.md; 'fit' ignores them) --
    "variants": Key("batch", "Named variants ([{name, set: {dotted.key: value}}]) or a cartesian "
                    "{sweep: {dotted.key: [values]}} that 'hierwork batch' runs as separate jobs.", None,
                    check=parse_variants),
    "remedies": Key("batch", "Retry policy when a batch job fails its gate: true (default steps), false "
                    "(no retries) or {max_attempts, steps}.", None, check=parse_policy),
}


