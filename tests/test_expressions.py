"""Tests for pipeline.expressions.

Reference semantics: Python's own operators (computed directly with numpy) for arithmetic,
comparison and precedence; SQL's three-valued logic (ISO/IEC 9075, the Kleene truth tables for
AND, OR, NOT) for missing values, checked literally against the tables and, on random data,
against pandas' nullable boolean arrays, which implement the same Kleene logic independently.
"""

from __future__ import annotations

import builtins
import itertools
import json

import numpy as np
import pandas as pd
import pytest

from pipeline.errors import ConfigError, ExpressionError
from pipeline.expressions import CompiledExpression, compile_expression

KEY = "indicators.smoker.condition"


def compile_ok(text: str, columns) -> CompiledExpression:
    return compile_expression(text, columns=columns, key_path=KEY)


def compile_error(text, columns=("age", "internet", "region", "smoker", "income")) -> ExpressionError:
    with pytest.raises(ExpressionError) as info:
        compile_expression(text, columns=columns, key_path=KEY)
    error = info.value
    # Every single problem is one line naming the key path.
    assert str(error).startswith(f"{KEY}:")
    for line in error.problems or [error.message]:
        assert line.startswith(f"{KEY}:") and "\n" not in line
    return error


def as_truth(true: np.ndarray, unknown: np.ndarray) -> list[str]:
    return ["U" if u else ("T" if t else "F") for t, u in zip(true, unknown)]


# --------------------------------------------------------------------------------------------
# Three-valued logic


# ISO/IEC 9075 (SQL) truth tables for AND, OR and NOT over {True, False, Unknown}, rows in the
# order p = T,T,T,F,F,F,U,U,U and q = T,F,U repeated.
SQL_P = ["T", "T", "T", "F", "F", "F", "U", "U", "U"]
SQL_Q = ["T", "F", "U"] * 3
SQL_AND = ["T", "F", "U", "F", "F", "F", "U", "F", "U"]
SQL_OR = ["T", "T", "T", "T", "F", "U", "T", "U", "U"]
SQL_NOT_P = ["F", "F", "F", "T", "T", "T", "U", "U", "U"]


def _truth_column(letters, dtype):
    mapping = {"T": True, "F": False, "U": None}
    return pd.array([mapping[x] for x in letters], dtype=dtype)


def _code_column(letters):
    # 1 means true for "a == 1", 0 false, NA unknown.
    return pd.array([{"T": 1, "F": 0, "U": None}[x] for x in letters], dtype="Int64")


@pytest.mark.parametrize(
    ("text", "expected"),
    [("p and q", SQL_AND), ("p or q", SQL_OR), ("not p", SQL_NOT_P)],
)
def test_kleene_tables_on_boolean_columns_match_iso_iec_9075(text, expected):
    frame = pd.DataFrame({"p": _truth_column(SQL_P, "boolean"), "q": _truth_column(SQL_Q, "boolean")})
    true, unknown = compile_ok(text, ["p", "q"]).evaluate_three_valued(frame)
    assert as_truth(true, unknown) == expected


@pytest.mark.parametrize(
    ("text", "expected"),
    [("a == 1 and b == 1", SQL_AND), ("a == 1 or b == 1", SQL_OR), ("not a == 1", SQL_NOT_P)],
)
def test_kleene_tables_on_comparisons_with_missing_match_iso_iec_9075(text, expected):
    frame = pd.DataFrame({"a": _code_column(SQL_P), "b": _code_column(SQL_Q)})
    true, unknown = compile_ok(text, ["a", "b"]).evaluate_three_valued(frame)
    assert as_truth(true, unknown) == expected
    # evaluate() counts unknown as not selected.
    np.testing.assert_array_equal(compile_ok(text, ["a", "b"]).evaluate(frame), [x == "T" for x in expected])


def test_three_operand_and_or_follow_kleene_logic():
    frame = pd.DataFrame({"p": _truth_column(SQL_P, "boolean"), "q": _truth_column(SQL_Q, "boolean")})
    for text, reference in [
        ("p and q and true", frame.p & frame.q & True),
        ("p or q or false", frame.p | frame.q | False),
        ("p and q or not p", (frame.p & frame.q) | ~frame.p),
    ]:
        true, unknown = compile_ok(text, ["p", "q"]).evaluate_three_valued(frame)
        np.testing.assert_array_equal(unknown, reference.isna().to_numpy(), err_msg=text)
        np.testing.assert_array_equal(true, reference.fillna(False).to_numpy(dtype=bool), err_msg=text)


