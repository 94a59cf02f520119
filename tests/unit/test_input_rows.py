"""A point outside the region is reported at its row in the file, comment lines counted.

Oracle: the file as written (the row an editor shows, 1-based with the header as row 1),
counted here line by line; the disk test is |p - c| > R for the hand-placed point.
"""

import numpy as np
import pytest

from invert.cli import main
from invert.errors import InputError
from invert.io.readings import check_inside, load_layout, load_points, row_of
from invert.workflow import make_domain


def _lines_before(text, needle):
    # 1-based line number of the first line containing ``needle``
    return next(i + 1 for i, ln in enumerate(text.splitlines()) if needle in ln)


LAYOUT = ("# comment line 1\n"
          "# comment line 2\n"
          "sensor,x,y\n"
          "\n"                       # a blank line counts too
          "a,1.0,0.0\n"
          "# a comment between rows\n"
          "b,0.0,1.0\n"
          "c,3.0,0.0\n"              # outside the unit disk: |(3, 0)| = 3 > 1
          "d,-1.0,0.0\n")


def test_row_of_counts_comment_lines(tmp_path):
    path = tmp_path / "layout.csv"
    path.write_text(LAYOUT)
    _, points, _, rows = load_layout(path)
    bad = int(np.flatnonzero(np.hypot(points[:, 0], points[:, 1]) > 1)[0])
    assert bad == 2  # the third data record
    assert row_of(rows, bad) == _lines_before(LAYOUT, "c,3.0") == 8
    assert row_of(rows, None) == _lines_before(LAYOUT, "a,1.0")


def test_layout_point_outside_names_its_row(tmp_path):
    path = tmp_path / "layout.csv"
    path.write_text(LAYOUT)
    _, points, _, rows = load_layout(path)
    with pytest.raises(InputError) as err:
        check_inside(make_domain(1.0), points, rows, path.name)
    assert err.value.row == 8 and err.value.source == "layout.csv"


def test_batch_command_names_the_layout_row(tmp_path, capsys):
    # the batch command reported row (index + 2) before, wrong with comment lines
    layout = tmp_path / "layout.csv"
    layout.write_text(LAYOUT)
    log = tmp_path / "log.csv"
    log.write_text("time,a,b,c,d\n0,1,2,3,4\n1,1,2,3,4\n")
    code = main(["batch", str(log), "--layout", str(layout), "--radius", "1", "--out",
                 str(tmp_path / "o"), "--lam", "0.1", "--noise-sd", "0.1"])
    err = capsys.readouterr().err
    assert code == 2
    assert "layout.csv, row 8" in err
    assert not (tmp_path / "o" / "frames.parquet").exists()


def test_query_point_outside_names_its_row(tmp_path, capsys):
    q = tmp_path / "points.csv"
    q.write_text("# probes\nlabel,x,y\np,0.1,0.0\n# far away\nfar,0.0,-2.5\n")
    pts, _, rows = load_points(q)
    with pytest.raises(InputError) as err:
        check_inside(make_domain(1.0), pts, rows, q.name)
    assert err.value.row == _lines_before(q.read_text(), "far,") == 5
