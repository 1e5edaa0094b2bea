"""Frequentist pooling of estimates y_i with known standard errors se_i (v_i = se_i²).

Model: y_i ~ N(theta_i, v_i), theta_i ~ N(mu, tau²). With weights w_i = 1/(v_i + tau²),
    mu_hat = sum w_i y_i / sum w_i,  se(mu_hat) = (sum w_i)^(-1/2)
(inverse-variance weighting; tau² = 0 gives the common-effect model). tau² is estimated by
DerSimonian & Laird (1986, Control Clin Trials 7:177), Paule & Mandel (1982, J Res Natl Bur
Stand 87:377), maximum likelihood or restricted maximum likelihood (Viechtbauer 2005, J Educ
Behav Stat 30:261). The generalised Q statistic used by Paule-Mandel and by the Q-profile
interval for tau² (Viechtbauer 2007, Stat Med 26:37) is
    Q_gen(tau²) = sum w_i(tau²) (y_i - mu_hat(tau²))²,
which decreases in tau². Formulas are restated beside each function; they were written from
the cited papers as recalled, not copied from any implementation.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize, stats

from registry.errors import InputError, NumericalError
from registry.synthesis.heterogeneity import heterogeneity

METHODS = ("common", "dl", "pm", "reml", "ml")

_MAX_SCORING_STEPS = 200
_SCORING_TOL = 1e-10
_MAX_BRACKET_EXPANSIONS = 80


@dataclass(frozen=True)
class PoolResult:
    """The result of `pool`; every interval is at `level`, on the analysis scale of the input.

    `weights` are each study's percentage weight (the w_i above, normalised to sum to 100).
    `tau2` is None for the common-effect model and for k = 1; `notes` says in plain sentences
    what could not be computed and why. `prediction` is always the standard interval of
    Higgins, Thompson & Spiegelhalter (2009); `prediction_hksj` is its variant on the
    Hartung-Knapp standard error, given only when `hksj` is set. `predictive` is None: a
    frequentist fit has no predictive distribution (the field keeps the pooled-result contract
    of `registry.synthesis.result`).
    """

    k: int
    method: str
    mu: float
    se: float
    ci: tuple[float, float]
    tau2: float | None
    tau2_ci: tuple[float, float] | None
    i2: float | None
    h2: float | None
    q: float
    q_df: int
    q_p: float | None
    prediction: tuple[float, float] | None
    hksj: bool
    level: float
    weights: tuple[float, ...]
    notes: tuple[str, ...] = ()
    prediction_hksj: tuple[float, float] | None = None
    predictive: None = None

    @property
    def tau(self) -> float | None:
        """Between-study standard deviation, sqrt(tau²)."""
        return None if self.tau2 is None else math.sqrt(self.tau2)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready plain types; intervals become [lower, upper] lists or None."""

        def pair(value: tuple[float, float] | None) -> list[float] | None:
            return None if value is None else [value[0], value[1]]

        return {
            "k": self.k,
            "method": self.method,
            "mu": self.mu,
            "se": self.se,
            "ci": pair(self.ci),
            "tau2": self.tau2,
            "tau2_ci": pair(self.tau2_ci),
            "tau": self.tau,
            "i2": self.i2,
            "h2": self.h2,
            "q": self.q,
            "q_df": self.q_df,
            "q_p": self.q_p,
            "prediction": pair(self.prediction),
            "prediction_hksj": pair(self.prediction_hksj),
            "hksj": self.hksj,
            "level": self.level,
            "weights": list(self.weights),
            "notes": list(self.notes),
            "predictive": None,
        }