# --------------------------------------------------------------------------------------------
# Random frames against direct pandas computations


def random_frame(n: int = 1000, seed: int = 20240611) -> pd.DataFrame:
    """Columns of the kinds a survey file holds, each with some missing values."""
    rng = np.random.default_rng(seed)
    holes = lambda share: rng.random(n) < share  # noqa: E731
    age = pd.array(rng.integers(0, 100, n), dtype="Int64")
    age[holes(0.1)] = pd.NA
    income = rng.gamma(2.0, 1000.0, n)
    income[holes(0.1)] = np.nan
    region = pd.Series(rng.choice(["R1", "R2", "R3", "R4"], n))  # pandas 3 default str dtype
    region[holes(0.1)] = None
    code = pd.Series(rng.choice(["a", "b", "c"], n), dtype=object)
    code[holes(0.1)] = None
    smoker = pd.array(rng.random(n) < 0.3, dtype="boolean")
    smoker[holes(0.1)] = pd.NA
    return pd.DataFrame(
        {
            "age": age,
            "income": income,
            "household_size": rng.integers(0, 6, n),  # zeros give division by zero
            "sex": rng.integers(1, 3, n),
            "region": region,
            "code": code,
            "smoker": smoker,
        }
    )


def nullable(frame: pd.DataFrame) -> pd.DataFrame:
    """The same data in pandas' nullable dtypes, whose operators propagate NA (Kleene logic)."""
    return pd.DataFrame(
        {
            "age": frame.age,
            "income": pd.array(frame.income.to_numpy(), dtype="Float64"),
            "household_size": pd.array(frame.household_size.to_numpy(), dtype="Int64"),
            "sex": pd.array(frame.sex.to_numpy(), dtype="Int64"),
            "region": frame.region.astype(pd.StringDtype("python")),  # comparisons give BooleanArray
            "code": frame.code.astype(pd.StringDtype("python")),
            "smoker": frame.smoker,
        }
    )


def sql_isin(series: pd.Series, values) -> pd.Series:
    # pandas' isin says False for NA; SQL says unknown.
    return series.isin(values).astype("boolean").mask(series.isna())


def per_capita(r: pd.DataFrame) -> pd.Series:
    return (r.income / r.household_size).mask(r.household_size == 0)


REFERENCES = {
    "age >= 15 and age <= 64": lambda r: (r.age >= 15) & (r.age <= 64),
    "age < 15 or income > 3000": lambda r: (r.age < 15) | (r.income > 3000),
    "not (age > 30)": lambda r: ~(r.age > 30),
    "not age > 30 or sex == 2": lambda r: ~(r.age > 30) | (r.sex == 2),
    "region in ['R1', 'R2']": lambda r: sql_isin(r.region, ["R1", "R2"]),
    "region not in ['R1', 'R2']": lambda r: ~sql_isin(r.region, ["R1", "R2"]),
    "age in [1, 2, 3, -1, 50.0]": lambda r: sql_isin(r.age, [1, 2, 3, -1, 50]),
    "not is_missing(income) and income / household_size < 1200": lambda r: ~r.income.isna() & (per_capita(r) < 1200),
    "income / household_size >= 500 or is_missing(region)": lambda r: (per_capita(r) >= 500) | r.region.isna(),
    "smoker or age > 60": lambda r: r.smoker | (r.age > 60),
    "smoker and not smoker": lambda r: r.smoker & ~r.smoker,
    "smoker == true and sex != 1": lambda r: (r.smoker == True) & (r.sex != 1),  # noqa: E712
    "household_size * 2 - 1 >= age / 10": lambda r: (r.household_size * 2 - 1) >= (r.age / 10),
    "-age + 100 > income / 100": lambda r: (-r.age + 100) > (r.income / 100),
    "code == 'b' or code < 'b'": lambda r: (r.code == "b") | (r.code < "b"),
    "code >= \"b\" and region != 'R3'": lambda r: (r.code >= "b") & (r.region != "R3"),
    "sex == 1 and (age < 18 or age >= 65) and region != 'R3'": (
        lambda r: (r.sex == 1) & ((r.age < 18) | (r.age >= 65)) & (r.region != "R3")
    ),
    "is_missing(age) or is_missing(region) or is_missing(smoker)": (
        lambda r: r.age.isna() | r.region.isna() | r.smoker.isna()
    ),
    "income == income": lambda r: r.income == r.income,
    "age > 200 or true": lambda r: (r.age > 200) | True,
    "age > 20 and false": lambda r: (r.age > 20) & False,
    "age * 1e3 > 2.5e4": lambda r: (r.age * 1000.0) > 25000.0,
}


