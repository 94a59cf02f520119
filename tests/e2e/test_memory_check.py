"""--grid and --n-modes too large for memory: exit 2 and one line saying what fits."""

import re
from pathlib import Path

import pytest

from invert import workflow
from invert.cli import main
from invert.errors import InputError

DATA = Path(__file__).resolve().parents[2] / "invert" / "data"


def run(args, capsys):
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.mark.parametrize("option, pattern", [
    (["--grid", "100000"], r"^rim-invert: error: --grid 100000: needs about [\d.]+ (GB|TB) "
                           r"for the field maps; at most --grid (\d+) fits in the [\d.]+ GB "
                           r"available$"),
    (["--n-modes", "10000"], r"^rim-invert: error: --n-modes 10000: needs about [\d.]+ GB for its "
                             r"20001 coefficients; at most --n-modes (\d+) fits in the [\d.]+ GB "
                             r"available$"),
])
def test_too_large_for_memory_is_one_line(tmp_path, capsys, option, pattern):
    out = tmp_path / "o"
    code, _, err = run(["fit", DATA / "demo_readings.csv", "--radius", "0.25", "--out", out,
                        *option], capsys)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and re.match(pattern, lines[0]), err
    assert int(re.match(pattern, lines[0]).group(2 if "grid" in option[0] else 1)) > 0
    assert not out.exists()  # checked before anything is computed or written


def test_the_largest_value_said_to_fit_passes_the_check():
    # The stated limit is consistent with the estimate: it passes, one more does not (grid
    # bytes scale as n^2 and coefficient bytes as p^2; an 8 GB budget stated explicitly).
    dom = workflow.make_domain(0.25)
    with pytest.raises(InputError, match=r"at most --grid (\d+)") as exc:
        workflow.check_memory(dom, grid=100000, n_readings=28, available=8e9)
    fits = int(re.search(r"at most --grid (\d+)", str(exc.value)).group(1))
    workflow.check_memory(dom, grid=fits, n_readings=28, available=8e9)
    with pytest.raises(InputError):
        workflow.check_memory(dom, grid=fits + 2, n_readings=28, available=8e9)
    big = workflow.make_domain(0.25, n_modes=10000)
    with pytest.raises(InputError, match=r"at most --n-modes (\d+)") as exc:
        workflow.check_memory(big, grid=81, n_readings=28, given_modes=True, available=8e9)
    k = int(re.search(r"at most --n-modes (\d+)", str(exc.value)).group(1))
    workflow.check_memory(big.with_modes(k), grid=81, n_readings=28, available=8e9)
    with pytest.raises(InputError):
        workflow.check_memory(big.with_modes(k + 1), grid=81, n_readings=28, available=8e9)