def pool(
    y: Sequence[float],
    se: Sequence[float],
    method: str = "reml",
    *,
    hksj: bool = False,
    level: float = 0.95,
) -> PoolResult:
    """Pool estimates `y` with standard errors `se` by `method` (one of METHODS).

    Interval for mu: mu_hat ± z_{(1+level)/2} se(mu_hat) by default. With `hksj=True`, the
    Hartung & Knapp (2001, Stat Med 20:3875) / Sidik & Jonkman (2002, Stat Med 21:3153)
    interval mu_hat ± t_{k-1,(1+level)/2} se_HK with
        se_HK² = sum w_i (y_i - mu_hat)² / ((k - 1) sum w_i).
    The HK factor se_HK²/se² is not truncated at 1 (the original proposal; truncation is a
    later, optional modification), so the HKSJ interval can be narrower than the Wald one
    when the studies agree more closely than their standard errors suggest.

    Prediction interval for a new study's parameter (Higgins, Thompson & Spiegelhalter 2009,
    JRSS A 172:137): mu_hat ± t_{k-2,(1+level)/2} sqrt(tau² + se(mu_hat)²), k >= 3, always
    with the inverse-variance se(mu_hat) = (sum w_i)^(-1/2), whatever `hksj` says. With
    `hksj=True` the same formula on se_HK is reported apart, as `prediction_hksj` (it is
    narrower than the standard interval when se_HK < se).

    When the tau² estimate lies outside its own Q-profile interval, a note says so.

    Q, I² and H² come from `registry.synthesis.heterogeneity` (Higgins & Thompson 2002); the
    Q-profile interval for tau² is from Viechtbauer (2007), at the same `level`.
    """
    y_arr, v = _validated(y, se, method, level)
    k = len(y_arr)
    notes: list[str] = []
    het = heterogeneity(y_arr, np.sqrt(v))

    tau2: float | None
    if method == "common":
        tau2 = None
        notes.append(
            "The common-effect model assumes no between-study variance; tau² is not "
            "estimated and there is no prediction interval."
        )
    elif k == 1:
        tau2 = None
        notes.append(
            "With k = 1 there is no between-study variance to estimate; the result is "
            "the single study's estimate and interval."
        )
    else:
        tau2 = _TAU2_ESTIMATORS[method](y_arr, v)

    w = 1.0 / (v + (tau2 or 0.0))
    mu = float(np.sum(w * y_arr) / np.sum(w))
    se_wald = se_mu = math.sqrt(1.0 / float(np.sum(w)))
    tail = (1.0 + level) / 2.0
    crit = float(stats.norm.ppf(tail))
    if hksj and k >= 2:
        se_mu = math.sqrt(float(np.sum(w * (y_arr - mu) ** 2)) / ((k - 1) * float(np.sum(w))))
        crit = float(stats.t.ppf(tail, k - 1))
        if se_mu == 0.0:
            notes.append(
                "The Hartung-Knapp standard error is zero because every study has the "
                "same estimate, so the interval for mu has no width."
            )
    elif hksj:
        notes.append(
            "The Hartung-Knapp interval needs k >= 2; the normal (Wald) interval is shown instead."
        )
    ci = (mu - crit * se_mu, mu + crit * se_mu)

    prediction: tuple[float, float] | None = None
    prediction_hksj: tuple[float, float] | None = None
    if tau2 is not None and k >= 3:
        crit_pred = float(stats.t.ppf(tail, k - 2))
        prediction = _prediction(mu, tau2, se_wald, crit_pred)
        if hksj:
            prediction_hksj = _prediction(mu, tau2, se_mu, crit_pred)
    elif tau2 is not None:
        notes.append(
            "A prediction interval needs k >= 3 (it uses t with k - 2 degrees of "
            "freedom); none is given for k = 2."
        )

    tau2_ci = _q_profile(y_arr, v, level) if tau2 is not None else None
    if tau2_ci == (0.0, 0.0):
        notes.append(
            "Q at tau² = 0 is below the lower chi² quantile, so the Q-profile "
            "interval for tau² collapses to [0, 0]; the data are more homogeneous "
            "than their standard errors suggest."
        )
    if tau2 is not None and tau2_ci is not None:
        notes.extend(_outside_q_profile_note(method, tau2, tau2_ci, level))

    return PoolResult(
        k=k,
        method=method,
        mu=mu,
        se=se_mu,
        ci=ci,
        tau2=tau2,
        tau2_ci=tau2_ci,
        i2=het.i2,
        h2=het.h2,
        q=het.q,
        q_df=het.df,
        q_p=het.p,
        prediction=prediction,
        hksj=hksj and k >= 2,
        level=level,
        weights=tuple(float(x) for x in 100.0 * w / np.sum(w)),
        notes=tuple(notes),
        prediction_hksj=prediction_hksj,
    )


def _prediction(mu: float, tau2: float, se: float, crit: float) -> tuple[float, float]:
    """mu ± crit sqrt(tau² + se²) (Higgins, Thompson & Spiegelhalter 2009)."""
    half = crit * math.sqrt(tau2 + se**2)
    return mu - half, mu + half


_METHOD_NAMES = {"dl": "DerSimonian-Laird", "pm": "Paule-Mandel", "reml": "REML", "ml": "ML"}