@pytest.mark.parametrize("text", sorted(REFERENCES))
def test_evaluate_matches_direct_pandas_computation_on_random_frame(text):
    frame = random_frame()
    reference = REFERENCES[text](nullable(frame)).astype("boolean")
    true, unknown = compile_ok(text, frame.columns).evaluate_three_valued(frame)
    np.testing.assert_array_equal(unknown, reference.isna().to_numpy())
    np.testing.assert_array_equal(true, reference.fillna(False).to_numpy(dtype=bool))
    selected = compile_ok(text, frame.columns).evaluate(frame)
    assert isinstance(selected, np.ndarray) and selected.dtype == bool and selected.shape == (len(frame),)
    np.testing.assert_array_equal(selected, true)


def test_random_frame_exercises_missing_values_and_zero_divisors():
    # Guard for the test above: the random data must actually contain what it is meant to test.
    frame = random_frame()
    assert frame.isna().sum().loc[["age", "income", "region", "code", "smoker"]].min() > 50
    assert (frame.household_size == 0).sum() > 50


def test_evaluate_accepts_a_mapping_of_arrays():
    data = {"age": np.array([10, 20, 30]), "region": ["R1", None, "R2"], "weight": np.ones(3)}
    compiled = compile_ok("age > 15 and region in ['R1', 'R2']", ["age", "region", "weight"])
    np.testing.assert_array_equal(compiled.evaluate(data), [False, False, True])


def test_constant_expression_has_one_entry_per_record():
    frame = pd.DataFrame({"age": np.arange(5)})
    np.testing.assert_array_equal(compile_ok("true", ["age"]).evaluate(frame), np.ones(5, dtype=bool))
    np.testing.assert_array_equal(compile_ok("1 > 2", ["age"]).evaluate(frame), np.zeros(5, dtype=bool))
    assert compile_ok("age > 1", ["age"]).evaluate(frame.iloc[:0]).shape == (0,)


def test_result_is_a_fresh_writable_array():
    frame = pd.DataFrame({"flag": np.array([True, False])})
    selected = compile_ok("flag", ["flag"]).evaluate(frame)
    selected[:] = False  # must not write through to the frame
    assert frame.flag.tolist() == [True, False]


# --------------------------------------------------------------------------------------------
# Precedence and associativity (reference: Python's own operators)


def test_precedence_not_binds_looser_than_comparison_and_and_tighter_than_or():
    values = np.array(list(itertools.product([1, 2, 3], repeat=3)))
    frame = pd.DataFrame(values, columns=["a", "b", "c"])
    a, b, c = values.T
    selected = compile_ok("not a == 1 or b == 2 and c == 3", ["a", "b", "c"]).evaluate(frame)
    expected = np.array([(not x == 1) or (y == 2 and z == 3) for x, y, z in values])  # Python's precedence
    np.testing.assert_array_equal(selected, expected)
    # The data tells the groupings apart, so the check above is not vacuous.
    assert not np.array_equal(expected, ~((a == 1) | (b == 2)) & (c == 3))
    assert not np.array_equal(expected, (~(a == 1) | (b == 2)) & (c == 3))


