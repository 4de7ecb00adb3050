"""The transform buffer against outside references, on seeded random trees and times.

References (PyPI):
* pytransform3d.transform_manager.TransformManager: chains of transforms through a graph
  (its `get_transform(A, B)` is A2B, the map from A coordinates to B coordinates, so our
  lookup(target, source) must equal get_transform(source, target); an edge parent -> child
  is added as child2parent);
* scipy.spatial.transform Rotation (quaternions in x, y, z, w order, as ROS) and Slerp
  (rotation interpolation along the shorter arc, as tf2's slerp); numpy.interp for the linear
  translation interpolation tf2's TimeCache does between the two samples around a time.
"""
from __future__ import annotations

import numpy as np
from pytransform3d.transform_manager import TransformManager
from pytransform3d.transformations import transform_from
from scipy.spatial.transform import Rotation, Slerp

from constraint_ctrl.frames.buffer import Transform, TransformBuffer

SEC = 1_000_000_000
TOL = 1e-9


def random_tree(rng: np.random.Generator, n: int) -> list[tuple[str, str]]:
    """(parent, child) edges of a random tree over frames f0..f{n-1}, names shuffled so that
    the file order says nothing about depth."""
    names = [f'f{i}' for i in rng.permutation(n)]
    return [(names[int(rng.integers(0, i))], names[i]) for i in range(1, n)]