def _outside_q_profile_note(
    method: str, tau2: float, interval: tuple[float, float], level: float
) -> list[str]:
    """A note when tau² lies outside its Q-profile interval (Viechtbauer 2007), else none.

    The estimators solve other equations than the Q-profile (DerSimonian-Laird's moment
    equation weights by 1/v_i, not 1/(v_i + tau²)), so the two can disagree; a small relative
    tolerance keeps rounding at a shared end from counting.
    """
    lower, upper = interval
    slack = 1e-9 * (1.0 + upper)
    if lower - slack <= tau2 <= upper + slack:
        return []
    side = "below" if tau2 < lower else "above"
    return [
        f"The {_METHOD_NAMES[method]} estimate of tau² ({tau2:.4g}) lies {side} its own "
        f"{100 * level:g}% Q-profile interval [{lower:.4g}, {upper:.4g}]: the generalised Q "
        "statistic finds that value of tau² implausible at this level, so the estimate and the "
        "interval disagree about the heterogeneity. Read tau² (and the prediction interval "
        "built on it) with caution; the Paule-Mandel estimate solves the same Q equation as "
        "the interval and lies inside it at the usual levels."
    ]


def _validated(
    y: Sequence[float], se: Sequence[float], method: str, level: float
) -> tuple[np.ndarray, np.ndarray]:
    """Check the inputs once; return y and the within-study variances v = se²."""
    if method not in METHODS:
        raise InputError(
            f"method must be one of {', '.join(METHODS)}; got {method!r}", field="method"
        )
    if not (isinstance(level, int | float) and 0.0 < level < 1.0):
        raise InputError(
            f"level must be a number strictly between 0 and 1; got {level!r}", field="level"
        )
    try:
        y_arr = np.asarray(y, dtype=float)
        se_arr = np.asarray(se, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"y and se must be sequences of numbers ({exc})", field="y") from exc
    if y_arr.ndim != 1 or se_arr.ndim != 1:
        raise InputError("y and se must be one-dimensional sequences", field="y")
    if len(y_arr) != len(se_arr):
        raise InputError(
            f"y and se must have the same length; got {len(y_arr)} estimates and "
            f"{len(se_arr)} standard errors",
            field="se",
        )
    if len(y_arr) == 0:
        raise InputError("there is nothing to pool: k = 0 estimates", field="y")
    bad_y = np.flatnonzero(~np.isfinite(y_arr))
    if bad_y.size:
        raise InputError(
            f"every estimate must be finite; study {bad_y[0] + 1} has {y_arr[bad_y[0]]}", field="y"
        )
    bad_se = np.flatnonzero(~(np.isfinite(se_arr) & (se_arr > 0)))
    if bad_se.size:
        raise InputError(
            f"every standard error must be finite and positive; study "
            f"{bad_se[0] + 1} has {se_arr[bad_se[0]]}",
            field="se",
        )
    return y_arr, se_arr**2


def _q_gen(tau2: float, y: np.ndarray, v: np.ndarray) -> float:
    """Q_gen(tau²) = sum w_i (y_i - mu_hat(tau²))², w_i = 1/(v_i + tau²) (Viechtbauer 2007)."""
    w = 1.0 / (v + tau2)
    mu = np.sum(w * y) / np.sum(w)
    return float(np.sum(w * (y - mu) ** 2))


def _solve_q_gen(target: float, y: np.ndarray, v: np.ndarray) -> float:
    """The tau² >= 0 with Q_gen(tau²) = target; 0 when Q_gen(0) <= target already.

    Q_gen decreases from Q_gen(0) to 0 as tau² grows, so the root is unique and a bracket is
    found by growing the upper end until Q_gen falls below the target.
    """
    if _q_gen(0.0, y, v) <= target:
        return 0.0
    upper = max(float(np.var(y)), float(np.max(v)))
    for _ in range(_MAX_BRACKET_EXPANSIONS):
        if _q_gen(upper, y, v) < target:
            return float(
                optimize.brentq(
                    lambda t: _q_gen(t, y, v) - target,
                    0.0,
                    upper,
                    xtol=1e-14,
                    rtol=1e-14,
                    maxiter=500,
                )
            )
        upper *= 4.0
    raise NumericalError(
        f"could not bracket tau² with Q_gen(tau²) = {target:.6g} (upper end reached "
        f"{upper:.3g}); check the estimates for gross errors of scale, or try method='dl'"
    )


def _tau2_dl(y: np.ndarray, v: np.ndarray) -> float:
    """DerSimonian & Laird (1986): tau² = max(0, (Q - (k-1)) / (S1 - S2/S1)), S_r = sum w_i^r,
    w_i = 1/v_i, Q the common-effect Cochran's Q."""
    w = 1.0 / v
    s1 = float(np.sum(w))
    c = s1 - float(np.sum(w**2)) / s1
    return max(0.0, (_q_gen(0.0, y, v) - (len(y) - 1)) / c)


