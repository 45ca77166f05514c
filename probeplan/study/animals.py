"""Animal numbers: sample size for comparing two groups, and the total to order.

The number of animals per group is the smallest n for which a two-sided (or
one-sided) two-sample t test at level alpha reaches the requested power, with
power computed exactly from the noncentral t distribution.  Animal numbers are
justified to the institution's animal care committee, which decides; the
effect size and standard deviation must come from pilot data or the literature,
not from this tool.
"""

from __future__ import annotations

import math
from typing import NamedTuple

from scipy import integrate, stats

from probeplan.errors import input_error

__all__ = [
    "SampleSize",
    "power_two_sample",
    "animals_per_group",
    "with_attrition",
    "total_animals",
    "MAX_ANIMALS_PER_GROUP",
]

#: Searches stop here: beyond it the effect is too small to study with animals.
MAX_ANIMALS_PER_GROUP = 100_000
_MIN_PER_GROUP = 2


class SampleSize(NamedTuple):
    """Animals per group and the power that number reaches (unpacks as ``n, power``)."""

    n_per_group: int
    achieved_power: float


def _number(value, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) and not hasattr(value, "__float__"):
        raise TypeError(f"{name}: expected a number, got {type(value).__name__}")
    number = float(value)
    if not math.isfinite(number):
        raise input_error(name, f"got {value!r}", "give a finite number")
    return number


def _probability(value, name: str, *, high: float = 1.0) -> float:
    number = _number(value, name)
    if not 0.0 < number < high:
        raise input_error(name, f"got {value!r}", f"give a value between 0 and {high:g} (exclusive)")
    return number


def _standardised_effect(effect_size, sd) -> float:
    effect = _number(effect_size, "effect_size")
    spread = _number(sd, "sd")
    if spread <= 0:
        raise input_error("sd", f"got {sd!r}", "give the common standard deviation (> 0), in the effect's unit")
    if effect == 0:
        raise input_error("effect_size", "got 0", "give the smallest difference in means worth detecting")
    return abs(effect) / spread


def _nct_tail(critical: float, df: int, noncentrality: float, *, upper: bool) -> float:
    """P(T' > critical) (upper) or P(T' < -critical), T' noncentral t; integrated directly if scipy gives NaN."""
    value = stats.nct.sf(critical, df, noncentrality) if upper else stats.nct.cdf(-critical, df, noncentrality)
    if math.isfinite(value):
        return float(value)
    # T' = (Z + δ) / sqrt(V / df), V ~ chi2(df): condition on V and integrate the normal tail.
    sign = 1.0 if upper else -1.0

    def integrand(v: float) -> float:
        return stats.norm.cdf(sign * noncentrality - critical * math.sqrt(v / df)) * stats.chi2.pdf(v, df)

    total, _ = integrate.quad(integrand, 0.0, math.inf)
    return min(1.0, max(0.0, float(total)))


def _power(n: int, d: float, alpha: float, two_sided: bool) -> float:
    df = 2 * n - 2
    noncentrality = d * math.sqrt(n / 2.0)
    if two_sided:
        critical = float(stats.t.ppf(1.0 - alpha / 2.0, df))
        upper = _nct_tail(critical, df, noncentrality, upper=True)
        return upper + _nct_tail(critical, df, noncentrality, upper=False)
    return _nct_tail(float(stats.t.ppf(1.0 - alpha, df)), df, noncentrality, upper=True)


def power_two_sample(n_per_group: int, effect_size: float, sd: float, *, alpha: float = 0.05, two_sided: bool = True) -> float:
    """Power of the two-sample t test with ``n_per_group`` animals in each of two groups.

    Parameters
    ----------
    n_per_group : int
        Animals per group, >= 2.
    effect_size : float
        Difference in group means worth detecting, in the outcome's unit.
    sd : float
        Common standard deviation of the outcome, same unit, > 0.
    alpha : float
        Significance level (type I error), 0 < alpha < 1.
    two_sided : bool
        Two-sided test (default) or one-sided in the direction of the effect.

    Returns
    -------
    float
        Probability of rejecting the null hypothesis when the true difference is ``effect_size``.

    Notes
    -----
    With d = |effect_size| / sd, df = 2n - 2, noncentrality δ = d √(n/2) and
    critical value c = t⁻¹(1 - α/2, df): power = P(T'_{df,δ} > c) + P(T'_{df,δ} < -c),
    T' noncentral t.  One-sided: c = t⁻¹(1 - α, df), power = P(T' > c).

    References
    ----------
    Cohen, J., Statistical Power Analysis for the Behavioral Sciences, 2nd ed.
    (Erlbaum, 1988), ch. 2.

    Examples
    --------
    >>> round(power_two_sample(64, 0.5, 1.0), 3)
    0.801
    """
    if isinstance(n_per_group, bool) or not isinstance(n_per_group, int) and not hasattr(n_per_group, "__index__"):
        raise TypeError(f"n_per_group: expected a whole number, got {type(n_per_group).__name__}")
    n = int(n_per_group)
    if n < _MIN_PER_GROUP:
        raise input_error("n_per_group", f"got {n}", f"give at least {_MIN_PER_GROUP} animals per group")
    d = _standardised_effect(effect_size, sd)
    return _power(n, d, _probability(alpha, "alpha"), bool(two_sided))


