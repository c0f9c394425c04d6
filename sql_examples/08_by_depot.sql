-- One model per depot, all fitted in the same scans of the table; each is stored as 'late_by_depot.<depot>'
-- and is an ordinary model of its depot's rows (score, assess or refit it by that name).
SELECT model, version, segment, term, estimate, std_error, note
FROM dbfit.fit('late_by_depot', 'deliveries', 'late ~ distance_km + parcel_kg + rain', by := 'depot');
SELECT model, rows_used, converged FROM dbfit.models() ORDER BY model;
SELECT count(*) AS north_rows_scored
FROM dbfit.score('late_by_depot.North', 'SELECT * FROM deliveries WHERE depot = ''North''');