@pytest.mark.parametrize(
    ("text", "python"),
    [
        ("a - b - c == x", lambda a, b, c: a - b - c),
        ("a / b / c == x", lambda a, b, c: a / b / c),
        ("a + b * c == x", lambda a, b, c: a + b * c),
        ("(a + b) * c == x", lambda a, b, c: (a + b) * c),
        ("a / b * c == x", lambda a, b, c: a / b * c),
        ("-a * b - c == x", lambda a, b, c: -a * b - c),
        ("a * -b == x", lambda a, b, c: a * -b),
        ("- -a == x", lambda a, b, c: -(-a)),
    ],
)
def test_arithmetic_precedence_and_left_associativity_match_python(text, python):
    rng = np.random.default_rng(7)
    a, b, c = (rng.integers(1, 9, 200).astype(float) for _ in range(3))
    x = python(a, b, c)
    frame = pd.DataFrame({"a": a, "b": b, "c": c, "x": x})
    assert compile_ok(text, frame.columns).evaluate(frame).all()


def test_comparison_binds_looser_than_arithmetic():
    frame = pd.DataFrame({"a": [1, 2, 3]})
    np.testing.assert_array_equal(compile_ok("a + 1 > 2 * 1.5", ["a"]).evaluate(frame), [False, False, True])


# --------------------------------------------------------------------------------------------
# in / not in, is_missing


def test_in_and_not_in_with_numbers():
    frame = pd.DataFrame({"x": pd.array([1, 2, 3, -1, None], dtype="Int64")})
    check = lambda text: compile_ok(text, ["x"]).evaluate_three_valued(frame)  # noqa: E731
    assert as_truth(*check("x in [1, -1]")) == ["T", "F", "F", "T", "U"]
    assert as_truth(*check("x not in [1, -1]")) == ["F", "T", "T", "F", "U"]
    assert as_truth(*check("x in [2.0, 3,]")) == ["F", "T", "T", "F", "U"]  # 2.0 == 2, trailing comma


def test_in_and_not_in_with_strings_and_escaped_quotes():
    frame = pd.DataFrame({"name": ["O'Brien", 'say "hi"', "plain", None]})
    check = lambda text: compile_ok(text, ["name"]).evaluate_three_valued(frame)  # noqa: E731
    assert as_truth(*check("name in ['O\\'Brien', \"say \\\"hi\\\"\"]")) == ["T", "T", "F", "U"]
    assert as_truth(*check("name not in ['plain']")) == ["T", "T", "F", "U"]
    assert as_truth(*check("name == 'back\\\\slash'")) == ["F", "F", "F", "U"]


def test_is_missing_is_never_unknown():
    frame = random_frame()
    for text in ["is_missing(age)", "not is_missing(age)", "is_missing(region) or is_missing(income)"]:
        _, unknown = compile_ok(text, frame.columns).evaluate_three_valued(frame)
        assert not unknown.any(), text
    np.testing.assert_array_equal(compile_ok("is_missing(age)", frame.columns).evaluate(frame), frame.age.isna())


def test_unknown_counts_as_not_selected():
    frame = pd.DataFrame({"age": pd.array([20, None], dtype="Int64")})
    # Neither a condition nor its negation selects a record whose value is missing.
    assert compile_ok("age > 15", ["age"]).evaluate(frame).tolist() == [True, False]
    assert compile_ok("not age > 15", ["age"]).evaluate(frame).tolist() == [False, False]


# --------------------------------------------------------------------------------------------
# Column types


@pytest.mark.parametrize(
    "values",
    [
        pd.Series([16, 70, 40, 0], dtype="int8"),
        pd.Series([16, 70, 40, 0], dtype="uint8"),
        pd.Series([16, 70, 40, 0], dtype="int64"),
        pd.Series([16.0, 70.0, 40.0, np.nan], dtype="float64"),
        pd.Series([16, 70, 40, None], dtype="Int64"),
        pd.Series([16.0, 70.0, 40.0, None], dtype="Float64"),
        pd.Series([16, 70, 40, None], dtype="int64[pyarrow]"),
        pd.Series([16, 70, 40, None], dtype="category"),
        pd.Series([16, 70, 40, None], dtype=object),
    ],
    ids=lambda s: str(s.dtype),
)
def test_numeric_column_types(values):
    frame = pd.DataFrame({"age": values})
    check = lambda text: as_truth(*compile_ok(text, ["age"]).evaluate_three_valued(frame))  # noqa: E731
    last = "U" if values.isna().iloc[3] else "F"
    assert check("age >= 15 and age <= 64")[:3] == ["T", "F", "T"]
    assert check("age in [16, 40]")[:3] == ["T", "F", "T"]
    # Arithmetic is done in float64: 70 * 4 must not wrap around in an 8-bit column.
    assert check("age * 4 > 255") == ["F", "T", "F", last]
    assert check("age > -1")[:3] == ["T", "T", "T"]
    assert check("age > 300") == ["F", "F", "F", last]


