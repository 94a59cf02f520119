"""Dense sensing: a line of thousands of rim readings (fibre optics, a camera).

Oracle: the construction itself (random angles with and without a planted 30-degree hole).
"""


def test_dense_random_line_has_no_unsensed_arcs_but_a_real_gap_stays():
    # 3,000 rim readings at random angles: their spacing is far below pi / n_modes, so random
    # spacing makes no arc; a 30-degree hole in the line is still found (at least pi / n_modes
    # wide on each side of its sensors)
    import numpy as np

    from invert import LinearProblem, make_domain
    from invert.diagnostics.gaps import unsensed_arcs

    rng = np.random.default_rng(1)
    d = make_domain(1.0)
    th = rng.uniform(0, 2 * np.pi, 3000)
    pts = np.column_stack([np.cos(th), np.sin(th)])
    def problem(p):
        return LinearProblem(d.design(p), np.zeros(len(p)), np.full(len(p), 0.1), d.degrees,
                             d.eigenvalues, domain=d, points=p)

    pb = problem(pts)
    assert unsensed_arcs(pb).shape == (0, 2)
    hole = (th > 1.0) & (th < 1.0 + np.deg2rad(30))
    arcs = unsensed_arcs(problem(pts[~hole]))
    assert len(arcs) == 1 and 1.0 < arcs[0, 0] < arcs[0, 1] < 1.0 + np.deg2rad(30)
