"""Tests for dsp.kinematics: bearing defect, gear mesh and sideband frequencies."""

from __future__ import annotations

import math

import numpy as np
import pytest

from dsp.kinematics import BearingOrders, bearing_frequencies, gear_mesh_hz, sidebands


def test_worked_example() -> None:
    # Randall & Antoni 2011 formulas, worked example (computed; docs/references.md):
    # n = 8, d = 10, D = 50, φ = 0, 3000 r/min → BPFO 160, BPFI 240, FTF 20, BSF 120 Hz.
    b = bearing_frequencies(8, 10.0, 50.0, 0.0, 3000 / 60)
    assert b.bpfo_hz == pytest.approx(160.0, rel=1e-12)
    assert b.bpfi_hz == pytest.approx(240.0, rel=1e-12)
    assert b.ftf_hz == pytest.approx(20.0, rel=1e-12)
    assert b.bsf_hz == pytest.approx(120.0, rel=1e-12)
    assert b.shaft_hz == 50.0
    o = b.as_orders()
    assert isinstance(o, BearingOrders)
    assert (o.bpfo, o.bpfi, o.ftf, o.bsf) == pytest.approx((3.2, 4.8, 0.4, 2.4), rel=1e-12)


def test_contact_angle_shrinks_the_effective_ratio() -> None:
    # ρ = (d/D)·cos φ (Randall & Antoni 2011): d/D = 0.2 at φ = 60° acts as 0.1 at φ = 0.
    a = bearing_frequencies(9, 8.0, 40.0, 60.0, 25.0)
    b = bearing_frequencies(9, 4.0, 40.0, 0.0, 25.0)
    assert a.bpfo_hz == pytest.approx(b.bpfo_hz, rel=1e-12)
    assert a.bpfi_hz == pytest.approx(b.bpfi_hz, rel=1e-12)
    assert a.ftf_hz == pytest.approx(b.ftf_hz, rel=1e-12)
    # BSF also carries D/(2d), which differs by 2 between the two
    assert a.bsf_hz == pytest.approx(b.bsf_hz / 2, rel=1e-12)


def test_identities_for_random_geometries() -> None:
    # Randall & Antoni 2011 (docs/references.md): BPFO + BPFI = n·fr and BPFO = n·FTF. Also the
    # kinematic facts that the inner race passes the elements at n·(fr − FTF), and that
    # BSF = (D/2d)·4·BPFO·BPFI/(n²·fr), which ties BSF to the other two formulas.
    rng = np.random.default_rng(1)
    for _ in range(200):
        n = int(rng.integers(3, 40))
        big_d = float(rng.uniform(10.0, 500.0))
        d = float(rng.uniform(0.02, 0.45)) * big_d
        phi = float(rng.uniform(0.0, 89.0))
        fr = float(rng.uniform(0.5, 500.0))
        b = bearing_frequencies(n, d, big_d, phi, fr)
        assert b.bpfo_hz + b.bpfi_hz == pytest.approx(n * fr, rel=1e-12)
        assert b.bpfo_hz == pytest.approx(n * b.ftf_hz, rel=1e-12)
        assert b.bpfi_hz == pytest.approx(n * (fr - b.ftf_hz), rel=1e-12)
        assert b.bsf_hz == pytest.approx(
            big_d / (2 * d) * 4 * b.bpfo_hz * b.bpfi_hz / (n**2 * fr), rel=1e-12
        )
        assert 0 < b.ftf_hz < fr / 2  # the cage turns at under half shaft speed
        assert b.bpfo_hz < n * fr / 2 < b.bpfi_hz
        o = b.as_orders()
        assert o.bpfo == pytest.approx(b.bpfo_hz / fr, rel=1e-12)
        assert o.bsf == pytest.approx(b.bsf_hz / fr, rel=1e-12)


def test_bearing_errors() -> None:
    with pytest.raises(ValueError, match=r"n_elements=0 must be an integer of at least 1"):
        bearing_frequencies(0, 10.0, 50.0, 0.0, 50.0)
    with pytest.raises(ValueError, match=r"n_elements=8\.5 must be an integer of at least 1"):
        bearing_frequencies(8.5, 10.0, 50.0, 0.0, 50.0)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match=r"element_diameter=-1\.0 must be a finite number > 0"):
        bearing_frequencies(8, -1.0, 50.0, 0.0, 50.0)
    with pytest.raises(ValueError, match=r"pitch_diameter=nan must be a finite number > 0"):
        bearing_frequencies(8, 10.0, math.nan, 0.0, 50.0)
    with pytest.raises(ValueError, match=r"shaft_hz=0\.0 must be a finite number > 0"):
        bearing_frequencies(8, 10.0, 50.0, 0.0, 0.0)
    with pytest.raises(
        ValueError, match=r"element_diameter=50\.0 must be smaller than pitch_diameter=50\.0"
    ):
        bearing_frequencies(8, 50.0, 50.0, 0.0, 50.0)
    with pytest.raises(ValueError, match=r"contact_angle_deg=90\.0 must be in \[0, 90\) degrees"):
        bearing_frequencies(8, 10.0, 50.0, 90.0, 50.0)
    with pytest.raises(ValueError, match=r"contact_angle_deg=-5\.0 must be in \[0, 90\) degrees"):
        bearing_frequencies(8, 10.0, 50.0, -5.0, 50.0)
    with pytest.raises(ValueError, match=r"shaft_hz='fast' must be a number > 0"):
        bearing_frequencies(8, 10.0, 50.0, 0.0, "fast")  # type: ignore[arg-type]


def test_gear_mesh() -> None:
    # Mesh frequency = teeth × shaft rate, the same from either gear of a pair (common
    # practice): 23 teeth at 1480 r/min meshing with 71 teeth.
    f1 = 1480 / 60
    f2 = f1 * 23 / 71
    assert gear_mesh_hz(23, f1) == pytest.approx(23 * 1480 / 60, rel=1e-12)
    assert gear_mesh_hz(71, f2) == pytest.approx(gear_mesh_hz(23, f1), rel=1e-12)
    with pytest.raises(ValueError, match=r"teeth=0 must be an integer of at least 1"):
        gear_mesh_hz(0, f1)
    with pytest.raises(ValueError, match=r"shaft_hz=-3\.0 must be a finite number > 0"):
        gear_mesh_hz(20, -3.0)


def test_sidebands() -> None:
    # Amplitude modulation at rate s puts lines at c ± k·s (product-to-sum identity).
    np.testing.assert_allclose(
        sidebands(567.5, 24.5, 3), [494.0, 518.5, 543.0, 592.0, 616.5, 641.0], rtol=1e-12
    )
    with pytest.raises(ValueError, match=r"count=3 sidebands 50\.0 Hz apart reach -50\.0 Hz"):
        sidebands(100.0, 50.0, 3)
    with pytest.raises(ValueError, match=r"count=0 must be an integer of at least 1"):
        sidebands(100.0, 5.0, 0)
    with pytest.raises(ValueError, match=r"spacing_hz=0\.0 must be a finite number > 0"):
        sidebands(100.0, 0.0, 1)
