"""Hash splits: the same row lands in the same part whatever the row order or the file, at the asked shares."""

from __future__ import annotations

import hashlib

import duckdb
import pytest

import dbfit
from dbfit.expressions.source import source_relation
from dbfit.expressions.splits import Holdout, KFold, labelled_rows


def parts(con, split) -> dict[int, str]:
    query = labelled_rows(source_relation("rows"), split).sql(dialect="duckdb")
    return {key: str(part) for key, part in con.execute(f"SELECT id, dbfit_part FROM ({query})").fetchall()}


def test_parts_are_stable_across_files_and_row_orders(tmp_path):
    first, second = duckdb.connect(str(tmp_path / "a.duckdb")), duckdb.connect(str(tmp_path / "b.duckdb"))
    first.execute("CREATE TABLE rows AS SELECT i AS id, i % 7 AS x FROM range(5000) r(i) ORDER BY i")
    second.execute("CREATE TABLE rows AS SELECT i AS id, i % 7 AS x FROM range(5000) r(i) ORDER BY hash(i)")
    for split in (Holdout("id", 0.25), KFold("id", 5)):
        assert parts(first, split) == parts(second, split)
    # Reference: Python's hashlib MD5 of the key's text, the definition of the split.
    expected = {
        i: ("holdout" if int(hashlib.md5(str(i).encode()).hexdigest()[:8], 16) / 2**32 < 0.25 else "train")
        for i in range(5000)
    }
    assert parts(first, Holdout("id", 0.25)) == expected


def test_part_sizes_are_within_one_percent_of_the_shares(con):
    con.execute("CREATE TABLE rows AS SELECT i AS id FROM range(1000000) r(i)")
    for share in (0.1, 0.3):
        counts = dict(
            con.execute(
                f"SELECT dbfit_part, count(*) FROM ({labelled_rows(source_relation('rows'), Holdout('id', share)).sql('duckdb')}) GROUP BY 1"
            ).fetchall()
        )
        assert abs(counts["holdout"] / 1_000_000 - share) < 0.01 * share
    folds = dict(
        con.execute(
            f"SELECT dbfit_part, count(*) FROM ({labelled_rows(source_relation('rows'), KFold('id', 4)).sql('duckdb')}) GROUP BY 1"
        ).fetchall()
    )
    assert sorted(folds) == [0, 1, 2, 3] and all(abs(n / 250_000 - 1) < 0.01 for n in folds.values())


@pytest.mark.parametrize("split", [Holdout("id", 0.0), Holdout("id", 1.0), KFold("id", 1)])
def test_bad_split_options_are_refused(split):
    with pytest.raises(dbfit.FitError):
        labelled_rows(source_relation("rows"), split)


def test_split_key_injection_is_refused():
    with pytest.raises(dbfit.FormulaError):
        labelled_rows(source_relation("rows"), Holdout("id); DROP TABLE rows; --", 0.2))
