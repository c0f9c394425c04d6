-- Clean up: drop one version, then the whole model, then the views.
SELECT * FROM dbfit.drop_model('late_deliveries', 1);
SELECT * FROM dbfit.drop_model('late_deliveries');
SELECT count(*) AS versions_left FROM dbfit.models();
DROP VIEW late_risk_v1;
DROP VIEW late_risk_live;
