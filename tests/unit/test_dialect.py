"""CSV dialects (delimiter, decimal mark, encoding), the small-table reader, spreadsheet-safe
CSV cells and output-path checks."""

import csv
import os
import subprocess

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from invert.errors import InputError
from invert.io.dialect import (
    detect_dialect,
    parse_decimal,
    parse_sep,
    read_table,
    sniff_file,
    to_number_text,
)
from invert.io.publish import check_output_path
from invert.io.writers import spreadsheet_safe, write_table

COMMA = ["sensor,x,y,value", "A,0.5,0,1.25", "B,0,0.5,2"]
EURO = ["sensor;x;y;value", "A;0,5;0;1,25", "B;0;0,5;2"]
TAB = ["sensor\tx\ty\tvalue", "A\t0.5\t0\t1.25", "B\t0\t0.5\t2"]


@pytest.mark.parametrize("lines,sep,decimal", [(COMMA, ",", "."), (EURO, ";", ","),
                                              (TAB, "\t", ".")])
def test_delimiter_and_decimal_mark_detected(lines, sep, decimal):
    d = detect_dialect(lines, "f.csv")
    assert (d.sep, d.decimal) == (sep, decimal)
    # a note says what was assumed, only when it is not the plain comma/point form
    assert bool(d.notes) == ((sep, decimal) != (",", "."))


def test_given_delimiter_is_not_detected_and_not_noted():
    d = detect_dialect(EURO, "f.csv", sep=";", decimal=",")
    assert (d.sep, d.decimal, d.notes) == (";", ",", ())


def test_both_decimal_marks_is_an_error_naming_both():
    with pytest.raises(InputError, match=r"decimal comma \('0,5'\) and a decimal point "
                                         r"\('2.5'\); give --decimal"):
        detect_dialect(["a;b", "0,5;1", "2.5;1"], "f.csv")


def test_option_spellings():
    assert parse_sep("tab") == "\t" and parse_sep(";") == ";" and parse_sep(None) is None
    assert parse_decimal(",") == "," and parse_decimal("point") == "."
    with pytest.raises(ValueError, match="--sep must be one of"):
        parse_sep("|")
    with pytest.raises(ValueError, match="--decimal must be"):
        parse_decimal(";")


def test_number_text():
    assert to_number_text("0,25", ",") == "0.25"
    assert to_number_text("1.234,5", ",") == "1.234,5"   # grouping: left to fail as written
    assert to_number_text("0,25", ".") == "0,25"


def test_latin1_comment_read_with_a_note(tmp_path):
    f = tmp_path / "r.csv"
    f.write_bytes(b"# temperature in \xb0C\nx,y,value\n1,0,2\n")
    header, rows, numbers, d = read_table(f)
    assert header == ["x", "y", "value"] and rows == [["1", "0", "2"]]
    assert list(numbers) == [3]
    assert d.encoding == "latin-1" and "read as Latin-1" in d.notes[0]
    assert "line 1, byte 0xb0" in d.notes[0]
    assert sniff_file(f).encoding == "latin-1"


def test_quoted_line_break_is_one_record_numbered_by_its_first_line(tmp_path):
    f = tmp_path / "r.csv"
    f.write_text('sensor,x,y,value\n"T\n1",1,0,2\nT2,0,1,3\n')
    _, rows, numbers, _ = read_table(f)
    assert rows[0][0] == "T\n1" and list(numbers) == [2, 4]


def test_cell_over_the_field_limit_is_one_line(tmp_path):
    f = tmp_path / "r.csv"
    long = "x" * (csv.field_size_limit() + 10)
    f.write_text(f"sensor,x,y,value\nA,1,0,2\n{long},0,1,3\n")
    with pytest.raises(InputError, match=r"r.csv, row 3: a cell is longer than \d+ "
                                         r"characters, the CSV field limit"):
        read_table(f)


def test_a_folder_is_not_a_table(tmp_path):
    with pytest.raises(InputError, match="is a folder, not a file"):
        read_table(tmp_path)


def test_spreadsheet_safe_cells():
    # OWASP "CSV Injection": cells starting with = + - @ (tab, CR) get a leading quote; text
    # that reads as a number and numeric columns stay as they are.
    df = pd.DataFrame({"label": ["=1+1", "-3.2", "+x", "@s", "ok", "-T1", "\tx"],
                       "v": [1.0, -2.0, 3.0, 4.0, 5.0, 6.0, 7.0]})
    got = spreadsheet_safe(df)
    assert list(got["label"]) == ["'=1+1", "-3.2", "'+x", "'@s", "ok", "'-T1", "'\tx"]
    assert got["v"].tolist() == df["v"].tolist() and df["label"][0] == "=1+1"  # no mutation


def test_batch_csv_tables_quote_formulas_parquet_keeps_them(tmp_path):
    t = pa.table({"label": ["=cmd()", "-3.2", None], "mean": [-1.5, 2.0, 3.0]})
    write_table(t, tmp_path / "q.csv", "csv")
    back = pd.read_csv(tmp_path / "q.csv", dtype={"label": str})
    assert back["label"].tolist()[:2] == ["'=cmd()", "-3.2"]
    np.testing.assert_array_equal(back["mean"], [-1.5, 2.0, 3.0])
    write_table(t, tmp_path / "q.parquet", "parquet")
    assert pd.read_parquet(tmp_path / "q.parquet")["label"][0] == "=cmd()"


def test_output_path_under_a_file(tmp_path):
    (tmp_path / "f").write_text("x")
    with pytest.raises(InputError, match="cannot be created: .* is a file, not a folder"):
        check_output_path(tmp_path / "f" / "out", "fit")
    with pytest.raises(InputError, match="is a file, not a folder"):
        check_output_path(tmp_path / "f", "fit")
    check_output_path(tmp_path / "new" / "deeper", "fit")  # creatable: fine
    assert not (tmp_path / "new").exists()


def _immutable(path):
    r = subprocess.run(["chattr", "+i", str(path)], capture_output=True)
    return r.returncode == 0


def test_output_path_not_writable(tmp_path):
    d = tmp_path / "ro"
    d.mkdir()
    if not _immutable(d):
        if os.geteuid() == 0:
            pytest.skip("no chattr here and root ignores permissions")
        d.chmod(0o500)
    try:
        with pytest.raises(InputError, match="cannot be written: nothing can be created"):
            check_output_path(d / "out", "fit")
        with pytest.raises(InputError, match=r"ro: cannot be written \("):
            check_output_path(d, "fit")
    finally:
        subprocess.run(["chattr", "-i", str(d)], capture_output=True)
        d.chmod(0o700)
