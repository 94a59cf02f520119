"""Size limits of the MCMC stage's per-reading outputs."""

from invert.stages.mcmc.limits import (
    LOO_MAX_READINGS,
    PER_READING_CELLS,
    loo_note,
    per_reading_step,
)


def test_per_reading_step_bounds_draws_times_readings():
    # Arithmetic: the kept draws (every t-th of C*D) times m never exceed PER_READING_CELLS.
    assert per_reading_step(4, 500, 28) == 1
    for C, D, m in [(4, 500, 10_000), (4, 500, 100_000), (4, 2000, 1_000_000)]:
        t = per_reading_step(C, D, m)
        assert C * (-(-D // t)) * m <= PER_READING_CELLS + C * m  # ceil per chain
        assert t == 1 or C * D * m / (t - 1) > PER_READING_CELLS


def test_notes_say_what_the_groups_hold():
    assert loo_note(4, 500, 28) == []
    notes = loo_note(4, 500, 100_000, integrated=False)
    assert str(LOO_MAX_READINGS) in notes[0] and "every 50-th draw" in notes[1]
    assert loo_note(4, 500, LOO_MAX_READINGS + 1, integrated=True) == []
