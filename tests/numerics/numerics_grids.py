"""Grid boxes shared by the numerics tests (a module of its own: `conftest` names collide
between test folders when the whole suite runs)."""

import numpy as np


def cube_box(centre, half_width, spacing, level=0, offset=0.37):
    """A vertex-centred cubic box about ``centre``; ``offset`` (in spacings) keeps nodes off the
    centre, where a puncture would make the data infinite."""
    centre = np.asarray(centre, dtype=float)
    n = int(np.ceil(2 * half_width / spacing)) + 1
    origin = centre - half_width + offset * spacing
    return dict(origin=origin, spacing=[spacing] * 3, shape=[n] * 3, level=level)
