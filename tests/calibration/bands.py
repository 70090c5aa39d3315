"""Acceptance bands for rates measured over m simulated datasets, and what they can detect.

A rate measured over m independent datasets is a binomial count over m. A band ``[lo, hi]`` is
judged by two exact binomial probabilities (``scipy.stats.binom``):

* its **false-alarm rate**: the chance that a method whose true rate is the nominal one
  (5 % rejections, 95 % coverage) falls outside the band;
* its **power** against a broken method: the chance that a method with a true rate ``p_bad``
  (a test of true size 7 %; an interval of true coverage 97.5 % or 91 %) falls outside.

A band is acceptable when the first is at most about 0.5 % and the second is stated.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from scipy import stats

__all__ = ["Band", "binomial_se"]


def binomial_se(p: float, m: int) -> float:
    """Monte Carlo SE of a rate p over m datasets: sqrt(p (1 - p) / m)."""
    return math.sqrt(p * (1.0 - p) / m)


@dataclass(frozen=True)
class Band:
    """Two-sided acceptance band for a rate measured over ``m`` datasets."""

    lo: float
    hi: float
    m: int
    nominal: float
    bad: tuple = ()  # true rates of broken methods the band should reject

    def _inside(self, p: float) -> float:
        # counts k with lo <= k / m <= hi (the small offsets absorb floating-point error)
        k_lo = math.ceil(self.lo * self.m - 1e-9)
        k_hi = math.floor(self.hi * self.m + 1e-9)
        return float(stats.binom.cdf(k_hi, self.m, p) - stats.binom.cdf(k_lo - 1, self.m, p))

    def contains(self, rate: float) -> bool:
        return self.lo - 1e-12 <= rate <= self.hi + 1e-12

    @property
    def false_alarm(self) -> float:
        """P(outside the band) for a method at the nominal rate."""
        return 1.0 - self._inside(self.nominal)

    def power(self, p_bad: float) -> float:
        """P(outside the band) for a method whose true rate is ``p_bad``."""
        return 1.0 - self._inside(p_bad)

    def describe(self) -> str:
        parts = [f"band {100 * self.lo:.1f}-{100 * self.hi:.1f} % over m = {self.m:,} "
                 f"(SE at nominal {100 * binomial_se(self.nominal, self.m):.2f} points; "
                 f"false alarm {100 * self.false_alarm:.2f} %"]
        parts += [f"; power against a true {100 * p:.1f} %: {100 * self.power(p):.1f} %"
                  for p in self.bad]
        return "".join(parts) + ")"
