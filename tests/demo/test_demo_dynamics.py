"""The bench dynamics: free flight, workspace, contact, and trays moving only when pushed.

Reference physics (standard mechanics, stated from memory): semi-implicit Euler integration
of a damped point mass; a perfectly inelastic collision conserves momentum, so the joint
speed is m_h u / (m_h + m_t); Coulomb sliding friction mu m_t g decelerates the joined pair
by mu g m_t / (m_h + m_t); a block does not move while the impulse cannot overcome friction.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings, strategies as st

from goalkit.demo.bench import GRAVITY, BenchState, GantryParams, pushing, step, tray_boxes
from goalkit.demo.simulate import simulate

P = GantryParams(trays=3)
HX, HY, TOP = tray_boxes(P)


def state(head, velocity=(0.0, 0.0, 0.0), trays=(0.3, 0.4, 0.5)):
    return BenchState(head=np.array([head], dtype=float), velocity=np.array([velocity], dtype=float),
                      trays=np.array([trays], dtype=float))


def test_free_flight_is_damped_semi_implicit_euler():
    s = state((0.6, 0.3, 0.3), velocity=(0.2, -0.1, 0.05))
    a = np.array([[0.5, -0.25, 1.0]])
    out = step(s, a, P)
    # v' = v (1 - c dt) + a_max a dt ; x' = x + v' dt (semi-implicit Euler)
    v = np.array([0.2, -0.1, 0.05]) * (1 - P.damping * P.dt) + P.max_accel * P.dt * a[0]
    np.testing.assert_allclose(out.velocity[0], v, rtol=0, atol=1e-15)
    np.testing.assert_allclose(out.head[0], np.array([0.6, 0.3, 0.3]) + v * P.dt, rtol=0, atol=1e-15)
    np.testing.assert_array_equal(out.trays, s.trays)


def test_commands_are_clipped_to_unit_box():
    s = state((0.6, 0.3, 0.3))
    big = step(s, np.array([[5.0, -7.0, 2.0]]), P)
    unit = step(s, np.array([[1.0, -1.0, 1.0]]), P)
    np.testing.assert_array_equal(big.head, unit.head)


def test_workspace_walls_stop_the_head():
    s = state((1.19, 0.59, 0.39), velocity=(1.0, 1.0, 1.0))
    out = step(s, np.ones((1, 3)), P)
    np.testing.assert_array_equal(out.head[0], [P.length, P.depth, P.z_max])
    np.testing.assert_array_equal(out.velocity[0], [0.0, 0.0, 0.0])


def test_landing_on_a_tray_rests_on_the_soil_and_does_not_move_it():
    lane = P.lanes[1]
    s = state((0.4, lane, TOP + 0.01), velocity=(0.0, 0.0, -0.5), trays=(0.3, 0.4, 0.5))
    out = step(s, np.array([[0.0, 0.0, -1.0]]), P)
    assert out.head[0, 2] == TOP
    assert out.velocity[0, 2] == 0.0
    np.testing.assert_array_equal(out.trays, s.trays)


def test_trays_cannot_be_pushed_across_the_bench():
    lane = P.lanes[1]
    y0 = lane - HY - 0.005                      # beside tray 1, low, moving towards its side
    s = state((0.4, y0, 0.03), velocity=(0.0, 0.5, 0.0), trays=(0.3, 0.4, 0.5))
    out = step(s, np.array([[0.0, 1.0, 0.0]]), P)
    assert out.head[0, 1] == lane - HY
    assert out.velocity[0, 1] == 0.0
    np.testing.assert_array_equal(out.trays, s.trays)


def _push(u_head, side=+1):
    """Head low in lane 1, touching tray 1's end face and moving towards it at u_head (after the step's accel)."""
    c = 0.5
    lane = P.lanes[1]
    x0 = c - side * HX                          # on the face
    # choose the pre-step velocity so that after damping (zero command) the speed is u_head
    v0 = side * u_head / (1 - P.damping * P.dt)
    s = state((x0, lane, 0.03), velocity=(v0, 0.0, 0.0), trays=(0.3, c, 0.5))
    return s, step(s, np.zeros((1, 3)), P)


def test_weak_push_is_held_by_static_friction():
    # moves iff m_h u / (m_h + m_t) > mu g dt m_t / (m_h + m_t), i.e. u > mu g dt m_t / m_h
    limit = P.friction * GRAVITY * P.dt * P.tray_mass / P.head_mass
    s, out = _push(0.95 * limit)
    np.testing.assert_array_equal(out.trays, s.trays)
    assert out.velocity[0, 0] == 0.0
    assert out.head[0, 0] == 0.5 - HX           # stays on the face
    _, out = _push(1.05 * limit)
    assert out.trays[0, 1] > 0.5


def test_strong_push_follows_momentum_and_friction():
    mh, mt = P.head_mass, P.tray_mass
    for side in (+1, -1):
        u_head = 0.4
        s, out = _push(u_head, side)
        u = u_head * mh / (mh + mt) - P.friction * GRAVITY * P.dt * mt / (mh + mt)
        np.testing.assert_allclose(out.trays[0, 1], 0.5 + side * u * P.dt, rtol=0, atol=1e-12)
        np.testing.assert_allclose(out.velocity[0, 0], side * u, rtol=0, atol=1e-12)
        np.testing.assert_allclose(out.head[0, 0], out.trays[0, 1] - side * HX, rtol=0, atol=1e-12)
        assert out.trays[0, 0] == 0.3 and out.trays[0, 2] == 0.5      # other trays untouched
        assert pushing(out, P)[0].tolist() == [False, True, False]


def test_tray_stops_at_the_bench_end():
    c = P.length - P.tray_half_length - 0.001
    lane = P.lanes[2]
    s = state((c - HX, lane, 0.03), velocity=(1.0, 0.0, 0.0), trays=(0.3, 0.4, c))
    out = step(s, np.array([[1.0, 0.0, 0.0]]), P)
    assert out.trays[0, 2] == P.length - P.tray_half_length
    assert out.velocity[0, 0] == 0.0


# Hypothesis: any state with the head clear of every tray's contact box at the start, any
# command -> a tray moves only if the head ends the step on that tray's end face, low and in
# its lane, and it moves the way the head was going. Half the examples start the head just
# off a tray's end face, where pushes happen.
unit = st.floats(0.0, 1.0, allow_nan=False)
signed = st.floats(-1.0, 1.0, allow_nan=False)


@settings(max_examples=400, deadline=None)
@given(trays=st.lists(st.floats(0.1, 1.1), min_size=3, max_size=3),
       near=st.booleans(), k=st.integers(0, 2), left=st.booleans(),
       where=st.tuples(unit, unit, unit), vel=st.tuples(signed, signed, signed),
       action=st.tuples(signed, signed, signed))
def test_trays_move_only_when_pushed(trays, near, k, left, where, vel, action):
    trays = np.asarray(trays)
    side = 1.0 if left else -1.0
    if near:
        head = np.array([trays[k] - side * (HX + 0.05 * where[0]), P.lanes[k] + (where[1] - 0.5) * 0.16,
                         P.z_min + where[2] * 0.07])
    else:
        head = np.array([where[0] * P.length, where[1] * P.depth,
                         P.z_min + where[2] * (P.z_max - P.z_min)])
    head = np.clip(head, P.workspace_low, P.workspace_high)
    vel = np.asarray(vel)
    if near:  # mostly heading for the face
        vel = np.array([side * abs(vel[0]), vel[1], vel[2]])
    s = BenchState(head=head[None], velocity=vel[None], trays=trays[None])
    clear = ~((np.abs(head[0] - trays) < HX) & (np.abs(head[1] - P.lanes) < HY) & (head[2] < TOP))
    if not clear.all():
        return
    out = step(s, 1.25 * np.asarray(action)[None], P)
    moved = out.trays[0] != trays
    touching = pushing(out, P)[0]
    assert not (moved & ~touching).any()
    for j in np.flatnonzero(moved):
        assert np.sign(out.trays[0, j] - trays[j]) == np.sign(trays[j] - head[0])  # pushed away
        assert head[2] < TOP + abs(vel[2]) * P.dt + 0.03  # started low


def test_trays_move_only_when_pushed_batch():
    # the same rule on 20 000 benches in one vectorised step; half start near a tray end face
    g = np.random.default_rng(11)
    n = 20_000
    trays = g.uniform(0.1, 1.1, (n, 3))
    k = g.integers(0, 3, n)
    side = g.choice([-1.0, 1.0], n)
    near = g.random(n) < 0.5
    head = np.stack([g.uniform(0, P.length, n), g.uniform(0, P.depth, n),
                     g.uniform(P.z_min, P.z_max, n)], axis=1)
    rows = np.arange(n)
    head[near, 0] = trays[rows, k][near] - side[near] * (HX + g.uniform(0, 0.05, near.sum()))
    head[near, 1] = P.lanes[k[near]] + g.uniform(-0.1, 0.1, near.sum())
    head[near, 2] = g.uniform(P.z_min, 0.1, near.sum())
    head = np.clip(head, P.workspace_low, P.workspace_high)
    vel = g.uniform(-1, 1, (n, 3))
    action = g.uniform(-1.2, 1.2, (n, 3))
    inside = ((np.abs(head[:, :1] - trays) < HX) & (np.abs(head[:, 1:2] - P.lanes) < HY)
              & (head[:, 2:3] < TOP)).any(axis=1)
    s = BenchState(head=head[~inside], velocity=vel[~inside], trays=trays[~inside])
    out = step(s, action[~inside], P)
    moved = out.trays != s.trays
    assert not (moved & ~pushing(out, P)).any()
    direction = np.sign(out.trays - s.trays)
    assert (direction[moved] == np.sign(s.trays - s.head[:, :1])[moved]).all()
    assert moved.sum() > 500  # pushes did happen in this sample


def test_in_rollouts_every_tray_motion_is_a_push():
    r = simulate(60, seed=5)
    moved_any = False
    for e in range(r.num_episodes):  # per-episode check over a small simulated set
        T = int(r.lengths[e])
        d = np.diff(r.trays[e, :T + 1], axis=0) != 0          # (T, K)
        if not d.any():
            continue
        moved_any = True
        after = BenchState(head=r.head[e, 1:T + 1], velocity=r.velocity[e, 1:T + 1],
                           trays=r.trays[e, 1:T + 1])
        touch = pushing(after, r.params, tol=1e-9)
        assert not (d & ~touch).any(), f"episode {e}: a tray moved without a push"
        low = r.head[e, 1:T + 1, 2] < TOP
        assert low[d.any(axis=1)].all()
    assert moved_any  # the slide tasks do move trays
