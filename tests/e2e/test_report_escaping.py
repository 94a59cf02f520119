"""Every user string reaches report.html escaped (units, labels, sensor ids, file names).

Oracle: the HTML text rule (HTML Living Standard, "Serializing HTML fragments": ``<``, ``>``,
``&`` and quotes in text must be written as character references); Python's ``html.escape``
gives the expected form.
"""

import html
import subprocess
import sys
from pathlib import Path

import pandas as pd

DATA = Path(__file__).resolve().parents[2] / "invert" / "data"

UNIT = "<script>alert('u')</script>"
LENGTH = "<img src=x onerror=alert(1)>"
LABEL = "<b onclick=alert(2)>probe</b>"


def test_user_strings_are_escaped_in_the_report(tmp_path):
    query = tmp_path / "q.csv"
    pd.DataFrame({"x": [0.0, 0.05], "y": [0.0, 0.02], "label": ["centre", LABEL]}).to_csv(
        query, index=False)
    out = tmp_path / "out"
    r = subprocess.run([sys.executable, "-m", "invert.cli", "fit", str(DATA / "demo_readings.csv"),
                        "--radius", "0.25", "--out", str(out), "--query", str(query),
                        "--unit", UNIT, "--length-unit", LENGTH, "--threshold", "60"],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    doc = (out / "report.html").read_text(encoding="utf-8")
    for s in (UNIT, LENGTH, LABEL):
        assert s not in doc
    assert "<script" not in doc and "<img src=x" not in doc
    assert html.escape(UNIT) in doc and html.escape(LENGTH) in doc and html.escape(LABEL) in doc
    # escaped exactly once: no double escapes such as "&amp;lt;"
    assert "&amp;lt;" not in doc