def test_float_nan_and_nullable_int_na_are_missing():
    frame = pd.DataFrame(
        {"f": [1.0, np.nan, 3.0], "i": pd.array([1, None, 3], dtype="Int64")}
    )
    for column in ["f", "i"]:
        true, unknown = compile_ok(f"{column} != 0", ["f", "i"]).evaluate_three_valued(frame)
        assert as_truth(true, unknown) == ["T", "U", "T"]
        assert compile_ok(f"is_missing({column})", ["f", "i"]).evaluate(frame).tolist() == [False, True, False]


@pytest.mark.parametrize(
    "values",
    [
        pd.Series(["R1", "R2", "R3", None]),  # pandas 3 default str dtype, NaN for missing
        pd.Series(["R1", "R2", "R3", None], dtype=object),
        pd.Series(["R1", "R2", "R3", None], dtype="string"),  # pd.NA for missing
        pd.Series(["R1", "R2", "R3", None], dtype="string[pyarrow]"),
        pd.Series(["R1", "R2", "R3", None], dtype="category"),
    ],
    ids=lambda s: str(s.dtype),
)
def test_string_column_types(values):
    frame = pd.DataFrame({"region": values})
    check = lambda text: as_truth(*compile_ok(text, ["region"]).evaluate_three_valued(frame))  # noqa: E731
    assert check("region == 'R1'") == ["T", "F", "F", "U"]
    assert check('region != "R1"') == ["F", "T", "T", "U"]
    assert check("region in ['R1', 'R3']") == ["T", "F", "T", "U"]
    assert check("region < 'R2'") == ["T", "F", "F", "U"]  # Python's string ordering
    assert check("is_missing(region)") == ["F", "F", "F", "T"]


def test_pandas_3_default_string_dtype_is_what_the_frame_holds():
    # Guard for the parametrisation above: pandas 3 infers its str dtype, not object.
    assert pd.api.types.is_string_dtype(pd.Series(["a", None]).dtype)
    assert pd.Series(["a", None]).dtype != object


def test_all_missing_column_is_unknown_whatever_its_use():
    frame = pd.DataFrame({"x": pd.Series([None, None], dtype=object), "y": [1, 2]})
    for text in ["x == 'a'", "x + 1 > y", "x in [1]", "x == y", "x"]:
        true, unknown = compile_ok(text, ["x", "y"]).evaluate_three_valued(frame)
        assert unknown.all() and not true.any(), text
    assert compile_ok("is_missing(x)", ["x"]).evaluate(frame).all()


def test_two_columns_compared():
    frame = pd.DataFrame({"a": [1, 2, None], "b": pd.array([1, 3, 3], dtype="Int64")})
    assert as_truth(*compile_ok("a < b", ["a", "b"]).evaluate_three_valued(frame)) == ["F", "T", "U"]


# --------------------------------------------------------------------------------------------
# Division by zero


def test_division_by_zero_is_unknown_not_infinite():
    frame = pd.DataFrame({"income": [100.0, 100.0, 0.0, -5.0], "size": [2, 0, 0, 0]})
    columns = ["income", "size"]
    assert as_truth(*compile_ok("income / size > 0", columns).evaluate_three_valued(frame)) == ["T", "U", "U", "U"]
    # Neither side of the comparison selects a record with a zero divisor.
    assert compile_ok("not (income / size > 0)", columns).evaluate(frame).tolist() == [False] * 4
    assert compile_ok("income / size < 1e300", columns).evaluate(frame).tolist() == [True, False, False, False]
    assert compile_ok("size == 0 or income / size > 10", columns).evaluate(frame).tolist() == [True] * 4
    assert compile_ok("1 / 0 == 1 / 0", columns).evaluate(frame).tolist() == [False] * 4


