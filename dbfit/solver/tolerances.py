"""Every tolerance and limit of the Newton passes, in one place, with its meaning.

All step sizes are the largest absolute change of a coefficient on the internal (standardised) scale.
"""

from __future__ import annotations

MAX_HALVINGS = 30  # most step-halvings in a row before a rising point is accepted (Nocedal and Wright 2006)
RISE_TOLERANCE = 1e-12  # relative rise of the objective taken as rounding in the sums, not as a rise
STEP_TOLERANCE = 1e-4  # largest step accepted at convergence together with a small relative deviance change
STEP_FLOOR = 1e-7  # a step this small is convergence whatever the deviance change (STEP_TOLERANCE * 1e-3)
# a converged step no larger needs no confirming scan where the rules allow it (segments): the standard errors
# move by 0.4 to 0.6 times the step, relative, the covariance by at most the step relative to its largest
# entry, the log-likelihood by the step squared (measured on scikit-learn's breast cancer and statsmodels'
# spector data)
UNCONFIRMED_STEP = 1e-11
FINAL_STEP = 1e-10  # largest step of a converged penalised or Firth fit (steps cost little against a scan)
ALIAS_TOLERANCE = 1e-10  # share of a column's variance left after projecting on earlier columns: aliased
COLLAPSED_WEIGHT = 1e-10  # largest information diagonal, per unit of total weight, of a start fitted at 0/1
SINGULAR_RATIO = 1e-10  # smallest over largest eigenvalue of an information matrix taken as singular
SEPARATION_CHANGE = 1e-4  # relative deviance change below which steady step sizes mean separation
SWEEP_TOLERANCE = 1e-15  # coordinate descent: largest change in a sweep, relative to 1 + max |b|
MAX_SWEEPS = 100_000  # coordinate descent: most sweeps over the coefficients for one inner solve
