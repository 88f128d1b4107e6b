"""The data ledger: every step from rows read to rows analysed, counted and in order."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from premises.errors import DataError, DriftError
from premises.formula import FormulaTransform
from premises.ledger import apply_ledger, check_columns
from premises.spec import BlockSpec, ExclusionSpec, TransformSpec


def _spec(**kw) -> BlockSpec:
    return BlockSpec(id="t", data="d.csv", model="y ~ x", **kw)


@pytest.fixture()
def frame() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "id": ["a", "b", "c", "d", "e", "f"],
            "x": [1.0, 2.0, 400.0, 4.0, np.nan, 6.0],
            "y": [2.0, 4.1, 6.0, 8.2, 9.9, 50.0],
            "g": ["u", "u", "v", "v", "w", "w"],
        }
    )


def ids(frame: pd.DataFrame) -> list[str]:
    return list(frame["id"])


def test_steps_run_exclusions_then_missing_then_transforms(frame: pd.DataFrame) -> None:
    spec = _spec(
        id_column="id",
        exclude=(
            ExclusionSpec(reason="typo", when="x > 100", expect=1, key="exclude[0]"),
            ExclusionSpec(reason="notebook", ids=("f",), key="exclude[1]"),
        ),
        transforms=(TransformSpec(column="x", op="log2", reason="doubling", key="transforms[0]"),),
    )
    out = apply_ledger(spec, frame, ids(frame), ("y", "x"))
    kinds = [s.kind for s in out.steps]
    assert kinds == ["exclude", "exclude", "missing", "transform"]
    first, second, missing, transform = out.steps
    assert (first.rows_before, first.rows_after, first.removed_ids) == (6, 5, ("c",))
    assert (second.rows_before, second.rows_after, second.removed_ids) == (5, 4, ("f",))
    assert (missing.rows_before, missing.rows_after, missing.removed_ids) == (4, 3, ("e",))
    assert dict(missing.missing_by_column) == {"y": 0, "x": 1}
    assert out.ids == ("a", "b", "d")
    assert list(out.rows) == [1, 2, 4]  # 1-based rows in the file
    # log2 applied on the analysed rows: numpy as the reference
    np.testing.assert_allclose(out.frame["x"], np.log2([1.0, 2.0, 4.0]))
    assert transform.reason == "doubling" and transform.rows_before == transform.rows_after == 3


def test_expect_mismatch_is_a_drift_error_naming_the_count(frame: pd.DataFrame) -> None:
    spec = _spec(exclude=(ExclusionSpec(reason="typo", when="x > 1", expect=1, key="exclude[0]"),))
    with pytest.raises(DriftError, match="matched 4 rows, but expect: 1"):
        apply_ledger(spec, frame, ids(frame), ("y", "x"))


def test_unknown_ids_are_reported(frame: pd.DataFrame) -> None:
    spec = _spec(id_column="id", exclude=(ExclusionSpec(reason="r", ids=("zz",), key="exclude[0]"),))
    with pytest.raises(DataError, match="zz"):
        apply_ledger(spec, frame, ids(frame), ("y", "x"))


def test_formula_transform_takes_reason_from_matching_entry(frame: pd.DataFrame) -> None:
    spec = _spec(transforms=(TransformSpec(column="y", op="log", reason="multiplicative", key="transforms[0]"),))
    out = apply_ledger(spec, frame.dropna(), ids(frame.dropna()), ("y", "x"), (FormulaTransform("log(y)", "log", "y"),))
    step = [s for s in out.steps if s.kind == "transform"]
    assert len(step) == 1 and step[0].source == "formula" and step[0].reason == "multiplicative"
    # not applied twice: the formula does it
    np.testing.assert_allclose(out.frame["y"], frame.dropna()["y"])


def test_log_of_non_positive_values_names_rows(frame: pd.DataFrame) -> None:
    bad = frame.assign(x=[1.0, -2.0, 3.0, 4.0, 5.0, 6.0])
    spec = _spec(transforms=(TransformSpec(column="x", op="log", key="transforms[0]"),))
    with pytest.raises(DataError, match="positive.*rows 2"):
        apply_ledger(spec, bad, [str(i) for i in range(1, 7)], ("y", "x"))


def test_winsorize_clips_at_the_quantiles(frame: pd.DataFrame) -> None:
    clean = frame.dropna()
    spec = _spec(transforms=(TransformSpec(column="y", op="winsorize", limits=(0.2, 0.8), as_="yw", key="transforms[0]"),))
    out = apply_ledger(spec, clean, ids(clean), ("yw", "x"))
    lo, hi = np.quantile(clean["y"], [0.2, 0.8])  # numpy quantiles as the reference
    np.testing.assert_allclose(out.frame["yw"], np.clip(clean["y"], lo, hi))


def test_missing_error_mode(frame: pd.DataFrame) -> None:
    with pytest.raises(DataError, match="1 rows have missing values"):
        apply_ledger(_spec(missing="error"), frame, ids(frame), ("y", "x"))


def test_no_rows_left(frame: pd.DataFrame) -> None:
    spec = _spec(exclude=(ExclusionSpec(reason="all", when="y > 0", key="exclude[0]"),))
    with pytest.raises(DataError, match="no rows are left"):
        apply_ledger(spec, frame, ids(frame), ("y", "x"))


def test_text_in_a_numeric_column_is_named(frame: pd.DataFrame) -> None:
    messy = frame.assign(x=["1", "2", "3", "n/a", "5", "6"])
    with pytest.raises(DataError, match="'x' holds numbers and 1 text entries"):
        apply_ledger(_spec(), messy, ids(frame), ("y", "x"))


def test_infinite_values_are_named(frame: pd.DataFrame) -> None:
    with pytest.raises(DataError, match="infinite"):
        apply_ledger(_spec(), frame.assign(y=[1.0, np.inf, 2, 3, 4, 5]), ids(frame), ("y", "x"))


def test_exclusions_undone_keeps_every_row(frame: pd.DataFrame) -> None:
    spec = _spec(exclude=(ExclusionSpec(reason="typo", when="x > 100", key="exclude[0]"),))
    out = apply_ledger(spec, frame, ids(frame), ("y", "x"), apply_exclusions=False)
    assert [s.kind for s in out.steps] == ["missing"] and len(out.frame) == 5


def test_unknown_columns_list_what_exists(frame: pd.DataFrame) -> None:
    with pytest.raises(DataError, match="Did you mean 'x'.*Columns in the data: id, x, y, g"):
        check_columns(_spec(groups="xx"), frame, ("y", "x"))
