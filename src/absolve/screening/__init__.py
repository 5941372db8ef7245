"""Interferent screening: does a scan hold something the reference library does not explain?

After a mixture fit, the residual ``measured - fitted`` should be instrument
noise and nothing else. Real photometric noise grows with absorbance and is
correlated along wavelength, so a plain chi-square on raw residuals either
raises false alarms (correlation inflates it) or misses real interferents
(a loose threshold). This module

1. whitens the residual with the instrument :class:`~absolve.library.NoiseModel`:
   divide by the noise standard deviation at the fitted absorbance, then undo the
   first-order autoregressive correlation along wavelength (the Prais-Winsten
   transform, i.e. the inverse Cholesky factor of the AR(1) covariance);
2. projects the whitened residual onto the orthogonal complement of the whitened
   design, which removes exactly the degrees of freedom the fit used, whatever
   fitting method (non-negative or not) produced the residual;
3. splits what is left into a smooth part (a cosine basis of a few dozen terms,
   whitened and orthogonalised the same way) and a rough part, and tests the
   smooth share with an F ratio. Interferents, turbidity, wavelength shifts and
   stray light all leave *smooth* residuals, while noise spreads evenly over all
   directions, so this test has far more power than an omnibus chi-square; and
   because it is a ratio of two energies measured in the same scan, an error in
   the noise model's overall scale cancels;
4. scans the same smooth subspace with a matched filter: Gaussian band
   templates (whitened and projected like the residual) at every centre, the
   largest normalised projection studentised by the rough part, its p-value
   from Rice's upcrossing bound for the maximum over a curve of templates.
   Absorbers add localised positive bands, so this one-sided test concentrates
   on one direction where the F test spreads over all smooth ones;
5. adds an omnibus chi-square on the whole whitened residual (against a noise
   level ``noise_tolerance`` times the model's, so only gross excess counts),
   for rough structure and noisy scans, combined with the other two by a
   weighted Bonferroni rule.

Flagged scans get a :class:`Diagnosis`: the smooth unexplained residual is
matched against shape templates (a foreign band, scattering, a wavelength
shift, a shortfall at high absorbance) and the best match is named with how
sure the match is. :func:`explain_with_suspects` refits with candidate
absorbers added and tests each with a boundary-aware F test.

References
----------
Box, G. E. P. (1954). Some theorems on quadratic forms applied in the study of
analysis of variance problems, I. Ann. Math. Statist. 25, 290-302.
ASTM E1655, Standard practices for infrared multivariate quantitative analysis
(spectral residual and outlier checks on prediction samples).
Durbin, J. & Watson, G. S. (1950). Testing for serial correlation in least
squares regression. Biometrika 37, 409-428; Ljung, G. M. & Box, G. E. P. (1978).
On a measure of lack of fit in time series models. Biometrika 65, 297-303.
Prais, S. J. & Winsten, C. B. (1954). Trend estimators and serial correlation.
Cowles Commission discussion paper 383.
Self, S. G. & Liang, K.-Y. (1987). Asymptotic properties of maximum likelihood
estimators and likelihood ratio tests under nonstandard conditions. JASA 82, 605-610.
Turin, G. L. (1960). An introduction to matched filters. IRE Trans. Inf. Theory 6,
311-329 (the matched filter).
Rice, S. O. (1944). Mathematical analysis of random noise. Bell Syst. Tech. J. 23,
282-332 (expected upcrossings); Hotelling, H. (1939). Tubes and spheres in n-spaces,
and a class of statistical problems. Amer. J. Math. 61, 440-460; Davies, R. B. (1977,
1987). Hypothesis testing when a nuisance parameter is present only under the
alternative. Biometrika 64, 247-254 and 74, 33-43; Knowles, M. & Siegmund, D. (1989).
On Hotelling's approach to testing for a nonlinear parameter in regression. Int.
Statist. Rev. 57, 205-220 (the maximum over a curve of templates).
"""

from __future__ import annotations

from ._library_bias import estimate_library_bias
from ._results import Diagnosis, DiagnosisKind, LibraryBias, Screening, SuspectReport
from ._screen import screen_residuals
from ._subspaces import smooth_basis
from ._suspects import explain_with_suspects
from ._whitening import prewhiten

__all__ = [
    "Diagnosis",
    "DiagnosisKind",
    "LibraryBias",
    "Screening",
    "SuspectReport",
    "estimate_library_bias",
    "explain_with_suspects",
    "prewhiten",
    "screen_residuals",
    "smooth_basis",
]
