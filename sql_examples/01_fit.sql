-- Fit the chance that a courier delivery runs late, inside DuckDB, and store it as model 'late_deliveries'.
-- Run on the demo database (dbfit demo) with:  dbfit sql sql_examples/01_fit.sql --database dbfit_demo.duckdb
SELECT model, version, term, estimate, std_error, p_value, odds_ratio
FROM dbfit.fit(
    'late_deliveries',
    'late ~ distance_km + parcel_kg + depot + tier + dispatch_hour + rain',
    'deliveries',
    reference := MAP {'depot': 'North', 'tier': 'standard'}
);