def _tau2_pm(y: np.ndarray, v: np.ndarray) -> float:
    """Paule & Mandel (1982): the tau² >= 0 solving Q_gen(tau²) = k - 1."""
    return _solve_q_gen(len(y) - 1.0, y, v)


def _likelihood_parts(
    tau2: float, y: np.ndarray, v: np.ndarray, restricted: bool
) -> tuple[float, float, float]:
    """Log-likelihood (constants dropped), score and Fisher information in tau².

    With w_i = 1/(v_i + tau²), r_i = y_i - mu_hat(tau²), S_r = sum w_i^r (Viechtbauer 2005):
      ML:   l = -1/2 [sum log(v_i + tau²) + sum w_i r_i²]
            score = 1/2 [sum w_i² r_i² - S1],             information = 1/2 S2
      REML: l_R = l - 1/2 log S1
            score = 1/2 [sum w_i² r_i² - S1 + S2/S1],
            information = 1/2 [S2 - 2 S3/S1 + (S2/S1)²]   (= 1/2 tr(P²)).
    """
    w = 1.0 / (v + tau2)
    s1, s2 = float(np.sum(w)), float(np.sum(w**2))
    r = y - np.sum(w * y) / s1
    wr2 = float(np.sum(w * r**2))
    w2r2 = float(np.sum(w**2 * r**2))
    loglik = -0.5 * (float(np.sum(np.log(v + tau2))) + wr2)
    if not restricted:
        return loglik, 0.5 * (w2r2 - s1), 0.5 * s2
    s3 = float(np.sum(w**3))
    return (
        loglik - 0.5 * math.log(s1),
        0.5 * (w2r2 - s1 + s2 / s1),
        0.5 * (s2 - 2.0 * s3 / s1 + (s2 / s1) ** 2),
    )


def _fisher_scoring(y: np.ndarray, v: np.ndarray, restricted: bool) -> float:
    """Maximise the (restricted) likelihood over tau² >= 0 by Fisher scoring.

    tau² <- max(0, tau² + score/information), started at the DerSimonian-Laird value; a step
    that lowers the likelihood is halved (a safeguard, common practice), so every iterate
    improves on the last and the boundary tau² = 0 is reached when the maximum lies there.
    """
    name = "REML" if restricted else "ML"
    tau2 = _tau2_dl(y, v)
    loglik, score, info = _likelihood_parts(tau2, y, v, restricted)
    change = math.inf
    for _ in range(_MAX_SCORING_STEPS):
        step = score / info
        for _ in range(60):
            proposal = max(0.0, tau2 + step)
            new = _likelihood_parts(proposal, y, v, restricted)
            if new[0] >= loglik:
                break
            step /= 2.0
        change = abs(proposal - tau2)
        tau2, (loglik, score, info) = proposal, new
        if change <= _SCORING_TOL * (1.0 + tau2):
            return tau2
    raise NumericalError(
        f"{name} estimation of tau² did not converge in {_MAX_SCORING_STEPS} Fisher-scoring "
        f"steps (last change {change:.3g}, tau² = {tau2:.6g}); try method='pm' or 'dl', which "
        "do not iterate on the likelihood, or look for studies with extreme standard errors"
    )


def _tau2_reml(y: np.ndarray, v: np.ndarray) -> float:
    """Restricted maximum likelihood (Viechtbauer 2005), by Fisher scoring."""
    return _fisher_scoring(y, v, restricted=True)


def _tau2_ml(y: np.ndarray, v: np.ndarray) -> float:
    """Maximum likelihood (Viechtbauer 2005), by Fisher scoring."""
    return _fisher_scoring(y, v, restricted=False)


_TAU2_ESTIMATORS: dict[str, Callable[[np.ndarray, np.ndarray], float]] = {
    "dl": _tau2_dl,
    "pm": _tau2_pm,
    "reml": _tau2_reml,
    "ml": _tau2_ml,
}


def _q_profile(y: np.ndarray, v: np.ndarray, level: float) -> tuple[float, float]:
    """Q-profile interval for tau² (Viechtbauer 2007): the tau² values where Q_gen equals the
    upper and lower (1 - level)/2 quantiles of chi²_{k-1}; each end is 0 when Q_gen(0) is
    already below its quantile."""
    df = len(y) - 1
    alpha = 1.0 - level
    lower = _solve_q_gen(float(stats.chi2.ppf(1.0 - alpha / 2.0, df)), y, v)
    upper = _solve_q_gen(float(stats.chi2.ppf(alpha / 2.0, df)), y, v)
    return lower, upper
