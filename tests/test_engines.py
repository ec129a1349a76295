"""Engines: the Dask engine gives exactly the local-threads results (invariant, common practice)."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from _support import ramp_dem, write_parcels, write_rules
from shapely import affinity

from landcheck.core.audit import audit

X0, Y0 = 400000.0, 1600000.0


@pytest.mark.slow
def test_dask_equals_threads(tmp_path):
    # Reference: the local-threads engine (invariant); Source: closed form on the ramp (slope 0.04 x %): the share
    # over 18 % is the area share east of x = 450 m.
    dem = ramp_dem(tmp_path / "dem.tif")
    rules = write_rules(tmp_path / "r.toml", tol=5.0, band=3.0)
    rng = np.random.default_rng(3)
    geoms = [
        affinity.rotate(shapely.box(X0 + x, Y0 - y, X0 + x + w, Y0 - y + 70), a, origin="centroid")
        for x, y, w, a in zip(
            rng.uniform(50, 900, 30), rng.uniform(100, 1100, 30), rng.uniform(30, 200, 30), rng.uniform(0, 90, 30)
        )
    ]
    parcels = write_parcels(tmp_path / "p.gpkg", geoms, pid=np.arange(1, 31), zoning=["R"] * 30)
    a = audit(dem, parcels, rules, tmp_path / "threads", make_report=False, tile_cells=29, workers=2)
    b = audit(dem, parcels, rules, tmp_path / "dask", make_report=False, tile_cells=29, workers=2, engine="dask")
    num = [c for c in a.parcels.columns if a.parcels[c].dtype.kind == "f"]
    np.testing.assert_array_equal(a.parcels[num].to_numpy(), b.parcels[num].to_numpy())
    assert a.parcels["verdict"].tolist() == b.parcels["verdict"].tolist()
    truth = [g.intersection(shapely.box(X0 + 450, Y0 - 1e4, X0 + 1e4, Y0 + 1e4)).area / g.area for g in geoms]
    np.testing.assert_allclose(b.parcels["over_limit_share"], truth, atol=1e-9)
