import pytest

from numerics_grids import cube_box


@pytest.fixture
def cube():
    return cube_box
