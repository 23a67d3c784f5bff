"""Tests of ntrans.translate: closures on sufficient statistics, ratios, class fit, stage bias."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from ntrans.quantiles import SpilledQuantiles
from ntrans.translate import (
    COMPOSITES,
    FLAG_MEANINGS,
    CellGeometry,
    ClassStats,
    FaceGeometry,
    Family,
    FlatGeometry,
    _pairs,
    bias_summary,
    bias_summary_spilled,
    combine_fit_terms,
    composite_n,
    conveyance,
    fit_class_n,
    fit_terms,
    flag_lines,
    flags_explained,
    n_ratio,
    segment_integrals,
    solve_class_n,
    stage_bias,
    weighted_quantile,
)

# ----------------------------------------------------------------------------- helpers


def trapezoid_profile(b: float, zs: float, bank: float, plain: float = 0.0, bed: float = 0.0):
    """Stations / elevations across a trapezoidal channel (bottom b, side slope zs:1, bank
    height ``bank``) with flat ground of width ``plain`` on each side at the bank top."""
    x = [0.0, plain, plain + zs * bank, plain + zs * bank + b, plain + 2 * zs * bank + b,
         2 * plain + 2 * zs * bank + b]
    z = [bank, bank, 0.0, 0.0, bank, bank]
    x, z = np.array(x), np.array(z) + bed
    if plain == 0.0:
        x, z = x[1:-1], z[1:-1]
    return x, z


def faces_from_profiles(profiles, classes=None, n_classes=1):
    """FaceGeometry from a list of (x, z) profiles; ``classes`` = per-point segment classes."""
    face = np.concatenate([np.full(len(x), i) for i, (x, _) in enumerate(profiles)])
    st = np.concatenate([x for x, _ in profiles])
    z = np.concatenate([z for _, z in profiles])
    cls = np.zeros(face.size, dtype=int) if classes is None else np.concatenate(classes)
    return FaceGeometry(face, st, z, cls, len(profiles), n_classes)


def chow_trapezoid(b, zs, y):
    """Chow (1959) Table 2-1: trapezoid A = (b + z y) y, P = b + 2 y sqrt(1 + z^2)."""
    return (b + zs * y) * y, b + 2 * y * np.sqrt(1 + zs**2)


# ----------------------------------------------------------------------------- composite n

TWO_P = np.array([2.0, 3.0])
TWO_N = np.array([0.02, 0.04])
TWO_R = np.array([1.0, 0.5])


@pytest.mark.parametrize(
    ("method", "expected"),
    [
        # published formula: Horton-Einstein, Chow (1959) 6-7: ((2*0.02^1.5 + 3*0.04^1.5)/5)^(2/3)
        ("horton_einstein", ((2 * 0.02**1.5 + 3 * 0.04**1.5) / 5) ** (2 / 3)),
        # published formula: Pavlovskii / Einstein-Banks, Yen (2002): sqrt((2*0.02^2 + 3*0.04^2)/5)
        ("pavlovskii", np.sqrt((2 * 0.02**2 + 3 * 0.04**2) / 5)),
        # published formula: Lotter, Chow (1959) 6-7: P R^(5/3) / sum(P_i R_i^(5/3) / n_i),
        # R = (2*1 + 3*0.5)/5 = 0.7
        ("lotter", 5 * 0.7 ** (5 / 3) / (2 * 1 / 0.02 + 3 * 0.5 ** (5 / 3) / 0.04)),
    ],
)
def test_composite_two_part_by_hand(method, expected):
    got = composite_n(TWO_P, TWO_N, method, radius=TWO_R)
    assert got == pytest.approx(expected, rel=1e-12)  # same arithmetic, rounding only
    # the same section through the sufficient statistics: one item, two class pairs
    area = TWO_P * TWO_R
    stats = ClassStats(np.array([0, 0]), np.array([0, 1]), 1, 2, TWO_P, TWO_P[:, None],
                       TWO_P[:, None], area[:, None], np.zeros((2, 1)))
    k = conveyance(stats, TWO_N, closure="lumped", composite=method)
    big_a, big_p = area.sum(), TWO_P.sum()
    # Manning, Chow (1959): K = A R^(2/3) / n_e
    assert k[0, 0] == pytest.approx(big_a * (big_a / big_p) ** (2 / 3) / expected, rel=1e-12)


@pytest.mark.parametrize("method", COMPOSITES)
def test_composite_equal_n_returns_n(method):
    # published property of every composite (Yen 2002): equal parts give that n (Lotter:
    # when the parts also share one hydraulic radius, as in a flat bed)
    got = composite_n(np.array([1.0, 4.0, 2.5]), np.full(3, 0.035), method,
                      radius=np.full(3, 0.6))
    assert got == pytest.approx(0.035, rel=1e-12)  # rounding only


def test_conveyance_scales_with_one_over_n():
    x, z = trapezoid_profile(4.0, 2.0, 2.0, plain=5.0)
    geom = faces_from_profiles([(x, z)])
    st = geom.stats(np.array([[1.0, 2.5]]))
    for closure in ("lumped", "strip"):
        k1 = conveyance(st, np.array([0.03]), closure=closure)
        k2 = conveyance(st, np.array([0.06]), closure=closure)
        np.testing.assert_allclose(k2, k1 / 2, rtol=1e-12)  # Manning: doubling n halves K


# ----------------------------------------------------------------------------- geometry


def test_segment_integrals_partly_wet_triangle():
    # a segment from depth 2 to depth -2 over plan length 4: wet half, triangle of depth
    # 0..2 over 2 units: area 2, integral of h^(5/3) = 2 * 2^(5/3) / (8/3)  (calculus)
    wet, per, area, strip = segment_integrals(np.array([2.0]), np.array([-2.0]),
                                              np.array([4.0]), np.array([5.0]))
    assert wet[0] == pytest.approx(2.0, rel=1e-12)
    assert per[0] == pytest.approx(2.5, rel=1e-12)
    assert area[0] == pytest.approx(2.0, rel=1e-12)
    assert strip[0] == pytest.approx(2 * 2 ** (5 / 3) / (8 / 3), rel=1e-12)


@pytest.mark.parametrize("y", [0.5, 1.0, 1.9])
def test_face_stats_trapezoid_chow(y):
    b, zs = 4.0, 2.0
    x, z = trapezoid_profile(b, zs, 2.0, plain=3.0)
    st = faces_from_profiles([(x, z)]).stats(np.array([[y]]))
    a, p = chow_trapezoid(b, zs, y)
    assert st.area.sum() == pytest.approx(a, rel=1e-12)  # Chow (1959) Table 2-1, trapezoid
    assert st.perimeter.sum() == pytest.approx(p, rel=1e-12)  # Chow (1959) Table 2-1
    assert st.wet.sum() == pytest.approx(b + 2 * zs * y, rel=1e-12)  # Chow Table 2-1, T


def test_cell_lumped_tilted_plane_shortcut():
    # a fully wet cell on a plane of slope 0.5 (x): A_bed = A_w sqrt(1 + 0.5^2)
    # (METHODS.md, plane check [der]); flat cell at the mean elevation has the same volume.
    # Per-cell shortcut at equal volume, METHODS.md "Translation rule" [der]:
    # n_t / n_s = (A_w / A_bed)^(2/3) = (1 + 0.25)^(-1/3)
    cols = np.arange(10)
    zpix = 0.5 * (cols + 0.5)
    s = np.sqrt(1 + 0.25)
    geom = CellGeometry(np.zeros(10, int), zpix, np.ones(10), np.full(10, s),
                        np.zeros(10, int), 1, 1)
    flat = FlatGeometry.from_geometry(geom, np.array([zpix.mean()]))
    stage = np.array([[10.0]])
    ks = conveyance(flat.stats(stage), np.array([0.03]))
    kt = conveyance(geom.stats(stage), np.array([0.03]))
    assert n_ratio(ks, kt).ratio[0, 0] == pytest.approx((1 / s**2) ** (1 / 3), rel=1e-12)


def test_cell_conveyance_form_neff():
    # two wet pixels, depths 1 and 3, n 0.03 and 0.05: n_eff = <h>^(5/3) / <h^(5/3)/n>
    # (Volp et al. 2013, METHODS.md [pub, formula mem]); K = k V <h>^(2/3) / n_eff
    geom = CellGeometry(np.zeros(2, int), np.array([2.0, 0.0]), np.ones(2), np.ones(2),
                        np.array([0, 1]), 1, 2)
    st = geom.stats(np.array([[3.0]]))
    n = np.array([0.03, 0.05])
    k = conveyance(st, n, closure="strip")
    n_eff = 2.0 ** (5 / 3) / ((1 / 0.03 + 3 ** (5 / 3) / 0.05) / 2)
    assert k[0, 0] == pytest.approx(4.0 * 2.0 ** (2 / 3) / n_eff, rel=1e-12)


# ----------------------------------------------------------------------------- ratios


def test_n_ratio_nan_where_one_dry_and_flagged():
    ks = np.array([[0.0, 1.0, 2.0, 0.0]])
    kt = np.array([[1.0, 0.0, 1.0, 0.0]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no divide-by-zero warning
        res = n_ratio(ks, kt)
    np.testing.assert_array_equal(np.isnan(res.ratio), [[True, True, False, True]])
    assert res.ratio[0, 2] == 0.5
    np.testing.assert_array_equal(res.mismatch, [[True, True, False, False]])


FAMILY_PAIRS = [("flat", "lumped"), ("flat", "strip"), ("lumped", "flat"), ("strip", "flat"),
                ("lumped", "strip"), ("strip", "lumped")]


@pytest.mark.parametrize(("src", "tgt"), FAMILY_PAIRS)
@pytest.mark.parametrize("composite", COMPOSITES)
def test_flat_dem_identity(src, tgt, composite):
    # geometry identity: on flat terrain every family has the same geometry, so the ratio
    # is 1 and the stage bias 0, whatever the closure (faces and cells)
    x = np.linspace(0, 10, 21)
    prof = [(x, np.full(x.size, 5.0)), (x[:11], np.full(11, 5.0))]
    cls = [np.r_[np.zeros(10, int), np.ones(11, int)], np.zeros(11, int)]
    fg = faces_from_profiles(prof, cls, n_classes=2)
    cg = CellGeometry(np.repeat([0, 1], 4), np.full(8, 5.0), np.ones(8), np.ones(8),
                      np.tile([0, 1], 4), 2, 2)
    n = np.array([0.03, 0.06])
    for geom in (fg, cg):
        fam = {"flat": Family(FlatGeometry.from_geometry(geom, np.full(2, 5.0))),
               "lumped": Family(geom, "lumped"), "strip": Family(geom, "strip")}
        stages = np.array([[5.5, 6.0, 8.0], [5.2, 7.0, 9.0]])
        ks = fam[src].conveyance(stages, n, composite=composite)
        kt = fam[tgt].conveyance(stages, n, composite=composite)
        res = n_ratio(ks, kt)
        if "strip" in (src, tgt) and composite != "lotter":
            # two classes side by side at equal depth: Horton/Pavlovskii composites differ
            # from the divided sum (Lotter); one-class items: next test
            continue
        np.testing.assert_allclose(res.ratio, 1.0, rtol=1e-12)  # geometry identity
        sb = stage_bias(stages, ks, fam[tgt], n, n, composite=composite)
        np.testing.assert_allclose(sb.unadjusted, 0.0, atol=1e-6)  # bisection tolerance 1e-7 x depth


def test_flat_dem_identity_one_class_all_closures():
    x = np.linspace(0, 10, 21)
    fg = faces_from_profiles([(x, np.full(x.size, 1.0))])
    stages = np.array([[1.5, 3.0]])
    n = np.array([0.04])
    flat = Family(FlatGeometry.from_geometry(fg, np.array([1.0])))
    for closure in ("lumped", "strip"):
        for composite in COMPOSITES:
            res = n_ratio(flat.conveyance(stages, n),
                          Family(fg, closure).conveyance(stages, n, composite=composite))
            np.testing.assert_allclose(res.ratio, 1.0, rtol=1e-12)  # geometry identity


# ----------------------------------------------------------------------------- analytic channel


@pytest.mark.parametrize("y", [0.6, 1.2, 1.8])
def test_trapezoid_ratio_closed_form(y):
    # flat face at the channel bottom, of the channel's top width at bank level (L = 12)
    b, zs, bank = 4.0, 2.0, 2.0
    x, z = trapezoid_profile(b, zs, bank)
    fg = faces_from_profiles([(x, z)])
    L = x[-1] - x[0]
    flat = Family(FlatGeometry.from_geometry(fg, np.array([0.0])))
    st = np.array([[y]])
    n = np.array([0.035])
    res = n_ratio(flat.conveyance(st, n), Family(fg, "lumped").conveyance(st, n))
    a, p = chow_trapezoid(b, zs, y)
    expected = a ** (5 / 3) * p ** (-2 / 3) / (L * y ** (5 / 3))
    assert res.ratio[0, 0] == pytest.approx(expected, rel=1e-12)  # Chow (1959) Table 2-1, trapezoid


def wide_channel_geometry():
    """A 40-wide face: trapezoidal channel (b 4, z 2, depth 2) in flat ground at 2."""
    x, z = trapezoid_profile(4.0, 2.0, 2.0, plain=14.0)
    return faces_from_profiles([(x, z)]), x, z


def test_regime_high_stage_lumped_needs_lower_n_and_raises_stage():
    fg, x, z = wide_channel_geometry()
    L = x[-1] - x[0]
    eta = np.array([[3.0, 4.0]])  # wet along the whole face length
    # flat face with the same flow area: bed at eta - A / L
    area = fg.stats(eta).area.sum(axis=0)
    z_flat = eta[0, 0] - area[0] / L
    flat = Family(FlatGeometry.from_geometry(fg, np.array([z_flat])))
    n = np.array([0.035])
    ks = flat.conveyance(eta[:, :1], n)
    kt = Family(fg, "lumped").conveyance(eta[:, :1], n)
    assert fg.stats(eta[:, :1]).area.sum() == pytest.approx(L * (eta[0, 0] - z_flat))  # equal area
    r = n_ratio(ks, kt).ratio[0, 0]
    # equal A, P > L, so R_sub < h: lumped needs a LOWER n (common practice, no source)
    assert r < 1.0
    sb = stage_bias(eta[:, :1], ks, Family(fg, "lumped"), n, n)
    assert sb.unadjusted[0, 0] > 0.0  # carrying n over raises the stage (common practice, no source)


def test_regime_low_stage_channel_concentrates_flow():
    fg, x, z = wide_channel_geometry()
    # flat face at the cell's mean elevation (ground mostly at 2, channel below)
    z_mean = fg.mean_elevation[0]
    eta = np.array([[z_mean + 0.1]])  # flat face shallow along its whole length
    n = np.array([0.035])
    ks = Family(FlatGeometry.from_geometry(fg, np.array([z_mean]))).conveyance(eta, n)
    kt = Family(fg, "lumped").conveyance(eta, n)
    assert n_ratio(ks, kt).ratio[0, 0] > 1.0  # terrain concentrates flow [der, DESIGN.md 2]


def test_strip_needs_higher_n_at_equal_mean_depth():
    fg, x, z = wide_channel_geometry()
    L = x[-1] - x[0]
    eta = np.array([[3.0]])
    z_flat = eta[0, 0] - fg.stats(eta).area.sum() / L  # equal mean depth
    n = np.array([0.035])
    ks = Family(FlatGeometry.from_geometry(fg, np.array([z_flat]))).conveyance(eta, n)
    kt = Family(fg, "strip").conveyance(eta, n)
    # h^(5/3) is convex, so the strip sum exceeds L hbar^(5/3) (Jensen) [der, METHODS.md]
    assert n_ratio(ks, kt).ratio[0, 0] > 1.0


# ----------------------------------------------------------------------------- class fit


def channel_mesh(n_faces: int = 24, seed: int = 3, single_class: bool = False):
    """Faces across channels of varying bottom width / bank height; the flat ground and
    the channel are two classes (0 = channel, 1 = floodplain), or with ``single_class``
    odd faces are all class 1 and even faces all class 0."""
    rng = np.random.default_rng(seed)
    profiles, classes = [], []
    for _ in range(n_faces):
        b = rng.uniform(2.0, 6.0)
        bank = rng.uniform(1.0, 2.0)
        x, z = trapezoid_profile(b, 2.0, bank, plain=rng.uniform(4.0, 10.0))
        profiles.append((x, z))
        # segments: plain | bank | bottom | bank | plain | (last point ignored)
        if single_class:
            classes.append(np.full(6, len(profiles) % 2))
        else:
            classes.append(np.array([1, 0, 0, 0, 1, 1]))
    return faces_from_profiles(profiles, classes, n_classes=2)


@pytest.mark.parametrize("closure", ["lumped", "strip"])
@pytest.mark.parametrize("composite", COMPOSITES)
def test_fit_recovers_known_class_n(closure, composite):
    # built so the answer is known: the source conveyance IS the target's at n_true
    fg = channel_mesh()
    stages = np.tile([2.5, 3.0, 3.5], (fg.n_items, 1))
    st = fg.stats(stages)
    n_true = np.array([0.028, 0.06])
    ks = conveyance(st, n_true, closure=closure, composite=composite)
    fit = fit_class_n(ks, st, np.array([0.035, 0.035]), closure=closure, composite=composite)
    np.testing.assert_allclose(fit.n_target, n_true, rtol=1e-5)  # exact answer; solver tolerance
    assert fit.items.tolist() == [24, 24]
    assert fit.weight_share.sum() == pytest.approx(1.0)


def test_round_trip_flat_subgrid_flat():
    fg = channel_mesh(seed=5, single_class=True)
    z_flat = fg.mean_elevation
    flat = FlatGeometry.from_geometry(fg, z_flat)
    depths = np.array([0.8, 1.2, 1.6])
    stages = z_flat[:, None] + depths[None, :]
    n0 = np.array([0.035, 0.035])
    ks = conveyance(flat.stats(stages), n0)
    fit1 = fit_class_n(ks, fg.stats(stages), n0)
    k_sub = conveyance(fg.stats(stages), fit1.n_target)
    fit2 = fit_class_n(k_sub, flat.stats(stages), fit1.n_target)
    # round trip (DESIGN.md 5); 0.5% = the tolerance for the differing weights
    np.testing.assert_allclose(fit2.n_target, n0, rtol=0.005)


def test_fit_with_fitted_n_one_class_bias_small():
    # one class, one trapezoid face ending at the bank tops, window above the banks (the
    # face wet along its whole length), flat source bed at the profile's mean elevation:
    # A = L (eta - z_mean), P constant, so the ratio is (L / P)^(2/3) at every stage
    b, zs, bank = 4.0, 2.0, 2.0
    x, z = trapezoid_profile(b, zs, bank)
    fg = faces_from_profiles([(x, z)])
    L = x[-1] - x[0]
    z_mean = fg.mean_elevation[0]
    flat = Family(FlatGeometry.from_geometry(fg, np.array([z_mean])))
    stages = np.array([[2.5, 3.0, 4.0]])
    n = np.array([0.03])
    ks = flat.conveyance(stages, n)
    fit = fit_class_n(ks, fg.stats(stages), n)
    _, p = chow_trapezoid(b, zs, bank)
    assert fit.ratio[0] == pytest.approx((L / p) ** (2 / 3), rel=1e-6)  # Chow (1959) Table 2-1, P
    sb = stage_bias(stages, ks, Family(fg, "lumped"), n, fit.n_target, item_class=np.array([0]),
                    classes=["a"])
    depth = stages - z_mean
    # with the fitted n the stage bias is below 1% of the depth (issue requirement)
    assert np.all(np.abs(sb.adjusted) < 0.01 * depth)
    # carried over: L h_t^(5/3) (L/P)^(2/3) = L h^(5/3), so h_t = h (P/L)^(2/5) while the
    # face stays wholly wet [der from Chow (1959) Table 2-1 elements]; bisection tolerance
    np.testing.assert_allclose(sb.unadjusted, depth * ((p / L) ** 0.4 - 1), rtol=1e-6)
    assert sb.summary["adjusted"]["a"]["count"] == 3


def test_stage_bias_closed_form_flat_to_flat():
    # flat to flat with doubled n: K ~ h^(5/3)/n, so h_t = h_s * 2^(3/5) (Manning, Chow 1959)
    x = np.linspace(0, 10, 3)
    fg = faces_from_profiles([(x, np.zeros(3))])
    fam = Family(FlatGeometry.from_geometry(fg, np.array([0.0])))
    eta = np.array([[1.0, 2.0]])
    ks = fam.conveyance(eta, np.array([0.03]))
    sb = stage_bias(eta, ks, fam, np.array([0.06]), np.array([0.03]))
    np.testing.assert_allclose(sb.unadjusted, eta * (2 ** 0.6 - 1), rtol=1e-9)  # K^(3/5) step exact
    np.testing.assert_allclose(sb.adjusted, 0.0, atol=1e-9)


def test_compound_channel_closed_form():
    # main channel (trapezoid b 6, z 1, depth 2 below the plain) and floodplains (2 x 20),
    # two classes; plus pure floodplain faces.  Source: flat faces (floodplain faces at the
    # ground, z = 2; compound faces at the profile's mean elevation z_f); target lumped,
    # Horton-Einstein.  Closed form (independent of the fit code): floodplain faces give
    # n2' directly; compound faces then give n1' from
    # n_e^1.5 P = P_m n1'^1.5 + P_f n2'^1.5 (Chow 1959 6-7), n_e = A R^(2/3) / K_s.
    b, zs, bank, plain = 6.0, 1.0, 2.0, 20.0
    xc, zc = trapezoid_profile(b, zs, bank, plain=plain)
    cls_c = np.array([1, 0, 0, 0, 1, 1])
    xp = np.linspace(0, 30, 4)
    zp = np.full(4, bank)
    fg = faces_from_profiles([(xc, zc), (xp, zp)], [cls_c, np.ones(4, int)], n_classes=2)
    z_f = np.array([fg.mean_elevation[0], bank])  # source flat beds: profile mean elevation
    flat = FlatGeometry.from_geometry(fg, z_f)
    n_s = np.array([0.03, 0.05])
    y = 1.0  # depth over the floodplain
    eta = np.full((2, 1), bank + y)
    ks = conveyance(flat.stats(eta), n_s)
    fit = fit_class_n(ks, fg.stats(eta), n_s)

    # closed form from Chow Table 2-1 elements
    Lc, Lp = xc[-1], xp[-1]
    # source flat compound face: n_f by Horton over plan lengths (main = b + 2 zs bank)
    lm = b + 2 * zs * bank
    nf = ((lm * 0.03**1.5 + (Lc - lm) * 0.05**1.5) / Lc) ** (2 / 3)
    ks_c = Lc * (bank + y - z_f[0]) ** (5 / 3) / nf
    ks_p = Lp * y ** (5 / 3) / 0.05
    n2 = Lp * y ** (5 / 3) / ks_p  # floodplain face: flat terrain, A = L y, P = L
    a_m, p_m = chow_trapezoid(b, zs, bank)
    a_m += (b + 2 * zs * bank) * y  # main channel area over the bank line
    a_f, p_f = 2 * plain * y, 2 * plain
    A, P = a_m + a_f, p_m + p_f
    n_e = A * (A / P) ** (2 / 3) / ks_c
    n1 = ((n_e**1.5 * P - p_f * n2**1.5) / p_m) ** (2 / 3)
    np.testing.assert_allclose(fit.n_target, [n1, n2], rtol=0.02)  # issue tolerance; exactly determined


def test_weighted_quantile_plain_cases():
    v = np.array([1.0, 2.0, 3.0, 4.0])
    # equal weights: the mid-step ECDF puts the median halfway between 2 and 3 (definition)
    assert weighted_quantile(v, np.ones(4), [0.5])[0] == pytest.approx(2.5)
    # all the weight on one value returns it (definition)
    assert weighted_quantile(v, np.array([0, 0, 1.0, 0]), [0.1, 0.9]).tolist() == [3.0, 3.0]


@pytest.mark.parametrize("n", [1, 2, 3, 10, 1000])
def test_weighted_quantile_is_the_interpolated_mid_step_ecdf(n):
    # the definition written out (sorted copies, np.interp over the mid-step cumulative
    # weights); the index-sort version must give the same numbers to the bit, ties, zero
    # weights, NaN values and the ends (q = 0, 1) included
    rng = np.random.default_rng(n)
    v, w = rng.normal(size=n), rng.random(n)
    w[rng.random(n) < 0.2] = 0.0
    if n > 3:
        v[:3] = v[3]
        v[-1] = np.nan
    q = np.r_[0.0, 0.001, 0.1, 0.5, 0.9, 0.999, 1.0, rng.random(5)]
    keep = np.isfinite(v) & (w > 0)
    vs, ws = v[keep], w[keep]
    order = np.argsort(vs, kind="stable")
    vs, ws = vs[order], ws[order]
    expected = (np.interp(q, (np.cumsum(ws) - 0.5 * ws) / ws.sum(), vs) if vs.size
                else np.full(q.shape, np.nan))
    np.testing.assert_array_equal(weighted_quantile(v, w, q), expected)


def test_bias_summary_gathered_tile_by_tile_is_the_whole_arrays(tmp_path):
    # the adjustment gathers the bias tile by tile in a spill file (ntrans.quantiles); its
    # figures must be bias_summary's on the whole array (numpy median / quantile / max of
    # the same values; round-off: 1e-12 relative), items of no class in "overall" only
    rng = np.random.default_rng(4)
    n_items, n_stages, classes = 500, 6, ["a", "b", "c"]
    bias = rng.normal(0.0, 0.3, (n_items, n_stages))
    bias[rng.random(bias.shape) < 0.2] = np.nan  # dry
    dominant = rng.integers(-1, 3, n_items)
    dominant[dominant == 2] = 0  # class "c" holds no item: NaN figures, count 0
    whole = bias_summary(bias, dominant, classes)
    with SpilledQuantiles(tmp_path / "bias", len(classes) + 1, scale="asinh", unit=0.001,
                          weighted=False) as spill:
        for tile in np.array_split(np.arange(n_items), 7):
            group = np.where(dominant[tile] < 0, len(classes), dominant[tile])[:, None]
            spill.add(group, bias[tile])
        gathered = bias_summary_spilled(spill, classes)
    assert gathered.keys() == whole.keys()
    for name, figures in whole.items():
        assert gathered[name]["count"] == figures["count"]
        for key in ("median", "p90_abs", "max_abs"):
            np.testing.assert_allclose(gathered[name][key], figures[key], rtol=1e-12)
    assert gathered["c"]["count"] == 0 and np.isnan(gathered["c"]["median"])


def test_fit_flags():
    fg = channel_mesh(n_faces=3)
    stages = np.tile([2.5], (3, 1))
    st = fg.stats(stages)
    ks = conveyance(st, np.array([0.03, 0.04]))
    fit = fit_class_n(ks, st, np.array([0.03, 0.04]), outside_range=np.array([True, False]))
    assert "few_faces" in fit.flags[0] and "outside_published_range" in fit.flags[0]
    assert "outside_published_range" not in fit.flags[1]
    # every flag has its explanation for the report and the README
    for flags in fit.flags:
        assert all(name.split(":")[0] in FLAG_MEANINGS for name in flags), flags


def test_a_class_wet_nowhere_has_no_spread_of_its_own():
    # below the bank tops (bank heights 1-2 m) only the channel (class 0) is under water:
    # the floodplain class is not fitted, and the ratios of the faces that hold it by
    # extent are not its spread (blank, not the channel's ratios)
    fg = channel_mesh()
    st = fg.stats(np.tile([0.5, 0.9], (fg.n_items, 1)))
    n = np.array([0.03, 0.05])
    fit = fit_class_n(conveyance(st, n), st, n)
    assert "not_fitted" in fit.flags[1] and "not_fitted" not in fit.flags[0]
    assert np.isnan([fit.ratio_p10[1], fit.ratio_p50[1], fit.ratio_p90[1]]).all()
    # the channel's ratios are all 1 (the source is the target at the same n)
    np.testing.assert_allclose([fit.ratio_p10[0], fit.ratio_p90[0]], 1.0, rtol=1e-9)
    assert fit.n_target[1] == n[1]
    # the flag and the weight agree: the fit gives the dry class none of its weight
    assert fit.weight_share.tolist() == [1.0, 0.0]


@pytest.mark.parametrize("method, part", [
    # Horton-Einstein: n_e^1.5 = sum P_c n_c^1.5 / P, so d ln K / d ln n_c = -P_c n_c^1.5 / sum
    ("horton_einstein", 2 * 0.02**1.5 / (2 * 0.02**1.5 + 3 * 0.04**1.5)),
    # Pavlovskii: n_e^2 = sum P_c n_c^2 / P
    ("pavlovskii", 2 * 0.02**2 / (2 * 0.02**2 + 3 * 0.04**2)),
    # Lotter: K = sum P_c R_c^(5/3) / n_c, each part of K its own (R = 1 and 0.5)
    ("lotter", (2 / 0.02) / (2 / 0.02 + 3 * 0.5 ** (5 / 3) / 0.04)),
])
def test_weight_share_is_the_class_part_of_the_fit(method, part):
    # definition: the weight of an entry is split among its wet classes by minus
    # d ln K / d ln n_c at n carried over (derivative of the composite formulas, Chow 1959
    # 6-7), so the shares are the classes' parts of the entry's composite sum
    area = TWO_P * TWO_R
    stats = ClassStats(np.array([0, 0]), np.array([0, 1]), 1, 2, TWO_P, TWO_P[:, None],
                       TWO_P[:, None], area[:, None], np.zeros((2, 1)))
    ks = conveyance(stats, TWO_N, closure="lumped", composite=method)
    fit = fit_class_n(ks, stats, TWO_N, composite=method)
    np.testing.assert_allclose(fit.weight_share, [part, 1 - part], rtol=1e-12)  # rounding


@pytest.mark.parametrize("bad", [35.0, 10.0, 0.0004, 0.0049, 1.5])
def test_fit_refuses_a_source_n_outside_its_bounds(bad):
    # the fit searches n source / 10 .. x 10 within 0.005..1; outside, that range would be
    # empty or miss n source itself, so the input is refused with an InputError
    from ntrans.errors import RoughnessError

    fg = channel_mesh(n_faces=3)
    st = fg.stats(np.tile([2.5], (3, 1)))
    n = np.array([0.03, bad])
    with pytest.raises(RoughnessError):
        fit_class_n(conveyance(st, n), st, n)


@pytest.mark.parametrize(
    ("texts", "names"),
    [
        (["wide_spread;dry_wet_mismatch:12", "", None, float("nan")],
         ["wide_spread", "dry_wet_mismatch:N"]),
        (["at_bound", "few_faces;not_fitted"], ["not_fitted", "few_faces", "at_bound"]),
        (["dry_in_target", ""], []),  # names the fit does not write are left out
        ([], []),
    ],
)
def test_flags_explained_in_their_table_order(texts, names):
    explained = flags_explained(texts)
    assert [name for name, _ in explained] == names
    for name, meaning in explained:
        assert meaning == FLAG_MEANINGS[name.split(":")[0]]


def test_flag_lines_wrap_under_a_heading():
    lines = flag_lines(["wide_spread;outside_published_range"], width=60)
    assert lines[0] == "flags:"
    assert lines[1].startswith("  wide_spread: ")
    assert all(len(line) <= 60 for line in lines)
    # each flag starts a line two spaces in; its meaning wraps four spaces in
    starts = [line for line in lines[1:] if not line.startswith("    ")]
    assert [line.split(":")[0] for line in starts] == ["  wide_spread", "  outside_published_range"]
    assert " ".join(" ".join(lines[1:]).split()) == (
        f"wide_spread: {FLAG_MEANINGS['wide_spread']} "
        f"outside_published_range: {FLAG_MEANINGS['outside_published_range']}")
    assert flag_lines(["", None]) == []


def random_pair_stats(rng: np.random.Generator, n_items: int, n_classes: int, n_stages: int,
                      dry: float) -> ClassStats:
    """Items holding one to three classes in any order, a share ``dry`` of the pair-stages
    dry (zero) in every table."""
    item = np.concatenate([np.full(k, i) for i, k in enumerate(rng.integers(1, 4, n_items))])
    cls = np.concatenate([rng.choice(n_classes, np.count_nonzero(item == i), replace=False)
                          for i in range(n_items)])
    shuffle = rng.permutation(item.size)
    item, cls = item[shuffle], cls[shuffle]

    def table():
        t = rng.random((item.size, n_stages))
        t[rng.random(t.shape) < dry] = 0.0
        return t

    return ClassStats(item, cls, n_items, n_classes, rng.random(item.size), table(), table(),
                      table(), table())


def random_class_stats(seed: int, n_items: int = 300, n_classes: int = 4, n_stages: int = 5):
    """Random pair statistics and a source conveyance from another n with noise (so the
    fit has something to do)."""
    rng = np.random.default_rng(seed)
    stats = random_pair_stats(rng, n_items, n_classes, n_stages, dry=0.25)
    n_source = 0.02 + 0.05 * rng.random(n_classes)
    ks = conveyance(stats, 0.02 + 0.05 * rng.random(n_classes)) * rng.lognormal(0, 0.2, (n_items, n_stages))
    ks[rng.random(ks.shape) < 0.1] = 0.0  # source dry where the target may be wet
    return stats, ks, n_source


@pytest.mark.parametrize("closure, composite", [
    ("lumped", "horton_einstein"), ("lumped", "pavlovskii"), ("lumped", "lotter"),
    ("strip", "horton_einstein"),
])
def test_fit_residual_conveyance_is_the_conveyance_at_the_fit_entries(closure, composite):
    # the fit evaluates K only at the wet (item, stage) entries, from sums built once; it
    # must be the conveyance of the whole table at those entries (same operations per
    # entry, so equal to round-off), for items holding one to three classes in any order
    from ntrans.translate import _entry_conveyance

    rng = np.random.default_rng(7)
    n_items, n_classes, n_stages = 400, 4, 5
    stats = random_pair_stats(rng, n_items, n_classes, n_stages, dry=0.2)
    rows = np.sort(rng.choice(n_items, 300))  # repeated items allowed
    cols = rng.integers(0, n_stages, rows.size)
    n = 0.02 + 0.05 * rng.random(n_classes)
    whole = conveyance(stats, n, closure=closure, composite=composite)[rows, cols]
    at = _entry_conveyance(stats, rows, cols, closure=closure, composite=composite, k=1.0)(n)
    np.testing.assert_allclose(at, whole, rtol=1e-13, atol=0)


def items_subset(stats: ClassStats, keep: np.ndarray) -> ClassStats:
    """The statistics of the items ``keep`` (renumbered from 0), like one tile's."""
    local = np.full(stats.n_items, -1)
    local[keep] = np.arange(keep.size)
    pairs = np.flatnonzero(local[stats.item] >= 0)
    return ClassStats(local[stats.item[pairs]], stats.cls[pairs], keep.size, stats.n_classes,
                      stats.extent[pairs], stats.wet[pairs], stats.perimeter[pairs],
                      stats.area[pairs], stats.strip[pairs])


