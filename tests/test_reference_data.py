"""A real velocity field from open data: the EDGE-CALIFA H-alpha map of NGC 4047 (7-arcsec beam).

Published values (Levy et al. 2018, ApJ 860, 92, via ../shared/reference_data/edge_califa_ngc4047,
table edge_rfpars.csv): kinematic position angle 284 deg (receding side, from CO), inclination 42.1 deg
(from the outer optical isophotes, not kinematics). The H-alpha map's midpoint velocity is about
3410 km/s (SOURCE.md; the velocity convention of the CALIFA map is not stated, so v_systemic is checked
loosely). Tolerances are ours: 5 deg in position angle, 10 deg in inclination, 25 km/s in v_systemic.
"""

import numpy as np

import tiltedring as tr


def test_ngc4047_halpha_geometry(reference_data, quiet):
    folder = reference_data / "edge_califa_ngc4047" / "derived_fits"
    vmap = tr.read_velocity_map(folder / "NGC4047_Ha_smo7_vel.fits", error=folder / "NGC4047_Ha_smo7_evel.fits")
    res = tr.fit_velocity_map(vmap)
    g = res.geometry()
    assert abs(((g["position_angle"] - 284.0 + 180) % 360) - 180) < 5.0
    assert abs(g["inclination"] - 42.1) < 10.0
    assert abs(g["v_systemic"] - 3410.0) < 25.0
    v = res.rings["v_rotation"].value
    far = res.rings["radius"].value > 15
    # Levy et al. 2018: H-alpha flat speed about 219-233 km/s; with the inclination uncertain, 20% here
    assert 0.8 * 219 < np.nanmedian(v[far]) < 1.2 * 233
