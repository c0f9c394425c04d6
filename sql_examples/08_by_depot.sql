-- One model per depot, all fitted in the same scans of the table; each is stored as 'late_by_depot.<depot>'
-- and is an ordinary model of its depot's rows (score, assess or refit it by that name).
SELECT model, version, segment, term, estimate, std_error, note
FROM dbfit.fit('late_by_depot', 'late ~ distance_km + parcel_kg + rain', 'deliveries', by := 'depot');
SELECT model, rows_used, converged FROM dbfit.models() ORDER BY model;
SELECT count(*) AS north_rows_scored
FROM dbfit.score('late_by_depot.North', 'SELECT * FROM deliveries WHERE depot = ''North''');
-- One view that scores every delivery with its own depot's model:
SELECT * FROM dbfit.publish_segments('late_by_depot', 'deliveries', 'late_by_depot_risk');
SELECT depot, count(probability) AS scored, avg(probability) AS mean_risk
FROM late_by_depot_risk GROUP BY depot ORDER BY depot;