@pytest.mark.parametrize("closure, composite", [
    ("lumped", "horton_einstein"), ("lumped", "pavlovskii"), ("lumped", "lotter"),
    ("strip", "horton_einstein"),
])
def test_fit_cost_is_the_whole_sum_of_squares(closure, composite):
    # the fit sums the item-stages wet in one class only into three numbers per class and
    # stage; sum w (d - x)^2 = W (m - x)^2 + sum w (d - m)^2 (sum-of-squares decomposition,
    # an algebraic identity), so its cost must equal half the sum of squares over EVERY wet
    # item-stage, evaluated here one by one at the fitted n (round-off: 1e-10 relative)
    from ntrans.translate import _entry_conveyance

    stats, ks, n_source = random_class_stats(3)
    fit = fit_class_n(ks, stats, n_source, closure=closure, composite=composite)
    assert fit.success
    kt0 = conveyance(stats, n_source, closure=closure, composite=composite)
    both = np.isfinite(n_ratio(ks, kt0).ratio)
    used = np.where(both, ks, 0.0)
    w = used / used.sum(axis=0) / np.count_nonzero(used.sum(axis=0) > 0)
    rows, cols = np.nonzero(w > 0)
    kt = _entry_conveyance(stats, rows, cols, closure=closure, composite=composite, k=1.0)
    r = np.sqrt(w[rows, cols]) * (np.log(kt(fit.n_target)) - np.log(ks[rows, cols]))
    assert fit.cost == pytest.approx(0.5 * np.sum(r * r), rel=1e-10)
    # and the fitted n is where that whole sum is least: no class's n moved by 1e-4
    # (relative) lowers it (the solver stops within 1e-12 of the cost; a class stopped at
    # a bound may only move inwards)
    for c in np.flatnonzero(fit.n_target != n_source):
        if "at_bound" in fit.flags[c]:
            continue
        for step in (1e-4, -1e-4):
            n = fit.n_target.copy()
            n[c] *= 1 + step
            moved = np.sqrt(w[rows, cols]) * (np.log(kt(n)) - np.log(ks[rows, cols]))
            assert 0.5 * np.sum(moved * moved) >= fit.cost * (1 - 1e-12)


