-- Score deliveries without leaving SQL: probability per row, with a 90% interval on request.
SELECT depot, tier, count(*) AS deliveries, avg(probability) AS mean_risk, avg(late::INTEGER) AS observed_rate
FROM dbfit.score('late_deliveries', 'deliveries')
GROUP BY depot, tier
ORDER BY mean_risk DESC;

SELECT delivery_id, distance_km, depot, probability, probability_low, probability_high
FROM dbfit.score('late_deliveries', 'SELECT * FROM deliveries WHERE rain AND tier = ''express''', 1,
                 standard_error := true, level := 0.9)
ORDER BY probability DESC
LIMIT 5;