def random_pose(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """(translation, quaternion x y z w) - scipy's uniform random rotation."""
    return rng.uniform(-2.0, 2.0, 3), Rotation.random(random_state=rng).as_quat()


def reference_manager(poses: dict[tuple[str, str], tuple[np.ndarray, np.ndarray]]
                      ) -> TransformManager:
    tm = TransformManager()
    for (parent, child), (t, q) in poses.items():
        tm.add_transform(child, parent, transform_from(Rotation.from_quat(q).as_matrix(), t))
    return tm


def assert_same(found: Transform, expected: np.ndarray) -> None:
    assert isinstance(found, Transform), found
    np.testing.assert_allclose(found.matrix(), expected, atol=TOL)


def test_static_random_trees_match_pytransform3d_for_every_pair_and_point() -> None:
    rng = np.random.default_rng(7)
    for _ in range(20):
        n = int(rng.integers(2, 12))
        edges = random_tree(rng, n)
        poses = {e: random_pose(rng) for e in edges}
        buffer = TransformBuffer()
        for (parent, child), (t, q) in poses.items():
            assert buffer.set_transform(parent, child, 0, t, q, static=True) is None
        tm = reference_manager(poses)
        frames = sorted({f for e in edges for f in e})
        for target in frames:
            for source in frames:
                found = buffer.lookup(target, source, 123 * SEC)
                # pytransform3d: A2B for A=source, B=target
                expected = tm.get_transform(source, target)
                assert_same(found, expected)
                assert found.stamp_ns is None and found.age_s == 0.0   # static: never ages
                point = rng.uniform(-1.0, 1.0, 3)
                np.testing.assert_allclose(found.apply(point),
                                           (expected @ np.append(point, 1.0))[:3], atol=TOL)


def test_dynamic_random_trees_interpolate_like_numpy_and_scipy_slerp() -> None:
    rng = np.random.default_rng(11)
    checked = 0
    for _ in range(15):
        n = int(rng.integers(3, 9))
        edges = random_tree(rng, n)
        static = {e: bool(rng.random() < 0.3) for e in edges}
        samples: dict[tuple[str, str], tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        buffer = TransformBuffer(cache_time_s=100.0, capacity=100)
        for e in edges:
            if static[e]:
                t, q = random_pose(rng)
                samples[e] = (np.array([0]), t[None, :], q[None, :])
                buffer.set_transform(*e, 0, t, q, static=True)
                continue
            # irregular stamps in [10 s, 12 s]; rotations far apart so that the shorter-arc
            # choice matters (random quaternion pairs have a negative dot product half the time)
            k = int(rng.integers(2, 12))
            stamps = np.sort(rng.choice(np.arange(10 * SEC, 12 * SEC, 1_000_000), k,
                                        replace=False))
            ts = rng.uniform(-2.0, 2.0, (k, 3))
            qs = Rotation.random(k, random_state=rng).as_quat()
            samples[e] = (stamps, ts, qs)
            for i in rng.permutation(k):     # out of order on purpose
                assert buffer.set_transform(*e, int(stamps[i]), ts[i], qs[i]) is None
        dynamic = [e for e in edges if not static[e]]
        if not dynamic:
            continue
        lo = max(int(samples[e][0][0]) for e in dynamic)
        hi = min(int(samples[e][0][-1]) for e in dynamic)
        if hi < lo:
            continue
        checked += 1
        frames = sorted({f for e in edges for f in e})
        for _ in range(10):
            target, source = rng.choice(frames, 2, replace=False)
            time_ns = int(rng.integers(lo, hi + 1))
            poses = {}
            for e in edges:
                stamps, ts, qs = samples[e]
                if static[e]:
                    poses[e] = (ts[0], qs[0])
                    continue
                seconds = (stamps - stamps[0]) * 1e-9
                at = (time_ns - stamps[0]) * 1e-9
                t = np.array([np.interp(at, seconds, ts[:, j]) for j in range(3)])
                q = Slerp(seconds, Rotation.from_quat(qs))(at).as_quat()
                poses[e] = (t, q)
            found = buffer.lookup(str(target), str(source), time_ns)
            expected = reference_manager(poses).get_transform(str(source), str(target))
            # double precision on 1e10 ns stamps: ratio error ~1e-16 relative, far below TOL
            assert_same(found, expected)
            assert found.age_s == 0.0   # inside the history: data at the requested time
    assert checked >= 10   # most random trees had a common time range to test


def test_newest_sample_is_held_within_the_tolerance_and_its_age_reported() -> None:
    """Past the newest sample the newest pose is used as it is (reference: pytransform3d with
    those poses) and the age is requested time - newest stamp."""
    rng = np.random.default_rng(3)
    buffer = TransformBuffer(tolerance_s=0.25)
    poses = {}
    newest = {('world', 'cart'): 5 * SEC, ('cart', 'camera'): 5 * SEC + 40_000_000}
    for e, stamp in newest.items():
        for back in (2, 1, 0):
            t, q = random_pose(rng)
            buffer.set_transform(*e, stamp - back * 10_000_000, t, q)
        poses[e] = (t, q)
    time_ns = 5 * SEC + 200_000_000
    found = buffer.lookup('world', 'camera', time_ns)
    assert_same(found, reference_manager(poses).get_transform('camera', 'world'))
    assert found.stamp_ns == 5 * SEC                  # the older of the two newest samples
    assert abs(found.age_s - 0.2) < 1e-12
    assert not buffer.lookup('world', 'camera', 5 * SEC + 251_000_000)   # beyond 0.25 s


def test_latest_is_evaluated_at_the_latest_common_time() -> None:
    """time None = tf2's time 0: every dynamic edge at min(newest stamps) over the chain;
    reference: the per-edge interpolation of numpy/scipy at that time, chained by
    pytransform3d."""
    rng = np.random.default_rng(5)
    buffer = TransformBuffer()
    data = {}
    for e, stamps in ((('map', 'odom'), [1, 2, 3, 4]), (('odom', 'base'), [1, 3]),
                      (('base', 'lidar'), [0])):
        ts = rng.uniform(-1, 1, (len(stamps), 3))
        qs = Rotation.random(len(stamps), random_state=rng).as_quat()
        for s, t, q in zip(stamps, ts, qs):
            buffer.set_transform(*e, s * SEC, t, q, static=(e[1] == 'lidar'))
        data[e] = (np.array(stamps, float), ts, qs)
    found = buffer.lookup('map', 'lidar')
    assert found.time_ns == 3 * SEC and found.stamp_ns == 3 * SEC
    poses = {}
    for e, (stamps, ts, qs) in data.items():
        if len(stamps) == 1:
            poses[e] = (ts[0], qs[0])
        else:
            poses[e] = (np.array([np.interp(3.0, stamps, ts[:, j]) for j in range(3)]),
                        Slerp(stamps, Rotation.from_quat(qs))(3.0).as_quat())
    assert_same(found, reference_manager(poses).get_transform('lidar', 'map'))


def test_slerp_takes_the_shorter_arc_like_scipy() -> None:
    """Two samples whose quaternions have a negative dot product (q and a rotation near -q):
    the midpoint must be the small-angle midpoint (scipy Slerp), not the long way round."""
    buffer = TransformBuffer()
    q0 = Rotation.from_euler('z', 170, degrees=True).as_quat()
    q1 = -Rotation.from_euler('z', -170, degrees=True).as_quat()   # same rotation, sign flipped
    assert np.dot(q0, q1) > 0 > np.dot(q0, -q1)   # both signs are tried below
    for q1_variant in (q1, -q1):
        buffer.set_transform('a', 'b', 0, [0, 0, 0], q0)
        buffer.set_transform('a', 'b', SEC, [0, 0, 0], q1_variant)
        found = buffer.lookup('a', 'b', SEC // 2)
        expected = Slerp([0.0, 1.0], Rotation.from_quat([q0, q1_variant]))(0.5).as_matrix()
        np.testing.assert_allclose(found.matrix()[:3, :3], expected, atol=TOL)
        # scipy's midpoint of +170 deg and -170 deg about z is 180 deg (20 deg arc)
        np.testing.assert_allclose(
            found.matrix()[:3, :3], Rotation.from_euler('z', 180, degrees=True).as_matrix(),
            atol=TOL)
        buffer.clear()