@pytest.mark.parametrize("closure", ["lumped", "strip"])
def test_fit_terms_gathered_tile_by_tile_give_the_whole_fit(closure):
    # a tiled job gathers the terms of disjoint sets of items; the sums are the same sums
    # in another order and the spread the same values (round-off; the solver then stops
    # within its tolerance of the same n)
    stats, ks, n_source = random_class_stats(11)
    whole = fit_class_n(ks, stats, n_source, closure=closure)
    groups = np.array_split(np.random.default_rng(0).permutation(stats.n_items), 3)
    parts = [fit_terms(ks[g], items_subset(stats, g), n_source, closure=closure) for g in groups]
    parts.insert(1, fit_terms(ks[:0], items_subset(stats, groups[0][:0]), n_source,
                              closure=closure))  # a tile without items
    tiled = solve_class_n(combine_fit_terms(parts), n_source)
    assert parts == []  # gathered terms free the tiles' as they go
    np.testing.assert_allclose(tiled.n_target, whole.n_target, rtol=1e-7)
    for name in ("ratio_p10", "ratio_p50", "ratio_p90", "weight_share"):
        np.testing.assert_allclose(getattr(tiled, name), getattr(whole, name), rtol=1e-12)
    assert tiled.items.tolist() == whole.items.tolist()
    assert tiled.mismatch.tolist() == whole.mismatch.tolist()
    assert tiled.flags == whole.flags
    assert tiled.cost == pytest.approx(whole.cost, rel=1e-9)


