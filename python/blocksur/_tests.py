"""Results of hypothesis tests."""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["HypothesisTestResult"]


@dataclass(frozen=True)
class HypothesisTestResult:
    """The outcome of one hypothesis test.

    Attributes
    ----------
    name : what was tested with which statistic (e.g. ``"Wald"``, ``"Breusch-Pagan LM"``)
    h0 : the null hypothesis H0, in words
    statistic : the test statistic
    dist : its reference distribution under the null: ``"chi2"`` or ``"F"``
    df : degrees of freedom (numerator for F)
    df_denom : denominator degrees of freedom for F, else None
    pvalue : probability of a statistic at least this large under the null

    Example
    -------
    >>> r = HypothesisTestResult("Wald", "b = 0", 5.99, "chi2", 2, None, 0.05004)
    >>> print(r)
    Wald: chi2(2) = 5.990, p = 0.05004; not rejected at the 5% level (H0: b = 0)
    """

    name: str
    h0: str
    statistic: float
    dist: str
    df: float
    df_denom: float | None
    pvalue: float

    def verdict(self, level: float = 0.05) -> str:
        """One line: the statistic, the p-value and the decision at ``level``."""
        d = f"{self.dist}({self.df:g}" + (f", {self.df_denom:g})" if self.df_denom is not None else ")")
        decision = "rejected" if self.pvalue < level else "not rejected"
        return (
            f"{self.name}: {d} = {self.statistic:.3f}, p = {self.pvalue:.4g}; "
            f"{decision} at the {100 * level:g}% level (H0: {self.h0})"
        )

    def rejects(self, level: float = 0.05) -> bool:
        """Whether the null is rejected at ``level``."""
        return self.pvalue < level

    def __str__(self) -> str:
        return self.verdict()