# --------------------------------------------------------------------------------------------
# Compiled object


def test_columns_lists_every_column_read():
    compiled = compile_ok("is_missing(smoker) or age > 3 and age < 9", {"age": {}, "smoker": {}, "sex": {}})
    assert compiled.columns == frozenset({"age", "smoker"})
    assert compiled.text == "is_missing(smoker) or age > 3 and age < 9"
    assert compile_ok("true", ["age"]).columns == frozenset()


def test_long_or_chain_compiles_and_evaluates():
    text = " or ".join(f"age == {i}" for i in range(300))
    frame = pd.DataFrame({"age": np.arange(400)})
    assert compile_ok(text, ["age"]).evaluate(frame).sum() == 300


def test_language_never_reaches_python_eval(monkeypatch):
    def forbidden(*args, **kwargs):
        raise AssertionError("the expression language must not call eval/exec/compile")

    for name in ["eval", "exec", "compile"]:
        monkeypatch.setattr(builtins, name, forbidden)
    frame = random_frame(50)
    compiled = compile_ok("age >= 15 and region in ['R1'] or not is_missing(smoker)", frame.columns)
    compiled.evaluate(frame)


# --------------------------------------------------------------------------------------------
# Errors, each naming the key path, the expression, the position and the problem


def test_error_message_format_for_a_function_call():
    error = compile_error("open('x')")
    assert str(error) == (
        f"{KEY}: unexpected 'open(' at position 0 in \"open('x')\": only is_missing(column) may be called"
    )
    assert isinstance(error, ConfigError) and error.exit_code == 2


def test_unknown_column_with_did_you_mean():
    error = compile_error("internt == 3")
    message = str(error)
    assert "unknown column 'internt' at position 0" in message
    assert "did you mean 'internet'?" in message
    assert "declared columns: age, income, internet, region, smoker" in message


def test_unknown_column_long_declaration_is_not_listed():
    columns = [f"column_{i}" for i in range(40)] + ["internet"]
    message = str(compile_error("internt == 3", columns))
    assert "did you mean 'internet'?" in message and "column_7" not in message


def test_several_unknown_columns_are_collected():
    error = compile_error("agee > 1 and regio == 'R1'")
    assert error.message.startswith(f'{KEY}: 2 problems in expression "agee > 1 and regio == \'R1\'"')
    assert len(error.problems) == 2
    assert "unknown column 'agee' at position 0" in error.problems[0] and "did you mean 'age'?" in error.problems[0]
    assert "unknown column 'regio' at position 13" in error.problems[1]


