"""Reported numbers -> an estimate ``y`` and standard error ``se`` on the analysis scale.

An extraction-sheet row fills one *reported form* (a set of numeric columns). The table
``_FORMS`` below says, for each form, which columns it needs, which measures it can give and
which function computes it; ``derive`` finds the one complete form in a row, validates it
and computes. Every formula and its source is in the docstring of the function that computes
it. Arm a is the experimental arm and b the comparator: ratios are a over b, differences a
minus b.

Zero cells (common practice, Cochrane Handbook v6 §10.4.4.2, recalled): 0.5 is added to every
cell of a 2x2 table with a zero cell, to events and non-events of a proportion with no events
or no non-events, to the events of a rate with none, and to the events of both arms of a rate
ratio when either arm has none. ``Derived.corrections`` says when this was done.

Stdlib only (``statistics.NormalDist`` for normal quantiles), so that the CLI starts quickly.
"""

from __future__ import annotations

import functools
import itertools
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from statistics import NormalDist

from registry.errors import ConversionError
from registry.values.measures import MEASURES as _TABLE
from registry.values.measures import NAMES, Measure
from registry.values.scales import analysis_slope, domain, in_domain, to_analysis

# A snapshot for readers; the functions below read the measure table itself, so that a row
# added to it is served at once.
ANALYSIS_SCALE: dict[str, str] = {name: m.scale for name, m in _TABLE.items()}
MEASURES: tuple[str, ...] = NAMES

NUMERIC_FIELDS: tuple[str, ...] = (
    "estimate", "lower", "upper", "level", "se", "p",
    "events", "total", "exposure",
    "events_a", "total_a", "events_b", "total_b", "exposure_a", "exposure_b",
    "mean_a", "sd_a", "n_a", "mean_b", "sd_b", "n_b",
    "mean", "sd", "n",
    "median", "q1", "q3", "min", "max",
    "r",
)  # fmt: skip

_DEFAULT_LEVEL = 0.95
_STANDARD_NORMAL = NormalDist()
_CHINN = math.sqrt(3.0) / math.pi  # d = ln(OR) * sqrt(3)/pi  (Chinn 2000)


@dataclass(frozen=True)
class Derived:
    """An estimate on the analysis scale with its standard error and how it was obtained."""

    y: float
    se: float
    scale: str
    conversion: str
    corrections: tuple[str, ...] = ()


# ---------------------------------------------------------------------------------------
# Helpers shared by several forms


def _num(x: float) -> str:
    return f"{x:g}"


@functools.lru_cache(maxsize=1024)  # a sheet repeats its levels: 0.95 on nearly every row
def _upper_z(tail: float) -> float:
    """z with P(Z > z) = tail; from the lower tail so that tiny tails keep their precision."""
    return -_STANDARD_NORMAL.inv_cdf(tail)


def _value_rule(measure: str) -> tuple[Callable[[float], bool], str]:
    """What a natural-scale estimate or bound of ``measure`` must be."""
    return _rule_for(_TABLE[measure])


@functools.lru_cache(maxsize=256)
def _rule_for(row: Measure) -> tuple[Callable[[float], bool], str]:
    # One rule per measure row, not a new closure for every sheet row.
    if row.bounds is not None:
        lo, hi = row.bounds
        return (lambda x: lo <= x <= hi), f"between {lo:g} and {hi:g}"
    return (lambda x: in_domain(row.scale, x)), domain(row.scale)


def _check_values(measure: str, values: Mapping[str, float], fields: tuple[str, ...]) -> None:
    ok, must = _value_rule(measure)
    for name in fields:
        if not ok(values[name]):
            raise ConversionError(
                f"{name} of a {measure} ({_TABLE[measure].scale} scale) must be {must}, "
                f"got {_num(values[name])}",
                field=name,
            )


def _at_most(small: str, big: str, values: Mapping[str, float]) -> None:
    """Raise on ``small`` when it exceeds ``big`` (events above total)."""
    if values[small] > values[big]:
        raise ConversionError(
            f"{small} must be at most {big} ({_num(values[big])}), got {_num(values[small])}",
            field=small,
        )


def _suffix(scale: str) -> str:
    return "" if scale == "identity" else f"_{scale}"


