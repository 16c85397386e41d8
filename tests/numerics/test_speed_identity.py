"""The fast paths of the finder give the results of the slower code they replaced.

Reference values below were computed by the code on the main branch before the interpolation
and Jacobian were restructured for speed (sparse contraction of cached node rows, shift weights
made on demand, shared geometry algebra in the Jacobian), on the same data and guesses as here.
The restructuring only reorders floating-point sums, so results must agree to round-off:
1e-12 relative for areas, lengths and Theta; coefficients to 1e-12 of the coefficient norm; the
finite-difference Jacobian (round-off divided by its 1e-5 steps) to 1e-8 of its largest entry.
"""

import numpy as np
import pytest

from penumbra_server.numerics import finder as finder_module
from penumbra_server.numerics.finder import FinderSettings, expansion_of, find_surface
from penumbra_server.numerics.measures import measure_surface
from penumbra_server.numerics.sources import as_tracked_source
from penumbra_server.numerics.spacetimes import BrillLindquist, KerrKerrSchild, sample_slice
from penumbra_server.numerics.surfaces import Surface, angular_grid

from numerics_grids import cube_box

PICK = [0, 1, 2, 3, 4, 6, 8, 12, 15, 24, 35, 48]

# Computed by the main-branch code before the speed work (see the module docstring).
REFERENCE = {
    "pair_find": {
        "status": 10, "nit": 5, "norm": 0.9275237642968731, "area": 23.751586422749057,
        "circumference_xy": 8.646934760988698,
        "coefficients": [0.9262317029064141, -0.0022985533107148614, -8.590902039247674e-08, 0.048883742887899706,
                         -0.0004487937955173373, -3.4612792465149754e-07, 6.235280973945976e-05,
                         6.061156250436458e-08, -0.00016839551443369806, -2.534176358577579e-05,
                         -3.6729185991954662e-06, -5.338560344382405e-07],
    },
    "kerr_find": {
        "status": 10, "nit": 5, "norm": 6.608094522129747, "area": 45.23889073316639, "spin_z": 0.5999997555073636,
        "coefficients": [6.607275501922456, -5.358698059792184e-08, 1.4531061230582637e-07, -1.7020860754034451e-07,
                         8.276126738394402e-12, -0.10401557318637747, 1.5443760782238545e-13, 5.06689592104667e-08,
                         5.660268186896055e-08, -8.172730183928087e-07, -1.2448597238946494e-08,
                         -6.046489982958707e-13],
    },
    "theta": {
        4: {"sum": 71.06307547136092, "max": 0.5283132498281217,
            "picks": [0.4491334328196438, 0.38202949827856836, 0.318381490290475, 0.38147046545091573,
                      0.2913533494197399, 0.16295793128946434, 0.26751280084262097, 0.4417648258935484,
                      0.5064492133409546]},
        6: {"sum": 71.06714744864463, "max": 0.528291138226007,
            "picks": [0.44914999557991087, 0.3820661415470137, 0.3184289688405717, 0.38153890720406247,
                      0.2914565455397103, 0.16295846286664384, 0.26751037934651, 0.4417820313021088,
                      0.5064562056570202]},
    },
    "jacobian": {
        "frobenius": 691.2813418669454,
        "diagonal": [1.364911856097629, 4.782837263802029, 4.440343447472448, 4.689379078730061, 11.418846891527172,
                     10.93716110584145, 11.417478440942004, 20.643168546295993, 21.44375490455547,
                     34.821185998317745, 51.553895703251804, 71.64320466671741],
        "row": [0.022196934572157375, 0.03594852661161049, 0.0004431770038238467, 0.013171152978185737,
                11.418846891527172, 0.006863123798773068, 0.0004863475450259868, -0.000699897729178252,
                0.12200125077404539, 0.0816363252689625, 0.04142627984351259, 0.018436850472400224],
    },
}


@pytest.fixture(scope="module")
def pair():
    holes = BrillLindquist(masses=np.array([0.6, 0.4]), positions=np.array([[0.55, 0.1, 0.0], [-0.8, -0.15, 0.0]]))
    return holes.positions[0], sample_slice(holes, [cube_box(holes.positions[0], 0.8, 0.04)], variable_set="conformal_w")


def _wavy(centre, radius, lmax):
    """A sphere with some l = 1 and l = 2 content (not a solution)."""
    s = Surface.sphere(centre, radius, lmax)
    c = s.coefficients.copy()
    c[6], c[2], c[8] = 0.02 * c[0], -0.01 * c[0], 0.005 * c[0]
    return Surface(s.centre, lmax, c)


