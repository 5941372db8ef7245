"""Q-statistic limits (absolve.residual_limits.q_limit) against scipy.stats and Monte Carlo quantiles.

Jackson & Mudholkar (1979), Box (1954) and Imhof (1961) are the methods; the references are the
chi-square distribution (scipy.stats) where Q is exactly a scaled chi-square, and quantiles of
simulated weighted sums of squared normals otherwise.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from absolve.errors import AbsolveError
from absolve.residual_limits import q_limit


def test_q_limit_box_is_exact_for_equal_eigenvalues() -> None:
    # Q = c * chi2(n) exactly; reference quantile from scipy.stats.chi2.
    for n, c, alpha in ((10, 1.0, 0.05), (3, 2.5, 0.01), (40, 0.2, 0.1)):
        assert q_limit([c] * n, alpha, method="box") == pytest.approx(c * scipy.stats.chi2.isf(alpha, n), rel=1e-12)
        assert q_limit([c] * n, alpha, method="imhof") == pytest.approx(c * scipy.stats.chi2.isf(alpha, n), rel=1e-6)
        # Jackson & Mudholkar reduce to a Wilson-Hilferty-type cube-root approximation here: within 3 %.
        assert q_limit([c] * n, alpha) == pytest.approx(c * scipy.stats.chi2.isf(alpha, n), rel=0.03)


@pytest.mark.slow
def test_q_limit_against_monte_carlo_quantiles() -> None:
    rng = np.random.default_rng(24)
    spectra = {"geometric": 0.7 ** np.arange(12), "spread": np.linspace(0.1, 3.0, 40)}
    for name, eigenvalues in spectra.items():
        draws = (rng.standard_normal((200_000, eigenvalues.size)) ** 2) @ eigenvalues
        for alpha in (0.05, 0.01):
            empirical = np.quantile(draws, 1.0 - alpha)
            # Imhof is exact up to quadrature error: Monte Carlo error of 200 000 draws is well under 1 %.
            assert q_limit(eigenvalues, alpha, method="imhof") == pytest.approx(empirical, rel=0.01), name
            # The moment approximations: within 5 % for these well-spread spectra (measured 0.2-4.4 %).
            assert q_limit(eigenvalues, alpha) == pytest.approx(empirical, rel=0.05), name
            assert q_limit(eigenvalues, alpha, method="box") == pytest.approx(empirical, rel=0.05), name


def test_q_limit_batches_and_validates() -> None:
    sets = np.array([[1.0, 0.5, 0.25], [2.0, 2.0, 2.0]])
    limits = q_limit(sets, 0.05)
    assert isinstance(limits, np.ndarray) and limits.shape == (2,)
    assert limits[0] == pytest.approx(q_limit(sets[0], 0.05))
    with pytest.raises(AbsolveError, match="unknown Q-limit method"):
        q_limit([1.0], 0.05, method="exactly")  # type: ignore[arg-type]
    with pytest.raises(AbsolveError, match="eigenvalues must be finite"):
        q_limit([-1.0, 2.0], 0.05)
    with pytest.raises(AbsolveError, match="alpha must be"):
        q_limit([1.0], 0.0)


def test_the_docstring_example_holds() -> None:
    import doctest

    from absolve import residual_limits

    outcome = doctest.testmod(residual_limits)
    assert outcome.attempted > 0 and outcome.failed == 0