def _derived(measure: str, y: float, var: float, conversion: str, *corr: str) -> Derived:
    scale = _TABLE[measure].scale
    return Derived(y=y, se=math.sqrt(var), scale=scale, conversion=conversion, corrections=corr)


def smd_to_log_odds_ratio(d: float, var_d: float) -> tuple[float, float]:
    """(ln OR, var ln OR) from a standardized mean difference and its variance.

    ln OR = d π/√3, var = var_d π²/3 (Chinn 2000, Stat Med 19:3127; Borenstein et al. 2009
    ch. 7), assuming a logistic latent outcome with equal variance in both arms.
    """
    return d / _CHINN, var_d / _CHINN**2


def log_odds_ratio_to_smd(lor: float, var_lor: float) -> tuple[float, float]:
    """(d, var d) from a log odds ratio and its variance: d = ln OR √3/π, var = var 3/π².

    Chinn 2000, Stat Med 19:3127; Borenstein et al. 2009 ch. 7.
    """
    return lor * _CHINN, var_lor * _CHINN**2


# ---------------------------------------------------------------------------------------
# One function per reported form


def _from_ci(measure: str, v: Mapping[str, float]) -> Derived:
    """Estimate with a confidence interval reported on the natural scale.

    y = g(estimate); se = (g(upper) - g(lower)) / (2 z), z = Φ⁻¹((1 + level)/2); for 95 %
    2z = 3.92 (Cochrane Handbook v6 §6.3.1; §6.3.2 for ratios, whose bounds are logged).
    """
    scale = _TABLE[measure].scale
    _check_values(measure, v, ("estimate", "lower", "upper"))
    est, lo, hi = v["estimate"], v["lower"], v["upper"]
    if lo > est:
        raise ConversionError(
            f"lower must be at most the estimate ({_num(est)}), got {_num(lo)}", field="lower"
        )
    if hi < est:
        raise ConversionError(
            f"upper must be at least the estimate ({_num(est)}), got {_num(hi)}", field="upper"
        )
    if hi == lo:
        raise ConversionError(
            f"upper must be greater than lower ({_num(lo)}), got {_num(hi)}", field="upper"
        )
    z = _upper_z((1.0 - v.get("level", _DEFAULT_LEVEL)) / 2.0)
    se = (to_analysis(scale, hi) - to_analysis(scale, lo)) / (2.0 * z)
    return _derived(measure, to_analysis(scale, est), se * se, "ci" + _suffix(scale))


def _from_se(measure: str, v: Mapping[str, float]) -> Derived:
    """Estimate with a standard error. Which scale the se is on is a convention:

    - ratio measures: ``se`` is the SE of the *log* ratio, as regression output (logistic,
      Poisson, Cox) reports it; used as is;
    - proportion, rate, correlation: ``se`` is on the natural scale and is carried to the
      analysis scale by the delta method, se_g = |g'(estimate)| se (common practice);
    - identity-scale measures: used as is.
    """
    scale = _TABLE[measure].scale
    _check_values(measure, v, ("estimate",))
    est, se = v["estimate"], v["se"]
    if scale == "identity" or _TABLE[measure].ratio:
        conversion = "se" + _suffix(scale)
    else:
        se *= abs(analysis_slope(scale, est))
        conversion = f"se_delta{_suffix(scale)}"
    return _derived(measure, to_analysis(scale, est), se * se, conversion)


def _from_p(measure: str, v: Mapping[str, float]) -> Derived:
    """Estimate with a two-sided p-value against the null (difference 0, ratio 1, r = 0).

    z = Φ⁻¹(1 - p/2), se = |g(estimate)| / z (Cochrane Handbook v6 §6.3.1 for difference
    measures, §6.3.2 for ratios on the log scale; section numbers recalled). Refused for
    proportion, rate and mean, which have no null value.
    """
    scale = _TABLE[measure].scale
    _check_values(measure, v, ("estimate",))
    y = to_analysis(scale, v["estimate"])
    if y == 0.0:
        raise ConversionError(
            "estimate must differ from the null value for a p-value to give a standard "
            f"error, got {_num(v['estimate'])}; report the interval or the se instead",
            field="estimate",
        )
    se = abs(y) / _upper_z(v["p"] / 2.0)
    return _derived(measure, y, se * se, "p_value" + _suffix(scale))


