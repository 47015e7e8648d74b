"""csv_reader: the vectorized parse equals a cell-by-cell one; every bad file is one clear
error through the CLI (exit 2, the file and line named, nothing stored, no file contents
beyond column names)."""

import csv
import io

import numpy as np
import pytest
from conftest import DATA, invoke, write_recipe
from sklearn.datasets import load_iris

from runner.datasets.csv_reader import CsvFile, find_delimiter, split_csv
from runner.datasets.sources import load_dataset
from runner.recipe.loader import resolve


def settings(**data):
    return resolve({"data": data}, {}).data


def cell_by_cell(text: str, target: str, delimiter: str = ","):
    """The reference: Python's csv module and float() on every cell, rounded to float32 once
    (the parser the tool used before it was vectorized)."""
    lines = [l for l in text.splitlines() if l.strip() and not l.lstrip().startswith("#")]
    rows = list(csv.reader(io.StringIO("\n".join(lines)), delimiter=delimiter))
    header = [h.strip() for h in rows[0]]
    t = header.index(target)
    X = np.array([[float(c) for i, c in enumerate(r) if i != t] for r in rows[1:]]).astype(np.float32)
    y = [r[t].strip() for r in rows[1:]]
    return X, y


def recipe_for(tmp_path, source, target="y", extra=""):
    return write_recipe(
        tmp_path,
        f"""
        name = "data-check"
        seeds = [1, 2]
        [data]
        source = "{source}"
        target = "{target}"
        split = {{ val = 0.25, test = 0.0, stratify = false }}
        {extra}
        [model]
        hidden = [4]
        [train]
        epochs = 1
        """,
    )


def refused(tmp_path, recipe, *phrases):
    """`recipe check` and `recipe run` both exit 2 with one line holding every phrase, and
    leave no store behind."""
    for command in (("check", "--no-probe"), ("run", "--workers", "1")):
        result = invoke(command[0], recipe, *command[1:])
        assert result.exit_code == 2, result.output
        message = result.stderr.strip()
        assert message.startswith("error: ") and "\n" not in message, message
        assert "Traceback" not in result.output
        for phrase in phrases:
            assert phrase in message, (phrase, message)
    assert not (tmp_path / "runs").exists()
    return message


def test_vectorized_parse_equals_cell_by_cell_on_iris():
    """scikit-learn's bundled iris written as CSV (shortest round-trip digits, quoted and
    spaced cells, comments, blank lines, text labels) reads back as its float32 values, and
    equal to the cell-by-cell reference, with classes in sorted order."""
    iris = load_iris()
    names = ["setosa", "versicolor", "virginica"]
    lines = ["# iris, written by the test", "sl,sw,pl,pw,species", ""]
    for i, (row, label) in enumerate(zip(iris.data, iris.target)):
        cells = [repr(float(v)) for v in row]
        if i % 7 == 0:
            cells[1] = f'"{cells[1]}"'  # quoted
        if i % 5 == 0:
            cells[2] = f" {cells[2]} "  # padded: float() and numpy's reader both strip it
        lines.append(",".join(cells + [names[label]]))
    text = "\n".join(lines) + "\n"
    f = CsvFile(text.encode(), "iris.csv")
    table, y_cells = split_csv(f, "species")
    X_ref, y_ref = cell_by_cell(text, "species")
    X = np.stack([c.numbers for c in table.columns], axis=1).astype(np.float32)
    assert X.dtype == X_ref.dtype and np.array_equal(X, X_ref)
    assert np.array_equal(X, iris.data.astype(np.float32))
    assert y_cells == y_ref


def test_dataset_identical_to_reference_numeric_target(tmp_path):
    """Whole-number targets: the Dataset's X, y and class order equal the reference's
    (classes sorted numerically: 10 after 2)."""
    rng = np.random.default_rng(0)
    rows = ["f1,f2,f3,label"]
    for _ in range(300):
        a, b, c = rng.normal(size=3) * 10.0 ** rng.integers(-3, 4, size=3)
        rows.append(f"{float(a)!r},{b:.3e},{c:.7f},{rng.choice([2, 10, 1])}")
    text = "\n".join(rows) + "\n"
    (tmp_path / "n.csv").write_text(text)
    ds = load_dataset(settings(source="n.csv", target="label"), tmp_path)
    X_ref, y_ref = cell_by_cell(text, "label")
    assert np.array_equal(ds.X, X_ref)
    assert ds.classes == ("1", "2", "10")
    assert np.array_equal(ds.y, np.array([("1", "2", "10").index(v) for v in y_ref]))


def test_cells_only_float_reads_take_the_cell_path_with_the_same_values(tmp_path):
    """A cell that float() reads but numpy's reader does not ("1_000") falls back to the
    cell-by-cell path, which gives the reference's values."""
    text = "a,b,y\n1_000,2,0\n3,4.5,1\n5,6,0\n7,8,1\n"
    (tmp_path / "u.csv").write_text(text)
    ds = load_dataset(settings(source="u.csv", target="y"), tmp_path)
    assert np.array_equal(ds.X, cell_by_cell(text, "y")[0])


