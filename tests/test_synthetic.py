"""The closed-form test geometries voxelise to the volumes their closed forms give.

These check the voxeliser, not an estimator: voxel counting of a smooth body converges to its volume
(Gauss-circle-type lattice-point counting; error ~ surface/volume), so a 1 % bound at these radii is a
loose, safe bound (common practice).
"""

import math

import numpy as np
import pytest

from wetpath import synthetic
from wetpath._codes import NONWETTING, SOLID, WETTING


@pytest.mark.parametrize("radius", [8, 15, 30])
def test_ball_volume(radius):
    labels = synthetic.ball(radius, seed=radius)
    exact = synthetic.ball_exact(radius)["volume"]  # 4πR³/3
    assert abs((labels == NONWETTING).sum() / exact - 1) < 0.01


def test_torus_volume():
    labels = synthetic.torus(20, 7, axis=(1, 1, 0), seed=3)
    exact = 2 * math.pi**2 * 20 * 7**2  # Pappus: 2π² R r²
    assert abs((labels == NONWETTING).sum() / exact - 1) < 0.01


@pytest.mark.parametrize("theta", [30, 90, 135])
@pytest.mark.parametrize("normal", [(1, 0, 0), (1, 0.4, 0.25)])
def test_cap_volume_and_phases(theta, normal):
    labels = synthetic.cap_on_plate(25, theta, normal=normal, seed=1)
    exact = synthetic.cap_exact(25, theta)["volume_n"]  # (π/3)R³(2 + cos θn)(1 − cos θn)²
    assert abs((labels == NONWETTING).sum() / exact - 1) < 0.01
    assert {SOLID, WETTING, NONWETTING} == set(np.unique(labels))


@pytest.mark.parametrize("theta", [30, 120])
def test_meniscus_volume_moves_with_apex(theta):
    r = 12
    a = synthetic.tube_meniscus(r, theta, 0.0)
    b = synthetic.tube_meniscus(r, theta, 4.0)
    dv = (b == NONWETTING).sum() - (a == NONWETTING).sum()
    # a uniform tube: moving the meniscus by d sweeps π r² d (cylinder volume)
    assert abs(dv / (math.pi * r * r * 4.0) - 1) < 0.02


def test_meniscus_curvature_closed_form():
    # Young–Laplace in a capillary: κ = 2 cos θ / r (de Gennes et al. 2004, ch. 1)
    assert synthetic.meniscus_exact(10, 60)["curvature_nw"] == pytest.approx(0.1)
    assert synthetic.meniscus_exact(10, 120)["curvature_nw"] == pytest.approx(-0.1)


def test_random_medium_porosity_and_fov():
    m = synthetic.random_medium((48, 48, 48), porosity=0.35, seed=1)
    assert abs((m != SOLID).mean() - 0.35) < 0.01
    c = synthetic.random_medium((48, 48, 48), cylinder_fov=True, seed=1)
    assert c[:, 0, 0].max() == 0 and c[:, 24, 24].min() > 0
