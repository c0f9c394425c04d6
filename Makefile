# Nightly refit of a stored model: refit (warm-started, skipped when the source is unchanged), gate, publish.
# A refused candidate (exit 3) or a data error (exit 4) stops the target with a message on stderr, so the
# scheduler sees a non-zero exit. Example cron line (02:30 every night):
#   30 2 * * * cd /srv/dbfit && make nightly DATABASE=/srv/data/courier.duckdb MODEL=late VIEW=late_scores >>/var/log/dbfit.log 2>&1

PYTHON ?= python
DATABASE ?= dbfit_demo.duckdb
MODEL ?= demo_late
VIEW ?= $(MODEL)_scores
DBFIT = $(PYTHON) -m dbfit

.PHONY: nightly
nightly:
	@$(DBFIT) refit $(MODEL) --database $(DATABASE) --skip-unchanged \
	  || { code=$$?; echo "nightly: refit of $(MODEL) failed with exit code $$code (3: a gate refused the candidate, 4: data or database error)" >&2; exit $$code; }
	@$(DBFIT) publish $(MODEL) --database $(DATABASE) --view $(VIEW) --live \
	  || { echo "nightly: publishing $(VIEW) failed" >&2; exit 4; }

# PSI of each variable between the training rows and NEW_SOURCE (a table, file or SELECT); prints JSON.
.PHONY: drift
drift:
	@$(DBFIT) drift $(MODEL) --database $(DATABASE) --source "$(NEW_SOURCE)" --json