def _from_events_total(measure: str, v: Mapping[str, float]) -> Derived:
    """Logit of a proportion: y = ln(e / (n - e)), var = 1/e + 1/(n - e).

    The large-sample variance of a binomial logit (common practice; it is the inverse Fisher
    information of the logit).
    """
    _at_most("events", "total", v)
    e, n = v["events"], v["total"]
    corr: tuple[str, ...] = ()
    if e == 0 or e == n:
        e, n = e + 0.5, n + 1.0
        corr = ("continuity correction 0.5 added to events and to non-events",)
    return _derived(measure, math.log(e / (n - e)), 1.0 / e + 1.0 / (n - e), "logit_counts", *corr)


def _from_events_exposure(measure: str, v: Mapping[str, float]) -> Derived:
    """Log of a Poisson rate: y = ln(e / T), var = 1/e (common practice)."""
    e = v["events"]
    corr: tuple[str, ...] = ()
    if e == 0:
        e = 0.5
        corr = ("continuity correction 0.5 added to events",)
    return _derived(measure, math.log(e / v["exposure"]), 1.0 / e, "log_rate_counts", *corr)


def _two_by_two_log_or(a: float, b: float, c: float, d: float) -> tuple[float, float]:
    """ln OR = ln(ad / bc), var = 1/a + 1/b + 1/c + 1/d (Borenstein et al. 2009 ch. 5)."""
    return math.log(a * d / (b * c)), 1.0 / a + 1.0 / b + 1.0 / c + 1.0 / d


def _log_risk_ratio_2x2(a: float, b: float, c: float, d: float) -> tuple[float, float, str]:
    n_a, n_b = a + b, c + d
    return math.log((a / n_a) / (c / n_b)), 1 / a - 1 / n_a + 1 / c - 1 / n_b, "log_risk_ratio_2x2"


def _risk_difference_2x2(a: float, b: float, c: float, d: float) -> tuple[float, float, str]:
    p_a, p_b = a / (a + b), c / (c + d)
    var = p_a * (1 - p_a) / (a + b) + p_b * (1 - p_b) / (c + d)
    return p_a - p_b, var, "risk_difference_2x2"


def _smd_2x2(a: float, b: float, c: float, d: float) -> tuple[float, float, str]:
    return (
        *log_odds_ratio_to_smd(*_two_by_two_log_or(a, b, c, d)),
        "chinn_smd_from_log_odds_ratio",
    )


# measure -> its estimate, variance and conversion name from the cells of a 2x2 table
_TWO_BY_TWO: dict[str, Callable[[float, float, float, float], tuple[float, float, str]]] = {
    "odds_ratio": lambda a, b, c, d: (*_two_by_two_log_or(a, b, c, d), "log_odds_ratio_2x2"),
    "risk_ratio": _log_risk_ratio_2x2,
    "risk_difference": _risk_difference_2x2,
    "smd": _smd_2x2,
}


def _from_two_by_two(measure: str, v: Mapping[str, float]) -> Derived:
    """A 2x2 table: events and totals of arm a (experimental) and arm b (comparator).

    Cells a = events_a, b = total_a - events_a, c = events_b, d = total_b - events_b;
    p_a = a / n_a, p_b = c / n_b (Borenstein et al. 2009 ch. 5):

    - odds_ratio: ln OR = ln(ad / bc), var = 1/a + 1/b + 1/c + 1/d;
    - risk_ratio: ln RR = ln(p_a / p_b), var = 1/a - 1/n_a + 1/c - 1/n_b;
    - risk_difference: RD = p_a - p_b, var = p_a(1 - p_a)/n_a + p_b(1 - p_b)/n_b;
    - smd: d = ln OR √3/π, var = var(ln OR) 3/π² (Chinn 2000).
    """
    _at_most("events_a", "total_a", v)
    _at_most("events_b", "total_b", v)
    a, c = v["events_a"], v["events_b"]
    b, d = v["total_a"] - a, v["total_b"] - c
    corr: tuple[str, ...] = ()
    if 0.0 in (a, b, c, d):
        a, b, c, d = a + 0.5, b + 0.5, c + 0.5, d + 0.5
        corr = ("continuity correction 0.5 added to every cell",)
    y, var, name = _TWO_BY_TWO[measure](a, b, c, d)
    return _derived(measure, y, var, name, *corr)


