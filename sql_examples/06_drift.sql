-- Drift: the afternoon deliveries against the rows version 2 (the morning shift) was fitted on.
-- Population stability index per variable; readings by common practice: below about 0.1 stable,
-- 0.1 to 0.25 some shift, above about 0.25 a large shift.
SELECT variable, kind, bins, round(psi, 4) AS psi, reading
FROM dbfit.drift('late_deliveries', 'SELECT * FROM deliveries WHERE dispatch_hour >= 12')
ORDER BY psi DESC;