@pytest.mark.parametrize(
    ("header", "rows", "expected"),
    [
        ("a,b,y", ["1,2,0"], ","),
        ("a;b;y", ["1,5;2;0", "2;3;1"], ";"),
        ("a\tb\ty", ["1\t2\t0"], "\t"),
        ("a|b|y", ["1|2|0"], "|"),
        ('"a;1",b,y', ['"x;y",2,0'], ","),
        ("a;b;y", ['"x;y";2;0', "2;3;1;4"], ";"),
    ],
)
def test_separator_found_from_header_and_rows(header, rows, expected):
    assert find_delimiter(header, rows) == expected


def test_semicolon_and_tab_files_train_through_the_cli(tmp_path):
    """Semicolon- and tab-separated copies of the same rows give the same stored numbers."""
    iris = (DATA / "iris_sample.csv").read_text()
    for name, sep in (("semi.csv", ";"), ("tab.csv", "\t")):
        (tmp_path / name).write_text(iris.replace(",", sep))
    outputs = []
    for name in ("semi.csv", "tab.csv"):
        recipe = recipe_for(tmp_path, name, target="species")
        result = invoke("run", recipe, "--workers", "1", "--store", tmp_path / f"{name}.sqlite", "-q")
        assert result.exit_code == 0, result.output
        outputs.append(result.stdout)
    assert outputs[0] == outputs[1]


def test_absolute_paths_keep_working(tmp_path):
    recipe = recipe_for(tmp_path, str((DATA / "iris_sample.csv").resolve()), target="species")
    result = invoke("check", recipe, "--no-probe")
    assert result.exit_code == 0, result.output


def test_duplicate_column_names_are_an_error(tmp_path):
    """Header a,y,y: the duplicate target would become a feature (val accuracy 1.0 on
    random labels); it is refused naming the name and both columns."""
    recipe = recipe_for(tmp_path, DATA / "dup_columns.csv")
    refused(tmp_path, recipe, "dup_columns.csv:1", 'repeats column names: "y" (columns 2, 3)')


@pytest.mark.parametrize(
    ("name", "phrase"),
    [("nan_target.csv", "has a NaN value"), ("inf_target.csv", "has an infinite value")],
)
def test_non_finite_target_is_an_error_naming_line_and_column(tmp_path, name, phrase):
    """A NaN or inf target no longer turns a classification into regression."""
    recipe = recipe_for(tmp_path, DATA / name)
    refused(tmp_path, recipe, f"{name}:4", f'target column "y" {phrase}')


def test_empty_feature_cell_names_line_column_and_the_option(tmp_path):
    recipe = recipe_for(tmp_path, DATA / "empty_feature.csv")
    refused(tmp_path, recipe, "empty_feature.csv:3", 'column "b" has a missing value', 'data.missing = "impute"')


def test_float32_overflow_is_named(tmp_path):
    recipe = recipe_for(tmp_path, DATA / "float32_overflow.csv")
    refused(tmp_path, recipe, "float32_overflow.csv:4", 'column "b"', "outside float32's range", "1e+300")


def test_decimal_comma_gets_its_own_hint(tmp_path):
    """';'-separated with decimal commas: the separator is found, and the cell "1,5" is
    named with a hint about decimal commas."""
    recipe = recipe_for(tmp_path, DATA / "decimal_comma.csv")
    refused(tmp_path, recipe, "decimal_comma.csv:2", 'got "1,5"', "Decimal commas are not read")


def test_ragged_rows_are_named_with_the_separator_found(tmp_path):
    """A ';' header whose rows do not all split alike: the first ragged row is named, with
    the separator the file was read with."""
    recipe = recipe_for(tmp_path, DATA / "ragged_semicolon.csv")
    refused(tmp_path, recipe, "ragged_semicolon.csv:3: row has 4 fields, the header has 3 (separated by ';')")


def test_a_file_that_is_not_a_table_is_not_echoed(tmp_path):
    """A passwd-like file: refused without printing any of its text."""
    recipe = recipe_for(tmp_path, DATA / "not_a_table.csv")
    message = refused(tmp_path, recipe, "not a CSV table")
    assert "root" not in message and "/bin/bash" not in message


def test_long_cells_are_not_echoed(tmp_path):
    secret = "s3cr3t-" * 20
    (tmp_path / "long.csv").write_text(f"a,b,y\n1,{secret},0\n2,3,1\n")
    recipe = recipe_for(tmp_path, "long.csv")
    message = refused(tmp_path, recipe, 'column "b" is not numeric', "140-character text")
    assert "s3cr3t" not in message


def test_recipe_new_reads_a_semicolon_file(tmp_path):
    (tmp_path / "semi.csv").write_text((DATA / "iris_sample.csv").read_text().replace(",", ";"))
    out = tmp_path / "semi.toml"
    result = invoke("new", tmp_path / "semi.csv", "--out", out)
    assert result.exit_code == 0, result.output
    assert 'target = "species"' in out.read_text()
