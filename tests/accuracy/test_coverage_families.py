"""95 % ellipse coverage by scene family, cheap version of tests/benchmarks/coverage_table.py.

Invented scenes on the exact simulator (locate.synth) with a ground reflection (coefficient
0.3-1), the source height unknown (0-2 m, fixed with the default 1 m +- 0.6 m), mic positions
written N(0, 5 cm) off and the air temperature N(0, 2 degC) off, both declared (see the
benchmark's docstring).  The 95 % ellipse is chi-square with 2 dof (5.991, scipy.stats.chi2).
Fixed seed, 30 trials per family (120 in all): the pooled coverage must lie in 88-99 %
(binomial standard error of a true 95 % over 120 trials: 2 %; issue 18).
"""

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
import coverage_table as ct  # noqa: E402


@pytest.mark.slow
def test_coverage_of_the_95_percent_ellipse_over_the_scene_families():
    covered, total = 0, 0
    per_family = {}
    for fam in ct.FAMILIES:
        share, n, _ = ct.coverage(fam, 30, seed=1818)
        per_family[fam] = share
        covered += round(share * n)
        total += n
    pooled = covered / total
    assert 0.88 <= pooled <= 0.99, per_family
    assert all(s >= 0.8 for s in per_family.values()), per_family  # no family far off