def _from_rate_counts(measure: str, v: Mapping[str, float]) -> Derived:
    """Log rate ratio: ln((e_a/T_a) / (e_b/T_b)), var = 1/e_a + 1/e_b (common practice)."""
    e_a, e_b = v["events_a"], v["events_b"]
    corr: tuple[str, ...] = ()
    if e_a == 0 or e_b == 0:
        e_a, e_b = e_a + 0.5, e_b + 0.5
        corr = ("continuity correction 0.5 added to the events of both arms",)
    y = math.log((e_a / v["exposure_a"]) / (e_b / v["exposure_b"]))
    return _derived(measure, y, 1.0 / e_a + 1.0 / e_b, "log_rate_ratio_counts", *corr)


def _cohen_d(v: Mapping[str, float]) -> tuple[float, float, float]:
    """d = D / S_within and var_d (Borenstein et al. 2009 ch. 4), with df = n_a + n_b - 2."""
    n_a, n_b, sd_a, sd_b = v["n_a"], v["n_b"], v["sd_a"], v["sd_b"]
    df = n_a + n_b - 2.0
    d = (v["mean_a"] - v["mean_b"]) / math.sqrt(((n_a - 1) * sd_a**2 + (n_b - 1) * sd_b**2) / df)
    return d, (n_a + n_b) / (n_a * n_b) + d * d / (2.0 * (n_a + n_b)), df


def _hedges_g(v: Mapping[str, float]) -> tuple[float, float, str]:
    d, var_d, df = _cohen_d(v)
    j = 1.0 - 3.0 / (4.0 * df - 1.0)
    return j * d, j * j * var_d, "hedges_g"


def _mean_difference(v: Mapping[str, float]) -> tuple[float, float, str]:
    var = v["sd_a"] ** 2 / v["n_a"] + v["sd_b"] ** 2 / v["n_b"]
    return v["mean_a"] - v["mean_b"], var, "mean_difference_groups"


def _log_odds_ratio_from_groups(v: Mapping[str, float]) -> tuple[float, float, str]:
    d, var_d, _ = _cohen_d(v)
    return (*smd_to_log_odds_ratio(d, var_d), "chinn_log_odds_ratio_from_smd")


# measure -> its estimate, variance and conversion name from two groups' means and SDs
_TWO_GROUPS: dict[str, Callable[[Mapping[str, float]], tuple[float, float, str]]] = {
    "mean_difference": _mean_difference,
    "smd": _hedges_g,
    "odds_ratio": _log_odds_ratio_from_groups,
}


def _from_two_groups(measure: str, v: Mapping[str, float]) -> Derived:
    """Means, SDs and sizes of two independent groups (Borenstein et al. 2009 ch. 4).

    - mean_difference: D = mean_a - mean_b, var = sd_a²/n_a + sd_b²/n_b (no equal-variance
      assumption);
    - smd (Hedges' g): S_within² = ((n_a-1) sd_a² + (n_b-1) sd_b²) / df, df = n_a + n_b - 2,
      d = D / S_within, var_d = (n_a+n_b)/(n_a n_b) + d²/(2(n_a+n_b)),
      J = 1 - 3/(4 df - 1), g = J d, var_g = J² var_d;
    - odds_ratio: ln OR = d π/√3, var = var_d π²/3 from Cohen's d (Chinn 2000).
    """
    return _derived(measure, *_TWO_GROUPS[measure](v))


def _from_mean_sd(measure: str, v: Mapping[str, float]) -> Derived:
    """A mean with its SD and size: se = sd / √n (Cochrane Handbook v6 §6.5.2.2)."""
    return _derived(measure, v["mean"], v["sd"] ** 2 / v["n"], "mean_sd_n")


_ORDER = ("min", "q1", "median", "q3", "max")