def test_cell_strip_sums_are_the_per_pixel_sums():
    # definition (METHODS.md conveyance form): per (cell, class) pair and stage, the sum
    # over the pair's pixels of a max(eta - z, 0)^(5/3); summed over the wet pixels only,
    # in elevation order, so equal to round-off (1e-12 relative).  Covers NaN pixels, a
    # NaN stage, a pixel exactly at the stage (dry), dropped pixels (class -1)
    rng = np.random.default_rng(3)
    n_pix, n_items, n_classes = 2000, 40, 3
    item = rng.integers(0, n_items, n_pix)
    z = rng.uniform(0.0, 5.0, n_pix)
    z[rng.random(n_pix) < 0.02] = np.nan
    area = rng.uniform(0.5, 1.5, n_pix)
    cls = rng.integers(-1, n_classes, n_pix)
    geom = CellGeometry(item, z, area, area * 1.1, cls, n_items, n_classes)
    stages = rng.uniform(-1.0, 6.0, (n_items, 4))
    stages[0, 1] = np.nan
    ok0 = np.flatnonzero(np.isfinite(z) & (cls >= 0))
    stages[item[ok0[0]], 2] = z[ok0[0]]  # exactly at a pixel
    st = geom.stats(stages)
    expected = np.zeros(st.strip.shape)
    for pair, (i, c) in enumerate(zip(st.item, st.cls, strict=True)):
        sel = (item == i) & (cls == c) & np.isfinite(z)
        for j in range(stages.shape[1]):
            h = np.fmax(stages[i, j] - z[sel], 0.0)
            expected[pair, j] = np.sum(area[sel] * h ** (5.0 / 3.0))
    np.testing.assert_allclose(st.strip, expected, rtol=1e-12, atol=1e-12)
    assert st.strip[st.item == 0][:, 1].tolist() == [0.0] * int(np.sum(st.item == 0))


