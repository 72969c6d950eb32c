"""Accuracy measures, checked on hand-worked examples."""

import numpy as np
import pytest

from stereomesh.evaluation import (
    bad_pixel_rate,
    density,
    distance_to_mesh,
    f_score,
    mean_abs_error,
    oracle_sparsification_auc,
    oracle_sparsification_curve,
    sample_surface,
    sparsification_auc,
    sparsification_curve,
)


def test_bad_pixel_rate_hand_worked():
    d = np.array([[1.0, 2.0, 10.0], [np.nan, 5.0, 3.0]])
    gt = np.array([[1.5, 4.5, 10.0], [1.0, np.inf, 1.0]])
    # finite in both: errors 0.5, 2.5, 0, 2.0 -> one error > 2 of four
    assert bad_pixel_rate(d, gt, threshold=2.0) == 0.25
    assert bad_pixel_rate(d, gt, threshold=0.4) == 0.75
    mask = np.array([[False, True, True], [True, True, True]])
    assert bad_pixel_rate(d, gt, 2.0, mask) == pytest.approx(1 / 3)
    assert np.isnan(bad_pixel_rate(d, gt, 2.0, np.zeros_like(mask)))
    assert mean_abs_error(d, gt) == pytest.approx((0.5 + 2.5 + 0 + 2.0) / 4)
    with pytest.raises(ValueError):
        bad_pixel_rate(d, gt[:, :2])


def test_density_hand_worked():
    d = np.array([[1.0, np.nan], [np.nan, 4.0]])
    valid = np.array([[True, True], [False, True]])
    assert density(d, valid) == pytest.approx(2 / 3)


def test_sparsification_hand_worked():
    err = np.array([5.0, 1.0, 3.0, 1.0, np.nan])
    conf = np.array([0.1, 0.9, 0.3, 0.7, 0.5])
    fr = np.array([0.0, 0.25, 0.5, 0.75])
    f, curve = sparsification_curve(err, conf, fr)
    # least confident first: 5 (0.1), 3 (0.3), 1 (0.7), 1 (0.9)
    np.testing.assert_allclose(curve, [10 / 4, 5 / 3, 1.0, 1.0])
    np.testing.assert_array_equal(f, fr)
    _, oracle = oracle_sparsification_curve(err, fr)
    np.testing.assert_allclose(oracle, [10 / 4, 5 / 3, 1.0, 1.0])
    # trapezoids over 0.25-wide steps
    auc = 0.25 * ((2.5 + 5 / 3) / 2 + (5 / 3 + 1) / 2 + 1.0)
    assert sparsification_auc(err, conf, fr) == pytest.approx(auc)
    # A reversed confidence removes the good pixels first: a rising curve.
    _, worst = sparsification_curve(err, -conf, fr)
    assert np.all(np.diff(worst) > 0)
    assert oracle_sparsification_auc(err, fr) <= sparsification_auc(err, -conf, fr)


def test_sparsification_oracle_is_a_lower_bound():
    rng = np.random.default_rng(0)
    err = rng.exponential(1.0, 2000)
    conf = rng.random(2000)
    assert oracle_sparsification_auc(err) <= sparsification_auc(err, conf)
    _, c = sparsification_curve(err, conf)
    assert len(c) == 20
    with pytest.raises(ValueError):
        sparsification_curve(err, conf, np.array([0.5, 0.2]))


def test_sample_surface_is_area_weighted_and_on_the_mesh():
    # Two triangles in z = 0 with areas 1/2 and 3/2.
    verts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [2, 0, 0], [5, 0, 0], [2, 1, 0]], float)
    faces = np.array([[0, 1, 2], [3, 4, 5]])
    pts = sample_surface(verts, faces, 20000, seed=1)
    assert pts.shape == (20000, 3) and np.all(pts[:, 2] == 0)
    share_big = np.mean(pts[:, 0] >= 2)
    assert share_big == pytest.approx(0.75, abs=0.01)
    small = pts[pts[:, 0] < 2]
    assert np.all(small[:, 0] + small[:, 1] <= 1 + 1e-12)
    # Uniform within the triangle: the centroid of the samples is the centroid.
    np.testing.assert_allclose(small[:, :2].mean(0), [1 / 3, 1 / 3], atol=0.01)
    np.testing.assert_array_equal(pts, sample_surface(verts, faces, 20000, seed=1))


def test_f_score_hand_worked():
    # formula: Knapitsch et al. 2017, Tanks and Temples F-score
    pred = np.array([[0, 0, 0], [1, 0, 0], [10, 0, 0]], float)
    gt = np.array([[0, 0.05, 0], [1, 0.3, 0], [2, 0, 0], [3, 0, 0]], float)
    r = f_score(pred, gt, tau=0.1)
    # pred within 0.1 of gt: (0,0,0) only -> P = 1/3; gt within 0.1 of pred: first -> R = 1/4
    assert r["precision"] == pytest.approx(1 / 3)
    assert r["recall"] == pytest.approx(1 / 4)
    assert r["f_score"] == pytest.approx(2 * (1 / 3) * (1 / 4) / (1 / 3 + 1 / 4))
    r = f_score(pred, gt, tau=1.5)
    # pred: 0 and 1 match, 10 does not -> 2/3; gt: all but (3, 0, 0), 2.0 away -> 3/4
    assert r["precision"] == pytest.approx(2 / 3)
    assert r["recall"] == pytest.approx(3 / 4)
    assert f_score(np.zeros((0, 3)), gt, 1.0)["f_score"] == 0.0


def test_distance_to_mesh_matches_trimesh_and_closed_form():
    # Closed form on a unit square at z = 0: above its inside the distance is
    # |z|, beyond an edge it is the distance to that edge.
    sq = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0]], float)
    faces = np.array([[0, 1, 2], [0, 2, 3]])
    pts = np.array([[0.3, 0.6, 0.25], [0.5, 0.5, -2.0], [1.5, 0.5, 0.0], [2.0, 2.0, 1.0]])
    np.testing.assert_allclose(distance_to_mesh(pts, sq, faces),
                               [0.25, 2.0, 0.5, np.sqrt(3.0)], atol=1e-6)
    # An independent implementation on a curved mesh: trimesh's closest point over
    # every triangle (the naive one, which needs no spatial index package).
    import trimesh

    sphere = trimesh.creation.icosphere(subdivisions=3, radius=1.3)
    rng = np.random.default_rng(0)
    probe = rng.uniform(-2.5, 2.5, (500, 3))
    _, want, _ = trimesh.proximity.closest_point_naive(sphere, probe)
    got = distance_to_mesh(probe, sphere.vertices, sphere.faces)
    np.testing.assert_allclose(got, want, atol=1e-5)
    with pytest.raises(ValueError):
        distance_to_mesh(pts, sq, np.zeros((0, 3), int))