def _from_median(measure: str, v: Mapping[str, float]) -> Derived:
    """Mean and SD from a median with quartiles and/or range (Wan, Wang, Liu & Tong 2014,
    BMC Med Res Methodol 14:135), then se = SD/√n. With a = min, b = max,
    ξ(n) = 2 Φ⁻¹((n - 0.375)/(n + 0.25)) and η(n) = 2 Φ⁻¹((0.75n - 0.125)/(n + 0.25)):

    - S1 (min, median, max): mean = (a + 2m + b)/4, SD = (b - a)/ξ(n);
    - S2 (q1, median, q3): mean = (q1 + m + q3)/3, SD = (q3 - q1)/η(n);
    - S3 (all five): mean = (a + 2q1 + 2m + 2q3 + b)/8,
      SD = (b - a)/(2ξ(n)) + (q3 - q1)/(2η(n)).

    ξ(n) uses Blom's approximation to the expected range, which Wan et al. give for all n
    (their Table 1 lists exact values for n ≤ 50; they agree within 1 % for n ≥ 10). The
    estimators assume roughly normal data. Formulas recalled from memory.
    """
    present = [name for name in _ORDER if name in v]
    for low, high in itertools.pairwise(present):
        if v[high] < v[low]:
            raise ConversionError(
                f"{high} must be at least {low} ({_num(v[low])}), got {_num(v[high])}",
                field=high,
            )
    for low, high in (("q1", "q3"), ("min", "max")):
        if low in v and v[high] == v[low]:
            raise ConversionError(
                f"{high} must be greater than {low} ({_num(v[low])}) to give a spread, "
                f"got {_num(v[high])}",
                field=high,
            )
    n, m = v["n"], v["median"]
    xi = 2.0 * _STANDARD_NORMAL.inv_cdf((n - 0.375) / (n + 0.25))
    eta = 2.0 * _STANDARD_NORMAL.inv_cdf((0.75 * n - 0.125) / (n + 0.25))
    if "min" in v and "q1" in v:
        a, q1, q3, b = v["min"], v["q1"], v["q3"], v["max"]
        mean = (a + 2 * q1 + 2 * m + 2 * q3 + b) / 8.0
        sd = (b - a) / (2.0 * xi) + (q3 - q1) / (2.0 * eta)
        name = "wan_five_number"
    elif "min" in v:
        a, b = v["min"], v["max"]
        mean, sd, name = (a + 2 * m + b) / 4.0, (b - a) / xi, "wan_median_range"
    else:
        q1, q3 = v["q1"], v["q3"]
        mean, sd, name = (q1 + m + q3) / 3.0, (q3 - q1) / eta, "wan_median_iqr"
    return _derived(measure, mean, sd * sd / n, name)


def _from_r(measure: str, v: Mapping[str, float]) -> Derived:
    """Fisher's z: y = atanh r, se = 1/√(n - 3) (Fisher 1921; Borenstein et al. 2009 ch. 6)."""
    if v["n"] < 4:
        raise ConversionError(
            f"n must be at least 4 for Fisher's z (variance 1/(n-3)), got {_num(v['n'])}",
            field="n",
        )
    return _derived(measure, math.atanh(v["r"]), 1.0 / (v["n"] - 3.0), "fisher_z")


# ---------------------------------------------------------------------------------------
# The tables: what each column must be, and which forms exist


def _is_count(x: float) -> bool:
    return x >= 0 and float(x).is_integer()


def _in_unit_interval(x: float) -> bool:
    return 0.0 < x < 1.0


_COLUMN_RULES: dict[str, tuple[Callable[[float], bool], str]] = {
    **{f: (_is_count, "a whole number, 0 or more") for f in ("events", "events_a", "events_b")},
    **{
        f: (lambda x: _is_count(x) and x >= 1, "a whole number, 1 or more")
        for f in ("total", "total_a", "total_b")
    },
    **{
        f: (lambda x: _is_count(x) and x >= 2, "a whole number, 2 or more")
        for f in ("n", "n_a", "n_b")
    },
    **{
        f: (lambda x: x > 0, "greater than 0")
        for f in ("se", "sd", "sd_a", "sd_b", "exposure", "exposure_a", "exposure_b")
    },
    "level": (_in_unit_interval, "strictly between 0 and 1 (0.95 for a 95% interval)"),
    "p": (_in_unit_interval, "strictly between 0 and 1"),
    "r": (lambda x: -1.0 < x < 1.0, "strictly between -1 and 1"),
}


