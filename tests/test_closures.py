"""Composite n and face conveyance per friction closure (ntrans.closures)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import shapely
from affine import Affine
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import quad
from scipy.optimize import brentq

from ntrans.closures import COMPOSITE_METHODS, composite_n, face_conveyance, segment_hydraulics
from ntrans.errors import InputError
from ntrans.faces import Profiles, face_profile_summary, face_stage_table, sample_profiles

# --- composite n ---------------------------------------------------------------------


@pytest.mark.parametrize("method", COMPOSITE_METHODS)
@pytest.mark.parametrize("n", [0.013, 0.035, 0.1])
def test_equal_part_n_returns_that_n(method, n):
    p = np.array([[1.0, 2.5, 0.5], [3.0, 0.0, 1.0]])
    # Lotter adds discharges, so equal n returns n only when the parts share one R
    # (otherwise it carries the divided-section effect); the other methods for any parts
    radius = np.full(3, 0.8) if method == "lotter" else np.array([0.3, 1.0, 2.0])
    out = composite_n(p, np.full(3, n), method, part_radius=radius, part_depth=np.array([0.5, 1.5, 2.0]))
    # published identity: equal n_i returns n (Chow 1959 6-7; Yen 2002)
    np.testing.assert_allclose(out, n, rtol=1e-12)


def test_two_part_section_by_hand():
    p, n, r = np.array([2.0, 3.0]), np.array([0.02, 0.04]), np.array([0.5, 1.0])
    # Horton-Einstein, Chow (1959) 6-7: ((2 * 0.02^1.5 + 3 * 0.04^1.5) / 5)^(2/3)
    #   = ((0.0056569 + 0.024) / 5)^(2/3) = 0.0059314^(2/3) = 0.032767
    assert composite_n(p, n, "horton_einstein") == pytest.approx(0.032767, abs=1e-6)
    # Pavlovskii, Chow (1959) 6-7 / Yen (2002): sqrt((2 * 0.0004 + 3 * 0.0016) / 5)
    #   = sqrt(0.00112) = 0.033466
    assert composite_n(p, n, "pavlovskii") == pytest.approx(0.033466, abs=1e-6)
    # Lotter, Yen (2002): A = 2 * 0.5 + 3 * 1 = 4, R = 0.8,
    #   5 * 0.8^(5/3) / (2 * 0.5^(5/3) / 0.02 + 3 / 0.04) = 3.44710 / 106.498 = 0.032368
    assert composite_n(p, n, "lotter", part_radius=r) == pytest.approx(0.032368, abs=1e-6)


def test_composite_n_zero_perimeter_and_bad_method():
    out = composite_n(np.zeros((2, 3)), np.full((2, 3), 0.03), "horton_einstein")
    assert np.all(np.isnan(out))  # no perimeter: undefined
    with pytest.raises(InputError):
        composite_n([1.0], [0.03], "manning")
    with pytest.raises(InputError):
        composite_n([1.0], [0.03], "lotter")  # needs part_radius


# --- closures on hand-checkable profiles ---------------------------------------------

V = Profiles([0, 0, 0], [0.0, 1.0, 2.0], [1.0, 0.0, 1.0], 1)


def test_strip_v_profile_by_hand():
    k = face_conveyance(V, np.array([1.0]), closure="strip")
    # published formula (strip K = sum h^(5/3) ds): 2 * integral_0^1 u^(5/3) du = 2 * 3/8
    assert k[0, 0] == pytest.approx(0.75, rel=1e-12)


@pytest.mark.parametrize("composite", COMPOSITE_METHODS)
def test_lumped_v_profile_by_hand(composite):
    k = face_conveyance(V, np.array([1.0]), closure="lumped", n_segment=0.05, composite=composite)
    # Manning K = A R^(2/3) / n with A = 1, P = 2 sqrt(2) (Chow 1959 Table 2-1 triangle z = 1);
    # the two sides are equal parts (same n, same R), so every composite gives the same K
    assert k[0, 0] == pytest.approx(1.0 * (1 / (2 * math.sqrt(2))) ** (2 / 3) / 0.05, rel=1e-12)


@pytest.mark.parametrize("closure", ["flat", "lumped", "strip"])
def test_level_face_every_closure_is_flat_manning(closure):
    prof = Profiles([0, 0, 0], [0.0, 2.0, 5.0], [1.0, 1.0, 1.0], 1)
    k = face_conveyance(prof, np.array([0.5, 3.0]), closure=closure, n_segment=0.04, flat_bed=np.array([1.0]))
    # geometry identity: on a level bed A = L h, P = L, every closure is (1/n) L h^(5/3)
    np.testing.assert_allclose(k[0], [0.0, 5.0 * 2.0 ** (5 / 3) / 0.04], rtol=1e-12)


@pytest.mark.parametrize("closure", ["flat", "lumped", "strip"])
@pytest.mark.parametrize("composite", COMPOSITE_METHODS)
def test_doubling_n_halves_conveyance(closure, composite):
    prof = Profiles([0, 0, 0, 0], [0.0, 1.0, 2.5, 3.0], [1.0, 0.2, 0.0, 1.3], 1)
    n = np.array([0.03, 0.05, 0.02, 0.04])
    stages = np.array([0.1, 0.5, 1.2, 2.0])
    kw = {"closure": closure, "composite": composite, "flat_bed": np.array([0.3])}
    k1 = face_conveyance(prof, stages, n_segment=n, **kw)
    k2 = face_conveyance(prof, stages, n_segment=2 * n, **kw)
    # scaling law of Manning's equation: K is proportional to 1/n (DESIGN.md section 5)
    np.testing.assert_allclose(k2, k1 / 2, rtol=1e-12)
    assert np.all(k1[:, 1:] > 0)


def test_lumped_composite_uses_wet_parts_only():
    # left half rough and low, right half smooth and high
    prof = Profiles([0, 0, 0], [0.0, 1.0, 2.0], [0.0, 0.0, 1.0], 1)
    n = np.array([0.08, 0.02, np.nan])
    k = face_conveyance(prof, np.array([0.5]), closure="lumped", n_segment=n)
    a = face_stage_table(prof, np.array([0.5]))
    area, perim = a["flow_area"][0, 0], a["wetted_perimeter"][0, 0]
    # Horton-Einstein (Chow 1959 6-7) over wet parts: P1 = 1 (n = 0.08), P2 = sqrt(2)/2
    p1, p2 = 1.0, math.sqrt(2) / 2
    n_e = ((p1 * 0.08**1.5 + p2 * 0.02**1.5) / (p1 + p2)) ** (2 / 3)
    assert perim == pytest.approx(p1 + p2)  # geometry identity
    assert k[0, 0] == pytest.approx(area * (area / perim) ** (2 / 3) / n_e, rel=1e-12)
    k_low = face_conveyance(prof, np.array([0.0, 1e-3]), closure="lumped", n_segment=n)
    assert k_low[0, 0] == 0.0  # dry at the lowest point (DESIGN.md: wet where z < eta)
    # barely wet: the level rough part and 1e-3 of the slope; Horton-Einstein over them
    y = 1e-3
    area = y + y * y / 2
    p1, p2 = 1.0, math.sqrt(2) * y
    n_e = ((p1 * 0.08**1.5 + p2 * 0.02**1.5) / (p1 + p2)) ** (2 / 3)
    assert k_low[0, 1] == pytest.approx(area * (area / (p1 + p2)) ** (2 / 3) / n_e, rel=1e-12)


def test_flat_uses_plan_length_composite():
    prof = Profiles([0, 0, 0], [0.0, 1.0, 4.0], [5.0, 3.0, 4.0], 1)
    n = np.array([0.02, 0.05, 0.0])
    k = face_conveyance(prof, np.array([1.5]), closure="flat", n_segment=n[:2], flat_bed=np.array([0.5]))
    # Horton-Einstein at equal depth, plan-length weights (Chow 1959 6-7)
    n_f = ((1 * 0.02**1.5 + 3 * 0.05**1.5) / 4) ** (2 / 3)
    assert k[0, 0] == pytest.approx(4.0 * 1.0 / n_f, rel=1e-12)


def test_conveyance_nan_and_errors():
    k = face_conveyance(V, np.array([np.nan, 1.0]), closure="strip")
    assert np.isnan(k[0, 0]) and k[0, 1] > 0
    with pytest.raises(InputError):
        face_conveyance(V, np.array([1.0]), closure="divided")
    with pytest.raises(InputError):
        face_conveyance(V, np.array([1.0]), closure="flat")  # needs flat_bed
    with pytest.raises(InputError):
        face_conveyance(V, np.array([1.0]), closure="lumped", composite="average")
    with pytest.raises(InputError):
        face_conveyance(V, np.array([1.0]), closure="strip", n_segment=np.ones(7))
    with pytest.raises(InputError):
        face_conveyance(V, np.array([1.0]), closure="strip", n_segment=np.array([0.03, -1.0]))


@pytest.mark.parametrize(
    ("z0", "z1", "ds", "eta"),
    [
        (0.0, 1.0, 2.0, 0.4),  # partly wet
        (0.0, 1.0, 2.0, 3.0),  # fully wet
        (1.0, 1.0 + 1e-5, 1.0, 2.0),  # nearly level, fully wet (Simpson branch)
        (2.0, 2.0, 1.5, 2.7),  # level
        (3.0, 1.0, 1.0, 2.5),  # falling
    ],
)
def test_segment_h53_against_quadrature(z0, z1, ds, eta):
    out = segment_hydraulics(
        np.array([z0]), np.array([z1]), np.array([ds]), np.array([math.hypot(ds, z1 - z0)]), np.array([[eta]])
    )

    def depth(s):
        return max(eta - (z0 + (z1 - z0) * s / ds), 0.0)

    expected = quad(lambda s: depth(s) ** (5 / 3), 0.0, ds, limit=200, points=[ds / 2])[0]
    # numerical quadrature of the definition (strip conveyance of one segment)
    assert out["h53"][0, 0] == pytest.approx(expected, rel=1e-8)
    assert out["area"][0, 0] == pytest.approx(quad(depth, 0.0, ds, limit=200)[0], rel=1e-8)


# --- Chow (1959) Example 6-2 from a DEM ----------------------------------------------


def test_normal_depth_chow_example_6_2():
    # trapezoid b = 20 ft, side slopes 2:1, built into a DEM of 0.1 ft pixels (units: ft)
    pixel, half = 0.1, 25.0
    n_px = int(2 * half / pixel)
    x = -half + (np.arange(n_px) + 0.5) * pixel
    z = np.clip((np.abs(x) - 10.0) / 2.0, 0.0, 6.0)
    dem = np.broadcast_to(z[None, :], (20, n_px)).copy()
    tr = Affine(pixel, 0, -half, 0, -pixel, 1.0)
    prof = sample_profiles([shapely.LineString([(-24.0, 0.0), (24.0, 0.0)])], dem, tr, pixel / 2)
    s0, q = 0.0016, 400.0

    def residual(y):
        k = face_conveyance(prof, np.array([[y]]), closure="lumped", n_segment=0.025, k=1.486)
        return k[0, 0] * math.sqrt(s0) - q

    y_n = brentq(residual, 0.5, 5.0, xtol=1e-8)
    # Chow (1959) Example 6-2 (from memory): y_n = 3.36 ft, printed to 0.01 ft;
    # tolerance 0.01 ft covers the rounding of the printed answer
    assert y_n == pytest.approx(3.36, abs=0.01)


# --- properties: closures against the flat face --------------------------------------

profile_points = st.lists(
    st.tuples(st.floats(0.05, 3.0), st.floats(-2.0, 2.0)), min_size=2, max_size=10
)


@settings(max_examples=30, deadline=None)
@given(points=profile_points, rise=st.floats(0.01, 3.0))
def test_strip_and_lumped_against_flat(points, rise):
    steps, z = zip(*points, strict=True)
    station = np.concatenate([[0.0], np.cumsum(steps[1:])])
    prof = Profiles(np.zeros(len(z), dtype=np.int64), station, np.array(z), 1)
    length = station[-1]
    summary = face_profile_summary(prof)
    eta = np.array([summary["high_point"][0] + rise])  # wet along the whole face
    area = face_stage_table(prof, eta)["flow_area"][0, 0]
    bed = np.array([eta[0] - area / length])  # flat face of the same mean depth / area
    flat = face_conveyance(prof, eta, closure="flat", flat_bed=bed)[0, 0]
    strip = face_conveyance(prof, eta, closure="strip")[0, 0]
    lumped = face_conveyance(prof, eta, closure="lumped")[0, 0]
    # derived (METHODS.md): Jensen, h^(5/3) convex -> mean h^(5/3) >= (mean h)^(5/3)
    assert strip >= flat * (1 - 1e-9)  # 1e-9: rounding only
    # derived: equal A and P >= L when wet along the whole face -> A R^(2/3) <= L h^(5/3)
    assert lumped <= flat * (1 + 1e-9)  # 1e-9: rounding only


# --------------------------------------------------------------------------- strip kernel
@pytest.mark.parametrize(
    "low, high",
    [(1e-100, 1e-80), (1e-6, 1e-3), (1e-3, 1.0), (1.0, 100.0), (100.0, 1e5), (1e100, 1e115)],
)
def test_strip_station_terms_against_extended_precision(low, high):
    """One breakpoint per query: the kernel's x^(8/3) (ramp) and x^(5/3) (level step)
    against numpy's cube root in extended precision (80-bit on x86; identical to float64
    where the platform has none).  Power laws: x^(8/3) = (x^2)^(4/3), x^(5/3) = x (x^2)^(1/3).

    Tolerance 7e-16 relative (3 units in the last place at most 2.2e-16 each): the
    kernel's own root is within 2 units of the exact x^(2/3) (1.83 at most over 600,000
    values from 1e-200 to 1e200), and x * x and the last product round once more each."""
    from ntrans._kernels import strip_station_sums

    rng = np.random.default_rng(7)
    x = np.exp(rng.uniform(np.log(low), np.log(high), 2000))
    n = x.size
    first, end = np.arange(n), np.arange(n) + 1
    ones, zeros = np.ones(n), np.zeros(n)
    ramp = strip_station_sums(x, first, end, zeros, ones, zeros, np.zeros(n, dtype=bool))
    level = strip_station_sums(x, first, end, zeros, zeros, ones, np.ones(n, dtype=bool))
    xl = x.astype(np.longdouble)
    root = np.cbrt(xl * xl)  # x^(2/3)
    tol = 7e-16 if np.finfo(np.longdouble).eps < np.finfo(np.float64).eps else 1e-15
    np.testing.assert_allclose(ramp, (xl * xl * root).astype(np.float64), rtol=tol, atol=0)
    np.testing.assert_allclose(level, (xl * root).astype(np.float64), rtol=tol, atol=0)


def test_strip_station_terms_edge_values():
    """Zero depth gives zero; a breakpoint's step counts only where it is level; sums
    run over ``[first, end)`` only (an empty range gives 0)."""
    from ntrans._kernels import strip_station_sums

    x = np.array([0.0, 8.0, 8.0, 8.0])
    b = np.zeros(4)
    c83 = np.array([1.0, 1.0, 0.0, 2.0])
    c53 = np.array([5.0, 0.0, 1.0, 1.0])
    is_level = np.array([True, False, True, False])
    first = np.array([0, 1, 2, 3])
    end = np.array([1, 2, 3, 3])
    out = strip_station_sums(x, first, end, b, c83, c53, is_level)
    # 8^(8/3) = 256 and 8^(5/3) = 32 exactly; the last query's range is empty
    np.testing.assert_array_equal(out, [0.0, 256.0, 32.0, 0.0])