def animals_per_group(
    effect_size: float,
    sd: float,
    *,
    alpha: float = 0.05,
    power: float = 0.8,
    two_sided: bool = True,
    comparisons: int = 1,
) -> SampleSize:
    """Smallest number of animals per group for a two-sample t test to reach ``power``.

    Parameters
    ----------
    effect_size : float
        Difference in group means worth detecting, in the outcome's unit (e.g. SBR units).
    sd : float
        Common standard deviation of the outcome, same unit, > 0.
    alpha : float
        Significance level, 0 < alpha < 1.
    power : float
        Required power (1 - type II error), 0 < power < 1.
    two_sided : bool
        Two-sided test (default).
    comparisons : int
        Number of planned pairwise comparisons; alpha is divided by it
        (Bonferroni), the common conservative choice for several groups.

    Returns
    -------
    SampleSize
        ``(n_per_group, achieved_power)``; the achieved power is at least ``power``.

    Raises
    ------
    InputError
        Non-finite inputs, sd <= 0, zero effect, probabilities outside (0, 1),
        or an effect so small that more than :data:`MAX_ANIMALS_PER_GROUP` would be needed.

    Notes
    -----
    Starts from the normal approximation n ≈ 2 ((z_{1-α/2} + z_{power}) / d)²
    and steps n down and up, computing the exact power
    (:func:`power_two_sample`) until the smallest n >= 2 reaching ``power`` is
    found; power increases with n.

    References
    ----------
    Cohen, J., Statistical Power Analysis for the Behavioral Sciences, 2nd ed.
    (Erlbaum, 1988), Table 2.4.1.

    Examples
    --------
    >>> n, achieved = animals_per_group(0.5, 1.0)
    >>> n, round(achieved, 4)
    (64, 0.8015)
    """
    d = _standardised_effect(effect_size, sd)
    target = _probability(power, "power")
    if isinstance(comparisons, bool) or not isinstance(comparisons, int) or comparisons < 1:
        raise input_error("comparisons", f"got {comparisons!r}", "give the number of planned comparisons (>= 1)")
    level = _probability(alpha, "alpha") / comparisons
    sided = bool(two_sided)
    z_alpha = stats.norm.ppf(1.0 - (level / 2.0 if sided else level))
    z_power = stats.norm.ppf(target)
    guess = 2.0 * ((z_alpha + z_power) / d) ** 2
    if guess > MAX_ANIMALS_PER_GROUP:
        raise input_error(
            "effect_size",
            f"{effect_size!r} with sd {sd!r} needs about {guess:.3g} animals per group",
            "study a larger effect or a less variable outcome",
        )
    n = max(_MIN_PER_GROUP, math.ceil(guess))
    while n > _MIN_PER_GROUP and _power(n - 1, d, level, sided) >= target:
        n -= 1
    achieved = _power(n, d, level, sided)
    while achieved < target:
        n += 1
        if n > MAX_ANIMALS_PER_GROUP:
            raise input_error(
                "effect_size",
                f"more than {MAX_ANIMALS_PER_GROUP} animals per group needed",
                "study a larger effect or a less variable outcome",
            )
        achieved = _power(n, d, level, sided)
    return SampleSize(n, achieved)


def with_attrition(n_per_group: int, attrition: float) -> int:
    """Animals to start with so that ``n_per_group`` remain after an expected loss.

    Parameters
    ----------
    n_per_group : int
        Animals needed at the end of the study, per group.
    attrition : float
        Expected fraction lost before the final measurement (failed injections,
        tumours not taking, early humane endpoints), 0 <= attrition < 1.

    Returns
    -------
    int
        ceil(n / (1 - attrition)).

    Notes
    -----
    Inflating the group by 1 / (1 - attrition) is common practice, no source;
    the expected attrition should come from the laboratory's own records and
    be stated in the protocol.

    Examples
    --------
    >>> with_attrition(26, 0.1)
    29
    """
    if isinstance(n_per_group, bool) or not isinstance(n_per_group, int) and not hasattr(n_per_group, "__index__"):
        raise TypeError(f"n_per_group: expected a whole number, got {type(n_per_group).__name__}")
    n = int(n_per_group)
    if n < 1:
        raise input_error("n_per_group", f"got {n}", "give at least 1 animal per group")
    loss = _number(attrition, "attrition")
    if not 0.0 <= loss < 1.0:
        raise input_error("attrition", f"got {attrition!r}", "give the expected fraction lost, 0 <= attrition < 1")
    # Round away binary noise (e.g. 18 / 0.9 = 20.000000000000004) before the ceiling.
    return math.ceil(round(n / (1.0 - loss), 9))


def total_animals(n_per_group: int, n_groups: int, *, attrition: float = 0.0) -> int:
    """Total animals for ``n_groups`` equal groups, allowing for attrition.

    Parameters
    ----------
    n_per_group : int or SampleSize
        Animals needed per group at the end of the study.
    n_groups : int
        Number of groups, >= 1.
    attrition : float
        Expected fraction lost, as :func:`with_attrition`.

    Returns
    -------
    int
        ``n_groups * with_attrition(n_per_group, attrition)``.

    Examples
    --------
    >>> total_animals(animals_per_group(0.8, 1.0), 3, attrition=0.1)
    87
    """
    if isinstance(n_per_group, SampleSize):
        n_per_group = n_per_group.n_per_group
    if isinstance(n_groups, bool) or not isinstance(n_groups, int) or n_groups < 1:
        raise input_error("n_groups", f"got {n_groups!r}", "give the number of groups (>= 1)")
    return n_groups * with_attrition(n_per_group, attrition)
