"""The one table type: every body format gives the same matrix, and the encodings match
scikit-learn's reference transformers.

Data: palmerpenguins (Gorman, Williams & Fraser 2014), with its own missing values and
its categorical ``island`` column.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from palmerpenguins import load_penguins
from sklearn.impute import SimpleImputer
from sklearn.preprocessing import OneHotEncoder

from service import arrow_tables
from service.errors import InvalidInput
from service.tables import encoded_names, from_json

NUMERIC = ["bill_length_mm", "bill_depth_mm", "flipper_length_mm", "body_mass_g"]
ISLANDS = ["Biscoe", "Dream", "Torgersen"]


@pytest.fixture(scope="module")
def penguins():
    return load_penguins()[[*NUMERIC, "island", "species"]]


def _records(df) -> list[dict]:
    """pandas' records with NaN written as JSON null (as a client would send them)."""
    return [{k: (None if isinstance(v, float) and np.isnan(v) else v) for k, v in r.items()}
            for r in df.to_dict("records")]


def test_json_records_rows_and_arrow_give_one_matrix(penguins) -> None:
    df = penguins.drop(columns="species").dropna()
    feats = [*NUMERIC, "island"]
    cats = {"island": ISLANDS}
    by_records = from_json({"records": _records(df)}).matrix(feats, categories=cats).X
    by_rows = from_json({"columns": list(df.columns), "rows": df.to_numpy().tolist()}
                        ).matrix(feats, categories=cats).X
    by_arrow = arrow_tables.to_table(pa.Table.from_pandas(df, preserve_index=False)
                                     ).matrix(feats, categories=cats).X
    assert_array_equal(by_records, by_rows)
    assert_array_equal(by_records, by_arrow)
    assert by_records.shape == (len(df), len(encoded_names(feats, cats)))


def test_one_hot_matches_scikit_learn(penguins) -> None:
    df = penguins.dropna()
    X = from_json({"records": _records(df[["island"]])}).matrix(
        ["island"], categories={"island": ISLANDS}).X
    # reference: scikit-learn's OneHotEncoder with the same declared levels
    ref = OneHotEncoder(categories=[ISLANDS]).fit_transform(df[["island"]]).toarray()
    assert_array_equal(X, ref)
    assert encoded_names(["island"], {"island": ISLANDS}) == [f"island={v}" for v in ISLANDS]


def test_an_unknown_level_is_named(penguins) -> None:
    recs = _records(penguins[["island"]].head(5))
    recs[3]["island"] = "Anvers"
    with pytest.raises(InvalidInput) as err:
        from_json({"records": recs}).matrix(["island"], categories={"island": ISLANDS})
    assert err.value.errors[0]["field"] == "records[3]"
    assert "Anvers" in err.value.errors[0]["message"]


def test_own_mean_imputation_matches_scikit_learn(penguins) -> None:
    df = penguins[NUMERIC]
    assert df.isna().to_numpy().any()  # the data set's own gaps
    table = from_json({"records": _records(df)})
    with pytest.raises(InvalidInput) as err:
        table.matrix(NUMERIC)  # refused by default, naming the first gap
    first_gap = int(np.flatnonzero(df.isna().to_numpy().any(axis=1))[0])
    assert err.value.errors[0]["field"] == f"records[{first_gap}]"
    got = table.matrix(NUMERIC, fill="own")
    # reference: scikit-learn's SimpleImputer(strategy="mean")
    assert_allclose(got.X, SimpleImputer(strategy="mean").fit_transform(df), rtol=1e-12)
    assert got.imputed == int(df.isna().to_numpy().sum())
    assert got.imputed_by_feature == {f: int(n) for f, n in df.isna().sum().items() if n}


def test_given_fill_values_and_absent_keys(penguins) -> None:
    recs = [{"a": 1.0, "b": 2.0}, {"a": 3.0}, {"a": None, "b": 4.0}]
    got = from_json({"records": recs}).matrix(["a", "b"], fill=np.array([10.0, 20.0]))
    assert_array_equal(got.X, [[1, 2], [3, 20], [10, 4]])
    assert got.imputed == 2


def test_extra_columns_are_refused_unless_ignored() -> None:
    table = from_json({"columns": ["a", "id", "b"], "rows": [[1, "x", 2], [3, "y", 4]]})
    with pytest.raises(InvalidInput) as err:
        table.matrix(["a", "b"])
    assert err.value.errors[0]["field"] == "columns" and "id" in err.value.errors[0]["message"]
    assert_array_equal(table.matrix(["a", "b"], ignore_extra=True).X, [[1, 2], [3, 4]])
    assert_array_equal(table.matrix(["b", "a"], allowed=("id",)).X, [[2, 1], [4, 3]])
    assert table.column_values("id") == ["x", "y"]
