-- What the store holds: every version, one version's coefficients, and the encoding scoring relies on.
SELECT model, version, created_at, rows_used, source_rows, deviance, aic, converged, warnings_count
FROM dbfit.models();

SELECT term, estimate, ci_low, ci_high, odds_ratio
FROM dbfit.coefficients('late_deliveries')
ORDER BY abs(wald_z) DESC;

SELECT expression, kind, levels, reference
FROM dbfit_store.factors
WHERE model = 'late_deliveries' AND version = 1
ORDER BY position;
