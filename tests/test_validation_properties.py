"""Validation of every recipe under random malformed and very large tables.

Property: whatever table a user hands over, a recipe's ``validate`` either
returns a dataset or raises the workbench's own :class:`WorkbenchError` with
a one-line message; never another exception (which the command line would
show as a traceback). Tables come from two strategies: tables built from
scratch out of odd cells, and each recipe's own demo table with a few
mutations (the deeper checks only run on tables that pass the first ones).

Large tables (100,000 rows) are either summed to distinct covariate rows or
refused with a message naming the limit; never built into a huge model.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from workbench import registry, tables
from workbench.errors import DataError, WorkbenchError

RECIPES = registry.load().recipes
LARGE = 100_000

HOSTILE_TEXT = ['<script>alert(1)</script>', 'a "b" & c', "Zürich ✓ 🌲", "x" * 300, "line\nbreak",
                "", " ", "nan", "inf", "1e400", "-0", "３", "0x10", "1,5", "None", "\x00"]

cells = st.one_of(
    st.integers(min_value=-(2**70), max_value=2**70),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0, 1, 2, 10, 100, -1, 0.5, 1e300, float("nan")]),
    st.sampled_from(HOSTILE_TEXT),
    st.text(max_size=8),
    st.none(),
    st.booleans(),
)


def _scenario(name):
    recipe = RECIPES[name]
    demo = recipe.demo(np.random.default_rng(0))
    return recipe, recipe.read_options(demo.options), demo.table


@st.composite
def odd_tables(draw, names: list[str]) -> pd.DataFrame:
    """A table from scratch: some of the expected columns, extra ones, odd cells."""
    pool = names + ["group", "Distance", "weird col", "<b>x</b>", "age\n", "cohort "]
    columns = draw(st.lists(st.sampled_from(pool), min_size=0, max_size=len(pool), unique=True))
    rows = draw(st.integers(min_value=0, max_value=6))
    frame = {}
    for column in columns:
        kind = draw(st.sampled_from(["int", "float", "text", "mixed"]))
        if kind == "int":
            values = draw(st.lists(st.integers(-5, 500), min_size=rows, max_size=rows))
        elif kind == "float":
            values = draw(st.lists(st.floats(allow_nan=True, allow_infinity=True), min_size=rows, max_size=rows))
        elif kind == "text":
            values = draw(st.lists(st.sampled_from(HOSTILE_TEXT), min_size=rows, max_size=rows))
        else:
            values = draw(st.lists(cells, min_size=rows, max_size=rows))
        frame[column] = pd.Series(values, dtype=object if kind == "mixed" else None)
    return pd.DataFrame(frame)


@st.composite
def mutated_tables(draw, table: pd.DataFrame) -> pd.DataFrame:
    """The demo table with a few mutations: odd cells, dropped, duplicated or retyped columns."""
    table = table.copy()
    for _ in range(draw(st.integers(min_value=1, max_value=3))):
        what = draw(st.sampled_from(["cell", "cell", "drop_column", "duplicate_rows", "shuffle",
                                     "categorical", "datetime", "negate", "huge", "truncate"]))
        column = draw(st.sampled_from(list(table.columns))) if len(table.columns) else None
        if column is None:
            break
        if what == "cell" and len(table):
            row = draw(st.integers(0, len(table) - 1))
            table[column] = table[column].astype(object)
            table.iloc[row, table.columns.get_loc(column)] = draw(cells)
        elif what == "drop_column":
            table = table.drop(columns=[column])
        elif what == "duplicate_rows" and len(table):
            table = pd.concat([table, table.iloc[: draw(st.integers(1, len(table)))]], ignore_index=True)
        elif what == "shuffle":
            table = table.sample(frac=1.0, random_state=draw(st.integers(0, 99))).reset_index(drop=True)
        elif what == "categorical":
            table[column] = table[column].astype("category")
        elif what == "datetime":
            table[column] = pd.Timestamp("2024-01-01") + pd.to_timedelta(np.arange(len(table)), unit="D")
        elif what == "negate" and pd.api.types.is_numeric_dtype(table[column]):
            table[column] = -table[column]
        elif what == "huge" and pd.api.types.is_numeric_dtype(table[column]):
            table[column] = table[column] * 1e19
        elif what == "truncate":
            table = table.iloc[: draw(st.integers(0, 2))]
    return table


def assert_validates_or_says_why(recipe, options, table):
    try:
        data = recipe.validate(table, options)
    except WorkbenchError as err:
        message = str(err)
        assert message and "\n" not in message, repr(message)
        return
    assert data.rows >= 1
    assert data.rows <= max(len(table), 1)


@pytest.mark.parametrize("name", sorted(RECIPES))
# A numerical warning during validation means a value slipped through unchecked.
@pytest.mark.filterwarnings("error::RuntimeWarning")
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_table_from_scratch_validates_or_raises_a_workbench_error(name, data):
    recipe, options, demo = _scenario(name)
    table = data.draw(odd_tables(list(demo.columns)))
    assert_validates_or_says_why(recipe, options, table)


@pytest.mark.parametrize("name", sorted(RECIPES))
# A numerical warning during validation means a value slipped through unchecked.
@pytest.mark.filterwarnings("error::RuntimeWarning")
@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_mutated_demo_table_validates_or_raises_a_workbench_error(name, data):
    recipe, options, demo = _scenario(name)
    table = data.draw(mutated_tables(demo))
    assert_validates_or_says_why(recipe, options, table)


@pytest.mark.parametrize("name", sorted(RECIPES))
def test_demo_table_read_back_from_csv_validates(name, tmp_path):
    recipe, options, demo = _scenario(name)
    path = tmp_path / "demo.csv"
    demo.to_csv(path, index=False)
    assert recipe.validate(tables.read_table(path), options).rows >= 1


# --- large tables -------------------------------------------------------------------------


def test_large_threshold_table_is_summed_to_distinct_rows():
    recipe, options, _ = _scenario("threshold-geometry")
    rng = np.random.default_rng(3)
    distance = rng.choice([1.0, 2, 3, 5, 8, 13, 21], size=LARGE)
    group = rng.choice(["north", "south", "east"], size=LARGE)
    attempts = rng.integers(1, 20, size=LARGE)
    successes = rng.binomial(attempts, 0.5)
    table = pd.DataFrame({"distance": distance, "attempts": attempts, "successes": successes,
                          "group": group})
    data = recipe.validate(table, options)
    assert data.rows == 7 * 3
    assert data["attempts"].sum() == attempts.sum() and data["successes"].sum() == successes.sum()
    assert sum(len(rows) for rows in data.source_rows) == LARGE


def test_large_threshold_table_with_distinct_rows_names_the_limit():
    recipe, options, _ = _scenario("threshold-geometry")
    distance = 1.0 + np.arange(LARGE) / 1000
    table = pd.DataFrame({"distance": distance, "attempts": 10, "successes": 5})
    with pytest.raises(DataError, match=f"at most {tables.MAX_MODEL_ROWS} .*found {LARGE}"):
        recipe.validate(table, options)


def _large_cohort_table(outcomes: list[str]) -> pd.DataFrame:
    cohorts = np.repeat(np.arange(LARGE // 2), 2)
    table = pd.DataFrame({"cohort": [f"c{c}" for c in cohorts], "age": np.tile([1.0, 2.0], LARGE // 2),
                          "exposed": 50})
    for k, name in enumerate(outcomes):
        table[name] = np.tile([k + 1, k + 2], LARGE // 2)
    return table


@pytest.mark.parametrize("name, outcomes", [("timing-curve", ["events"]),
                                            ("competing-risks", ["solved", "withdrawn"])])
def test_large_cohort_table_names_the_limit(name, outcomes):
    # Cohorts cannot be summed: each is its own multinomial and cohort
    # homogeneity is one of the assumptions checked.
    recipe, options, _ = _scenario(name)
    with pytest.raises(DataError, match=f"at most {tables.MAX_MODEL_ROWS} .*found {LARGE}"):
        recipe.validate(_large_cohort_table(outcomes), options)


def test_large_stage_table_names_the_limit():
    recipe, options, demo = _scenario("stage-transitions")
    stages = list(options["stages"])
    cohorts = np.repeat(np.arange(LARGE // 2), 2)
    table = pd.DataFrame({"cohort": cohorts, "period": np.tile([0, 1], LARGE // 2)})
    for s, name in enumerate(stages):
        table[name] = np.tile([10, 8] if s == 0 else [0, 2] if s == 1 else [0, 0], LARGE // 2)
    with pytest.raises(DataError, match=f"at most {tables.MAX_MODEL_ROWS} .*found {LARGE}"):
        recipe.validate(table, options)


# --- cases the properties found -------------------------------------------------------------


@pytest.mark.parametrize("name", sorted(RECIPES))
def test_table_with_columns_but_no_rows_is_refused(name):
    recipe, options, demo = _scenario(name)
    with pytest.raises(DataError, match="expected at least one data row; found none"):
        recipe.validate(demo.iloc[:0], options)


def test_count_too_large_for_float64_is_refused():
    # 2^53 + 2 reads back as a different whole number in float64 (IEEE 754 double).
    table = pd.DataFrame({"distance": [1.0, 2.0], "attempts": [10, 2**53 + 2], "successes": [5, 5]})
    recipe, options, _ = _scenario("threshold-geometry")
    with pytest.raises(DataError, match=r"column 'attempts' row 2 \(line 3\): expected a count <= 2\^53"):
        recipe.validate(table, options)


def test_period_too_large_for_float64_is_refused():
    recipe, options, demo = _scenario("stage-transitions")
    table = demo.copy()
    table["period"] = table["period"] * 1e19
    with pytest.raises(DataError, match=r"column 'period' row \d+ \(line \d+\): expected a number within ±2\^53"):
        recipe.validate(table, options)


@pytest.mark.parametrize("name, column", [("threshold-geometry", "distance"), ("timing-curve", "age"),
                                          ("competing-risks", "age"), ("stage-transitions", "period")])
def test_a_measurement_too_large_for_the_models_arithmetic_is_refused_with_its_row(name, column):
    recipe, options, demo = _scenario(name)
    table = demo.copy()
    table[column] = table[column].astype(float)
    table.loc[table.index[1], column] = 1e300
    with pytest.raises(DataError, match=rf"column '{column}' row 2 \(line 3\): expected a number "
                                        rf"within ±2\^53; found 1e\+300"):
        recipe.validate(table, options)