@pytest.mark.parametrize(
    ("text", "fragments"),
    [
        ("open('x')", ["'open('", "position 0", "only is_missing(column) may be called"]),
        ("age > 1 or exec('x')", ["'exec('", "position 11", "only is_missing(column) may be called"]),
        ("__import__('os').system('ls')", ["'__import__('", "position 0", "only is_missing"]),
        ("age.real > 3", ["'.real'", "position 3", "attribute access is not allowed"]),
        ("region.upper() == 'R1'", ["'.upper'", "position 6", "attribute access"]),
        ("'a'.join(region) == 'R1'", ["'.join'", "position 3", "attribute access"]),
        ("__class__ == 1", ["'__class__'", "position 0", "names starting with '__' are not allowed"]),
        ("age == __builtins__", ["'__builtins__'", "position 7", "'__'"]),
        ("is_missing(__dict__)", ["position 11", "is_missing takes exactly one column name"]),
        ("age > 3 4", ["unexpected '4' at position 8", "expected an operator"]),
        ("age > 3 region", ["unexpected 'region' at position 8"]),
        ("age > 3 and", ["unexpected end of the expression at position 11", "after 'and'"]),
        ("(age > 3", ["unclosed '(' at position 0", "expected ')'"]),
        ("((age > 3) and (region == 'R1')", ["unclosed '(' at position 0"]),
        ("age > 3)", ["unexpected ')' at position 7", "no '(' for it to close"]),
        ("", ["empty expression at position 0", 'in ""']),
        ("   ", ["empty expression at position 0"]),
        ("age + 1", ["'age + 1' is a number at position 0", "whole expression must be a true/false condition"]),
        ("'R1'", ["is a string at position 0", "whole expression"]),
        ("3", ["'3' is a number", "whole expression"]),
        ("15 <= age < 65", ["unexpected '<' after a comparison at position 10", "comparisons do not chain"]),
        ("age == 1 == true", ["position 9", "comparisons do not chain"]),
        ("age < 3 in [1]", ["position 8", "comparisons do not chain"]),
        ("[1, 2] == age", ["unexpected '[' at position 0", "only follow 'in' or 'not in'"]),
        ("age == [1, 2]", ["unexpected '[' at position 7", "only follow 'in' or 'not in'"]),
        ("age[0] == 1", ["'age['", "indexing is not allowed"]),
        ("age in (1, 2)", ["expected '[' after 'in' at position 7", "square brackets"]),
        ("age not in 3", ["expected '[' after 'not in' at position 11"]),
        ("age in []", ["empty list at position 7"]),
        ("age in [1, 'a']", ["list mixes numbers and strings at position 11"]),
        ("age in [region]", ["unexpected 'region' in a list at position 8", "numbers or strings"]),
        ("age in [1, 2", ["unclosed '[' at position 7"]),
        ("age in [1 2]", ["unexpected '2' in a list at position 10", "expected ',' or ']'"]),
        ("lambda: 1", ["unexpected 'lambda' at position 0", "Python syntax"]),
        ("age if age > 1 else 0", ["unexpected 'if' at position 4", "Python syntax"]),
        ("age = 3", ["unexpected '=' at position 4", "'=='"]),
        ("age > 1 && age < 3", ["unexpected '&&' at position 8", "'and'"]),
        ("age > 1 | age < 3", ["unexpected '|' at position 8", "'or'"]),
        ("age ** 2 > 3", ["unexpected '**' at position 4"]),
        ("age <> 3", ["unexpected '<>' at position 4", "'!='"]),
        ("!smoker", ["unexpected '!' at position 0", "'not'"]),
        ("age is None", ["unexpected 'is' at position 4", "is_missing(column)"]),
        ("age == None", ["unexpected 'None' at position 7", "is_missing(column)"]),
        ("age == null", ["unknown column 'null' at position 7", "is_missing(column)"]),
        ("True", ["unexpected 'True' at position 0", "lower case: 'true'"]),
        ("age > 1 AND age < 3", ["unexpected 'AND' at position 8", "lower case: 'and'"]),
        ("age == 'x", ["unterminated string at position 7"]),
        ("age == 'a\\n'", ["unsupported escape '\\n' at position 9"]),
        ("age > 3x", ["malformed number '3x' at position 6"]),
        ("age > 1.2.3", ["malformed number '1.2.3' at position 6"]),
        ("age > 1 ; age < 2", ["unexpected character ';' at position 8"]),
        ("age > 1e999", ["too large", "position 6"]),
        ("is_missing(age + 1)", ["position 11", "is_missing takes exactly one column name"]),
        ("is_missing()", ["position 11", "is_missing takes exactly one column name"]),
        ("is_missing(age, region)", ["position 11", "is_missing takes exactly one column name"]),
        ("is_missing == 1", ["unexpected 'is_missing' at position 0", "is_missing(column)"]),
        ("is_missing(agee)", ["unknown column 'agee' at position 11", "did you mean 'age'?"]),
        ("age + 'a' > 1", ["\"'a'\" is a string at position 6", "'+' needs numbers on both sides"]),
        ("-'a' == region", ["is a string at position 1", "'-' needs a number"]),
        ("1 and age > 2", ["'1' is a number at position 0", "'and' needs a true/false condition"]),
        ("not age + 1", ["'age + 1' is a number at position 4", "'not' needs a true/false condition"]),
        ("1 == 'a'", ["'1' (a number) is compared with \"'a'\" (a string) at position 2"]),
        ("true < age", ["'<' cannot order true/false values at position 5"]),
        ("age + 1 in ['a']", ["'age + 1' is a number but the list holds strings at position 0"]),
        (
            "region == 'R1' and region + 1 > 2",
            ["column 'region' is used in arithmetic with '+' at position 19", "at position 0 it is compared with a string"],
        ),
        ("(" * 60 + "age > 1" + ")" * 60, ["nests too deeply"]),
        (" + ".join(["age"] * 250) + " > 1", ["too long or deep"]),
    ],
)
def test_compile_errors_name_key_path_position_and_problem(text, fragments):
    message = str(compile_error(text))
    assert f"in {json.dumps(text)}" in message  # the expression is quoted in full
    for fragment in fragments:
        assert fragment in message, message