@dataclass(frozen=True)
class _Measures:
    """The measures a form serves: those named, or every row of the measure table that passes
    `test` (so a measure added to the table is served by the general forms)."""

    names: frozenset[str] = frozenset()
    test: Callable[[Measure], bool] | None = None

    def __contains__(self, measure: object) -> bool:
        if self.test is None:
            return measure in self.names
        return measure in _TABLE and self.test(_TABLE[str(measure)])


def _named(*names: str | Mapping[str, object]) -> _Measures:
    return _Measures(
        frozenset(n for group in names for n in ([group] if isinstance(group, str) else group))
    )


@dataclass(frozen=True)
class _Form:
    fields: tuple[str, ...]
    measures: _Measures
    compute: Callable[[str, Mapping[str, float]], Derived]
    optional: tuple[str, ...] = ()
    refusal: str = ""  # why the form gives nothing for the measures it leaves out

    @property
    def label(self) -> str:
        return ", ".join(self.fields)

    @property
    def accepts(self) -> frozenset[str]:
        return frozenset(self.fields + self.optional)


_ALL = _Measures(test=lambda m: True)
# A two-sided p-value gives a standard error only against a null value, which a level lacks.
_CONTRASTS = _Measures(test=lambda m: not m.is_level)
_FORMS: tuple[_Form, ...] = (  # the order breaks ties: earlier forms are preferred
    _Form(("estimate", "lower", "upper"), _ALL, _from_ci, optional=("level",)),
    _Form(("estimate", "se"), _ALL, _from_se),
    _Form(
        ("estimate", "p"),
        _CONTRASTS,
        _from_p,
        refusal="a two-sided p-value gives a standard error only against a null value "
        "(a difference of 0, a ratio of 1), and a {measure} has none",
    ),
    _Form(("events", "total"), _named("proportion"), _from_events_total),
    _Form(("events", "exposure"), _named("rate"), _from_events_exposure),
    _Form(
        ("events_a", "total_a", "events_b", "total_b"),
        _named(_TWO_BY_TWO),
        _from_two_by_two,
    ),
    _Form(
        ("events_a", "exposure_a", "events_b", "exposure_b"),
        _named("rate_ratio"),
        _from_rate_counts,
    ),
    _Form(
        ("mean_a", "sd_a", "n_a", "mean_b", "sd_b", "n_b"),
        _named(_TWO_GROUPS),
        _from_two_groups,
    ),
    _Form(("mean", "sd", "n"), _named("mean"), _from_mean_sd),
    _Form(("median", "min", "max", "n"), _named("mean"), _from_median),
    _Form(("median", "q1", "q3", "n"), _named("mean"), _from_median),
    _Form(("min", "q1", "median", "q3", "max", "n"), _named("mean"), _from_median),
    _Form(("r", "n"), _named("correlation"), _from_r),
)


_BORENSTEIN = "Borenstein, Hedges, Higgins & Rothstein (2009), Introduction to Meta-Analysis"
_CHINN_2000 = f"Chinn (2000), Statistics in Medicine 19:3127; {_BORENSTEIN}, ch. 7"
_WAN = (
    "Wan, Wang, Liu & Tong (2014), BMC Medical Research Methodology 14:135 "
    "(formulas recalled from memory)"
)
# conversion name stored on an entry -> the published source of its formula, as the docstring
# of the function above that computes it gives it; a scale suffix (_log, _logit, _fisher_z)
# keeps its base's source (`conversion_source`).
CONVERSION_SOURCES: dict[str, str] = {
    "ci": "Cochrane Handbook v6, section 6.3.1 (section 6.3.2 for ratios on the log scale)",
    "se": "the standard error as reported (common practice)",
    "se_delta": "the delta method, se_g = |g'(estimate)| se (common practice)",
    "p_value": "Cochrane Handbook v6, sections 6.3.1 and 6.3.2 (section numbers recalled)",
    "logit_counts": "large-sample variance of a binomial logit (common practice)",
    "log_rate_counts": "log of a Poisson rate, variance 1/events (common practice)",
    "log_odds_ratio_2x2": f"{_BORENSTEIN}, ch. 5",
    "log_risk_ratio_2x2": f"{_BORENSTEIN}, ch. 5",
    "risk_difference_2x2": f"{_BORENSTEIN}, ch. 5",
    "chinn_smd_from_log_odds_ratio": _CHINN_2000,
    "log_rate_ratio_counts": "log rate ratio, variance 1/e_a + 1/e_b (common practice)",
    "hedges_g": f"{_BORENSTEIN}, ch. 4",
    "mean_difference_groups": f"{_BORENSTEIN}, ch. 4",
    "chinn_log_odds_ratio_from_smd": _CHINN_2000,
    "mean_sd_n": "Cochrane Handbook v6, section 6.5.2.2",
    "wan_five_number": _WAN,
    "wan_median_range": _WAN,
    "wan_median_iqr": _WAN,
    "fisher_z": f"Fisher (1921); {_BORENSTEIN}, ch. 6",
}
CONTINUITY_SOURCE = "0.5 added to zero cells (common practice; Cochrane Handbook v6, 10.4.4.2)"


