import numpy as np
import geopress
from geopress.pressure import M_PER_FT


def test_run_plane_world(world):
    res = geopress.run(world.config_path)
    cust = world.read()
    assert len(cust) == 20
    expected_ft = world.ground_m(world.extra["xs"], world.extra["ys"]) / M_PER_FT
    np.testing.assert_allclose(cust["ground_ft"], expected_ft, rtol=0, atol=1e-9)
    print(res.counts)
