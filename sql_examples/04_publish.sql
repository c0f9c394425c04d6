-- Deploy: views any DuckDB client can query, with no dbfit installed.
-- late_risk_v1 carries version 1's estimates as constants; late_risk_live reads the newest stored version.
SELECT * FROM dbfit.publish('late_deliveries', 'deliveries', 'late_risk_v1', version := 1);
SELECT * FROM dbfit.publish('late_deliveries', 'deliveries', 'late_risk_live', live := true);

SELECT delivery_id, depot, dispatch_hour, probability
FROM late_risk_v1
WHERE probability > 0.6
ORDER BY probability DESC
LIMIT 5;