def conversion_source(name: str) -> str | None:
    """The published source of conversion `name` (None for a name this table does not know)."""
    if name in CONVERSION_SOURCES:
        return CONVERSION_SOURCES[name]
    for scale in ANALYSIS_SCALE.values():
        suffix = _suffix(scale)
        if suffix and name.endswith(suffix) and name[: -len(suffix)] in CONVERSION_SOURCES:
            return CONVERSION_SOURCES[name[: -len(suffix)]]
    return None


# ---------------------------------------------------------------------------------------
# Validation and form selection


def _checked_columns(reported: Mapping[str, float]) -> dict[str, float]:
    values: dict[str, float] = {}
    for name in NUMERIC_FIELDS:  # sheet order, so the first fault named is the leftmost
        if name not in reported:
            continue
        x = float(reported[name])
        if not math.isfinite(x):
            raise ConversionError(f"{name} must be a finite number, got {x}", field=name)
        rule = _COLUMN_RULES.get(name)
        if rule is not None and not rule[0](x):
            raise ConversionError(f"{name} must be {rule[1]}, got {_num(x)}", field=name)
        values[name] = x
    for name in reported:
        if name not in values:
            raise ConversionError(
                f"{name!r} is not a numeric column; use one of {', '.join(NUMERIC_FIELDS)}",
                field=name,
            )
    return values


def _first(names: frozenset[str] | set[str]) -> str:
    return min(names, key=NUMERIC_FIELDS.index)


def _forms_for(measure: str) -> str:
    return "; ".join(f"'{f.label}'" for f in _FORMS if measure in f.measures)


def _missing(form: _Form, present: frozenset[str]) -> list[str]:
    return [x for x in form.fields if x not in present]


def _select_form(measure: str, present: frozenset[str]) -> _Form:
    """The one complete form the filled columns make for `measure`, or an error saying why
    there is none; decided once per measure row and set of columns (a sheet repeats few)."""
    return _form_for(measure, _TABLE[measure], present)


@functools.lru_cache(maxsize=4096)
def _form_for(measure: str, row: Measure, present: frozenset[str]) -> _Form:
    # `row` is in the cache key so that a measure row replaced in the table is decided anew.
    complete = [f for f in _FORMS if set(f.fields) <= present]
    # A form inside a larger complete one (median, q1, q3, n inside the five numbers) yields.
    complete = [f for f in complete if not any(set(f.fields) < set(g.fields) for g in complete)]
    if not complete:
        raise _incomplete(measure, present)
    complete.sort(key=lambda f: measure not in f.measures)  # stable: table order otherwise
    form = complete[0]
    extra = present - form.accepts
    if extra:
        also = [f"'{f.label}'" for f in complete[1:]]
        wider = [f for f in _FORMS if present < f.accepts and measure in f.measures]
        if also:
            hint = f"; the row also fills {' and '.join(also)}"
        else:
            hint = "".join(
                f"; '{f.label}' would also need {', '.join(_missing(f, present))}" for f in wider
            )
        name = _first(extra)
        raise ConversionError(
            f"{name} is not part of the reported form '{form.label}'{hint}; "
            "fill exactly one reported form",
            field=name,
        )
    if measure not in form.measures:
        why = form.refusal.format(measure=measure) or (
            f"that form gives {', '.join(m for m in _TABLE if m in form.measures)}"
        )
        raise ConversionError(
            f"measure {measure} cannot be derived from '{form.label}': {why}; "
            f"forms for {measure}: {_forms_for(measure)}",
            field="measure",
        )
    return form