@pytest.mark.parametrize("n_items, n_classes, size, seed", [
    (1, 1, 1, 0), (7, 3, 50, 1), (1000, 4, 200_000, 2),  # a tile: keys span a small range
    (500_000, 50, 300, 3),  # few keys over a wide range
    (0, 2, 0, 4),
])
def test_pairs_are_numpy_unique(n_items, n_classes, size, seed):
    """(item, class) pairs and the inverse index: exactly what ``np.unique`` of the
    combined key gives, whichever way the keys are grouped (counted or sorted)."""
    rng = np.random.default_rng(seed)
    item = rng.integers(0, max(n_items, 1), size)
    cls = rng.integers(0, n_classes, size)
    pair_item, pair_cls, inv = _pairs(item, cls, n_classes)
    uniq, ref_inv = np.unique(item * n_classes + cls, return_inverse=True)
    np.testing.assert_array_equal(pair_item, uniq // n_classes)
    np.testing.assert_array_equal(pair_cls, uniq % n_classes)
    np.testing.assert_array_equal(inv, ref_inv)
    assert inv.dtype == ref_inv.dtype and pair_item.dtype == np.int64


@pytest.mark.parametrize("n_ranges, size, seed", [(1, 1, 0), (5, 40, 1), (300, 20_000, 2),
                                                   (4, 0, 3)])
def test_first_at_least_is_searchsorted_per_range(n_ranges, size, seed):
    """Breakpoint lookup of the stage tables: per query, the first index of its own sorted
    range whose value is >= the stage, exactly ``lo + np.searchsorted(b[lo:hi], e,
    side="left")`` (numpy's definition).  Ties (stages equal to breakpoints), repeated
    breakpoints, stages below and above a range, and empty ranges."""
    from ntrans._kernels import first_at_least

    rng = np.random.default_rng(seed)
    pair = np.sort(rng.integers(0, n_ranges, size))
    b = np.round(rng.uniform(0.0, 3.0, size), 1)  # rounded: many repeated values
    b = b[np.lexsort((b, pair))]
    start = np.searchsorted(pair, np.arange(n_ranges), side="left")
    end = np.searchsorted(pair, np.arange(n_ranges), side="right")
    q_pair = rng.integers(0, n_ranges, 500)
    e = rng.uniform(-0.5, 3.5, q_pair.size)
    e[::3] = np.round(e[::3], 1)  # on a breakpoint value
    lo, hi = start[q_pair], end[q_pair]
    expected = np.array([lo_ + np.searchsorted(b[lo_:hi_], x, side="left")
                         for lo_, hi_, x in zip(lo, hi, e, strict=True)], dtype=np.int64)
    got = first_at_least(b, lo, hi, e)
    np.testing.assert_array_equal(got, expected)
    assert got.dtype == np.int64


@pytest.mark.parametrize("shape", [(0, 3), (1, 8), (2, 1), (5_001, 3), (777, 8)])
def test_cumulative_rows_is_numpy_cumsum_to_the_bit(shape):
    """The compiled prefix sum of the stage tables is ``np.cumsum(axis=0)`` bit for bit:
    the same additions (row i += row i-1) in the same order, including NaN and infinite
    entries and values of very different magnitudes (where the order of additions shows)."""
    from ntrans._kernels import cumulative_rows

    rng = np.random.default_rng(shape[0])
    values = rng.normal(0.0, 1.0, shape) * 10.0 ** rng.integers(-8, 9, shape)
    if values.size > 20:
        values.flat[7], values.flat[13] = np.nan, np.inf
    expected = np.cumsum(values, axis=0)
    got = cumulative_rows(values)
    assert got is values  # in place
    assert got.tobytes() == expected.tobytes()


@pytest.mark.parametrize("bad", [np.zeros((3, 2), dtype=np.float32), np.zeros((4, 2)).T,
                                 np.zeros(5), np.zeros((3, 3))[:, :2]])
def test_cumulative_rows_refuses_what_it_cannot_sum_in_place(bad):
    from ntrans._kernels import cumulative_rows

    with pytest.raises(TypeError):
        cumulative_rows(bad)


def test_ramp_table_values_are_the_numpy_form_to_the_bit():
    """The compiled evaluation of a face's ramp table (wet length, perimeter, area from the
    pair's eight prefix sums) gives the numpy expressions' values bit for bit: the same
    operations in the same order, including NaN sums, negative results clipped to 0 and
    dry queries set to 0."""
    from ntrans._kernels import ramp_table_values

    rng = np.random.default_rng(5)
    pref = rng.normal(0.0, 10.0, (60, 8))
    pref[7, 2] = np.nan
    pair0 = rng.normal(0.0, 10.0, (9, 8))
    row = rng.integers(0, 60, 400)
    row[:5] = 7  # the NaN sum
    p = rng.integers(0, 9, 400)
    e = rng.uniform(0.0, 4.0, 400)
    dry = rng.random(400) < 0.2
    s = pref[row] - pair0[p]
    w = e * s[:, 0] - s[:, 1] + s[:, 5]
    pm = e * s[:, 3] - s[:, 4] + s[:, 7]
    a = 0.5 * (e * e * s[:, 0] - 2.0 * e * s[:, 1] + s[:, 2]) + e * s[:, 5] - s[:, 6]
    expected = [np.where(dry, 0.0, np.maximum(v, 0.0)) for v in (w, pm, a)]
    got = ramp_table_values(pref, pair0, row, p, e, dry)
    for g, x in zip(got, expected, strict=True):
        assert g.tobytes() == x.tobytes()
    assert np.isnan(got[2][:5][~dry[:5]]).all() and (got[0] >= 0).all()