def _assert_coefficients(surface, ref):
    np.testing.assert_allclose(surface.coefficients[PICK], ref["coefficients"], rtol=0, atol=1e-12 * ref["norm"])
    assert np.linalg.norm(surface.coefficients) == pytest.approx(ref["norm"], rel=1e-12)


def test_find_and_measure_on_conformal_data_match_the_reference(pair):
    centre, sl = pair
    ref = REFERENCE["pair_find"]
    r = find_surface(sl, Surface.sphere(centre + [0.03, 0, 0], 0.4, 8), settings=FinderSettings(lmax=8, lmax_cap=8))
    assert (r.status, r.nit) == (ref["status"], ref["nit"])
    _assert_coefficients(r.surface, ref)
    q = measure_surface(r.surface, r.geometry, order=6)
    assert q.area == pytest.approx(ref["area"], rel=1e-12)
    assert q.circumference_xy == pytest.approx(ref["circumference_xy"], rel=1e-12)


def test_find_and_measure_on_adm_kerr_data_match_the_reference():
    sl = sample_slice(KerrKerrSchild(mass=1.0, spin=0.6), [cube_box([0, 0, 0], 2.6, 0.13)], variable_set="adm")
    ref = REFERENCE["kerr_find"]
    r = find_surface(sl, Surface.sphere([0.05, 0, 0], 1.8, 6), settings=FinderSettings(lmax=6, lmax_cap=6))
    assert (r.status, r.nit) == (ref["status"], ref["nit"])
    _assert_coefficients(r.surface, ref)
    q = measure_surface(r.surface, r.geometry, order=6)
    assert q.area == pytest.approx(ref["area"], rel=1e-12)
    assert q.angular_momentum[2] == pytest.approx(ref["spin_z"], rel=1e-12)


@pytest.mark.parametrize("order", [4, 6])
def test_expansion_at_the_nodes_matches_the_reference(pair, order):
    centre, sl = pair
    ref = REFERENCE["theta"][order]
    theta = expansion_of(sl, _wavy(centre, 0.42, 8), order=order)
    scale = ref["max"]
    assert np.max(np.abs(theta)) == pytest.approx(scale, rel=1e-12)
    assert np.sum(theta) == pytest.approx(ref["sum"], rel=1e-12)
    np.testing.assert_allclose(theta[::23], ref["picks"], rtol=0, atol=1e-12 * scale)


def test_jacobian_matches_the_reference(pair):
    centre, sl = pair
    ref = REFERENCE["jacobian"]
    run = finder_module._Run(as_tracked_source(sl, order=6), angular_grid(8))
    J = finder_module._jacobian(run, finder_module._evaluate(run, _wavy(centre, 0.42, 8)))
    scale = float(np.max(np.abs(J)))
    assert np.linalg.norm(J) == pytest.approx(ref["frobenius"], rel=1e-9)
    np.testing.assert_allclose(np.diag(J)[PICK], ref["diagonal"], rtol=0, atol=1e-8 * scale)
    np.testing.assert_allclose(J[4, PICK], ref["row"], rtol=0, atol=1e-8 * scale)


@pytest.mark.parametrize("memory_order", ["C", "F"])
def test_stencil_fill_and_node_fill_make_bitwise_equal_rows(memory_order, monkeypatch):
    from penumbra_server.numerics.interpolation import grid_geometry
    from penumbra_server.numerics.node_store import NodeStore

    hole = BrillLindquist(masses=np.array([1.0]), positions=np.zeros((1, 3)))
    sl = sample_slice(hole, [cube_box([0, 0, 0], 0.9, 0.05)], variable_set="conformal_w", memory_order=memory_order)
    # Points far apart (stencils do not overlap): every touched node is missing, so the store
    # fills by whole stencils when given the corners, node by node when not.
    directions = np.array([[1, 0, 0], [0, 1, 0], [0, 0, 1], [-1, 0, 0], [0, -1, 0], [0, 0, -1]], float)
    points = 0.55 * directions + np.array([0.013, -0.007, 0.004])
    store, _, flat, _, _, _, corners = grid_geometry(sl, order=6).stencils(points)[0]
    used = []
    for name in ("_fill", "_fill_stencils"):
        real = getattr(NodeStore, name)
        monkeypatch.setattr(NodeStore, name, lambda self, *a, _real=real, _name=name: (used.append(_name), _real(self, *a))[1])
    by_stencil, by_node = NodeStore(sl, 0, 6), NodeStore(sl, 0, 6)
    rows_stencil = by_stencil.values[by_stencil.slots(flat, corners)]
    rows_node = by_node.values[by_node.slots(flat)]
    assert used == ["_fill_stencils", "_fill"]
    assert np.isfinite(rows_node).all()
    np.testing.assert_array_equal(rows_stencil, rows_node)