def _incomplete(measure: str, present: frozenset[str]) -> ConversionError:
    """The error for a row with no complete form: which fields the nearest form lacks."""
    valid = [f for f in _FORMS if measure in f.measures]
    best = max(len(present & f.accepts) for f in valid)
    if best == 0:
        if not present:
            return ConversionError(
                f"no reported numbers; fill one reported form for {measure}: {_forms_for(measure)}",
                field=valid[0].fields[0],
            )
        name = _first(present)
        return ConversionError(
            f"{name} is not part of any reported form for {measure}; fill one of: "
            f"{_forms_for(measure)}",
            field=name,
        )
    nearest = [f for f in valid if len(present & f.accepts) == best]
    missing = [_missing(f, present) for f in nearest]
    needs = " or ".join(
        f"'{f.label}' also needs {', '.join(m)}" for f, m in zip(nearest, missing, strict=True)
    )
    return ConversionError(f"incomplete reported form: {needs}", field=missing[0][0])


def derive(
    measure: str, reported: Mapping[str, float], bounds: frozenset[str] = frozenset()
) -> Derived:
    """The estimate and standard error on ``measure``'s analysis scale, from one sheet row.

    ``reported`` holds the numeric columns the row filled (already parsed to numbers; a
    missing ``level`` means 0.95); ``bounds`` names the columns reported as an upper bound
    (``<0.001``), which only ``p`` may be. Exactly one complete reported form must be
    filled and be valid for ``measure``; each form's formula is in the docstring of its
    ``_from_*`` function. Raises ``ConversionError`` whose ``field`` names the column at
    fault (or ``"measure"``), with what it must be and what it got.
    """
    if measure not in _TABLE:
        raise ConversionError(
            f"measure must be one of {', '.join(_TABLE)}, got {measure!r}", field="measure"
        )
    unbounded = (
        [name for name in NUMERIC_FIELDS if name in bounds and name != "p"] if bounds else []
    )
    if unbounded:
        raise ConversionError(
            "only a p-value may be reported as an inequality (<0.001)", field=unbounded[0]
        )
    values = _checked_columns(reported)
    derived = _finite(_select_form(measure, frozenset(values)), measure, values)
    return _p_bound(derived, values["p"]) if "p" in bounds else derived


def _p_bound(derived: Derived, bound: float) -> Derived:
    """A p-value reported as ``p < bound``, converted with the bound as the p-value.

    The true p is smaller, so the true |z| is larger and the true se = |y| / z smaller: the
    se from the bound is an upper bound, a conservative (wider) estimate. Flagged in the
    conversion name (``p_bound``) and explained in the corrections.
    """
    return replace(
        derived,
        conversion=derived.conversion.replace("p_value", "p_bound", 1),
        corrections=(
            f"p reported as <{_num(bound)}: the bound used as the p-value, so the se is an "
            "upper bound (conservative: larger than the true se)",
            *derived.corrections,
        ),
    )


def _finite(form: _Form, measure: str, values: Mapping[str, float]) -> Derived:
    """The form's result, refusing what floating point cannot carry: a y or se that
    overflowed to inf or NaN, or an se that underflowed to 0 (then the entry would claim
    infinite precision)."""
    try:
        derived = form.compute(measure, values)
    except OverflowError:
        derived = Derived(math.inf, math.inf, "", "")
    if not (math.isfinite(derived.y) and math.isfinite(derived.se) and derived.se > 0):
        raise ConversionError(
            f"the numbers of '{form.label}' give y = {derived.y:g}, se = {derived.se:g}; "
            "a usable entry needs both finite and se > 0 (are the numbers far too large or "
            "too small?)",
            field=form.fields[0],
        )
    return derived
