-- Refit by re-running fit with the same name: the morning shift only, stored as version 2.
SELECT model, version, term, estimate
FROM dbfit.fit(
    'late_deliveries',
    'late ~ distance_km + parcel_kg + depot + tier + dispatch_hour + rain',
    'SELECT * FROM deliveries WHERE dispatch_hour < 12',
    reference := MAP {'depot': 'North', 'tier': 'standard'}
);

-- The pinned view still scores with version 1, the live view now with version 2.
SELECT count(*) AS deliveries_scored_differently
FROM late_risk_v1 AS pinned
JOIN late_risk_live AS live USING (delivery_id)
WHERE abs(pinned.probability - live.probability) > 1e-9;