def test_error_quotes_expressions_with_double_quotes_and_newlines_on_one_line():
    error = compile_error('region == "R1" and\nfoo')
    assert str(error).startswith(f"{KEY}: unknown column 'foo' at position 19 in \"region == \\\"R1\\\" and\\nfoo\": ")
    assert "\n" not in str(error)


def test_non_string_expression_from_yaml_is_an_error():
    error = compile_error(True)  # e.g. "universe: true" without quotes in YAML
    assert "expected an expression in quotes, got bool True" in str(error)


def test_default_key_path():
    with pytest.raises(ExpressionError, match=r"^expression: unknown column 'x'"):
        compile_expression("x == 1", columns=["age"])


# --------------------------------------------------------------------------------------------
# Errors found when the data is seen


def evaluate_error(text: str, frame: pd.DataFrame) -> str:
    compiled = compile_ok(text, frame.columns)
    with pytest.raises(ExpressionError) as info:
        compiled.evaluate(frame)
    message = str(info.value)
    assert message.startswith(f"{KEY}:") and f'"{text}"' in message
    return message


def test_numeric_column_compared_with_string_is_an_error_at_evaluate():
    frame = pd.DataFrame({"age": pd.array([1, None], dtype="Int64")})
    message = evaluate_error("age == '15'", frame)
    assert "column 'age' holds numbers but is compared with a string at position 0" in message
    assert "without quotes" in message


def test_string_column_compared_with_number_is_an_error_at_evaluate():
    frame = pd.DataFrame({"region": ["R1", "R2"]})
    message = evaluate_error("region in [1, 2]", frame)
    assert "column 'region' holds strings but is tested against a list of numbers at position 0" in message
    message = evaluate_error("region > 3", frame)
    assert "column 'region' holds strings but is compared with a number" in message
    assert "column 'region' holds strings but is used in arithmetic with '+'" in evaluate_error("region + 1 > 3", frame)


def test_several_column_type_mismatches_are_collected():
    frame = pd.DataFrame({"age": [1, 2], "region": ["R1", "R2"]})
    compiled = compile_ok("age == 'x' or region == 1", frame.columns)
    with pytest.raises(ExpressionError) as info:
        compiled.evaluate(frame)
    assert len(info.value.problems) == 2
    assert "column 'age' holds numbers" in info.value.problems[0]
    assert "column 'region' holds strings" in info.value.problems[1]


def test_column_against_column_type_mismatch_is_an_error_at_evaluate():
    frame = pd.DataFrame({"age": [1, 2], "region": ["R1", "R2"]})
    message = evaluate_error("age == region", frame)
    assert "column 'age' holds numbers but column 'region' holds strings at position 4" in message


def test_integer_column_alone_is_not_a_condition():
    frame = pd.DataFrame({"smoker": [0, 1]})
    message = evaluate_error("smoker", frame)
    assert "column 'smoker' holds numbers but is used as the whole condition" in message
    message = evaluate_error("smoker and true", frame)
    assert "is used with 'and'" in message


def test_unusable_column_types_are_errors():
    frame = pd.DataFrame(
        {"when": pd.to_datetime(["2024-01-01", "2024-01-02"]), "mixed": pd.Series([1, "a"], dtype=object)}
    )
    assert "column 'when' has type datetime64" in evaluate_error("when > 1", frame)
    assert "column 'mixed' has mixed or unsupported values" in evaluate_error("mixed == 1", frame)


def test_column_absent_from_the_data_is_an_error():
    compiled = compile_ok("age > 1 and region == 'R1'", ["age", "region"])
    with pytest.raises(ExpressionError, match=r"column 'region' is not in the data at position 12"):
        compiled.evaluate(pd.DataFrame({"age": [1, 2]}))
