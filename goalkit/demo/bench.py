"""The irrigation-gantry bench: geometry, constants and the dynamics step (vectorised).

All lengths are metres, times seconds, masses kilograms. The bench top is the plane
``z = 0``; ``x`` runs along the bench, ``y`` across it. A nozzle head hangs from a gantry
and is driven by acceleration commands; seedling trays sit in fixed lanes across the bench
and slide along ``x`` only, and only when the lowered head pushes one of their end faces
hard enough to overcome friction.

Every function works on a batch of ``E`` benches at once (one per episode).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

#: Standard gravity, m/s^2.
GRAVITY = 9.81
#: Most trays a bench can hold (each tray has its own lane across the bench).
MAX_TRAYS = 6


@dataclass(frozen=True)
class GantryParams:
    """Geometry and physical constants of the bench (metres, seconds, kilograms).

    Parameters
    ----------
    trays : int
        Number of seedling trays ``K`` (1 to :data:`MAX_TRAYS`); tray ``k`` lives in lane
        ``k`` across the bench, centred at ``y = (k + 0.5) * depth / K``.
    length, depth : float
        Bench extent along ``x`` and ``y``.
    z_min, z_max : float
        Height range of the head centre (the nozzle is a sphere of radius ``head_radius``).
    head_radius : float
        Radius of the nozzle head used for contact.
    tray_half_length : float
        Half of the tray's extent along ``x``.
    tray_height : float
        Height of the tray's rim (soil surface) above the bench.
    dt : float
        Time step.
    max_accel : float
        Acceleration of the head for a unit command (the command is clipped to [-1, 1]).
    damping : float
        Viscous damping rate of the head (1/s): ``v <- v * (1 - damping * dt) + a * dt``.
    head_mass, tray_mass : float
        Masses used in the push contact.
    friction : float
        Coulomb friction coefficient between tray and bench.
    strip : (float, float)
        The light strip: the band ``strip[0] <= x <= strip[1]`` of the bench.
    water_height : float
        Head height the watering task asks for above a tray.
    push_height : float
        Head height the scripted controller uses to push trays.
    safe_height : float
        Travel height, above every tray.
    tray_start : (float, float)
        Range of the trays' initial centres along ``x`` (all left of the strip).

    Examples
    --------
    >>> p = GantryParams(trays=3)
    >>> p.lanes.round(3).tolist()
    [0.1, 0.3, 0.5]
    """

    trays: int = 3
    length: float = 1.2
    depth: float = 0.6
    z_min: float = 0.02
    z_max: float = 0.40
    head_radius: float = 0.02
    tray_half_length: float = 0.08
    tray_height: float = 0.06
    dt: float = 0.1
    max_accel: float = 3.0
    damping: float = 3.0
    head_mass: float = 2.0
    tray_mass: float = 0.6
    friction: float = 0.3
    strip: tuple[float, float] = (0.85, 1.05)
    water_height: float = 0.10
    push_height: float = 0.03
    safe_height: float = 0.20
    tray_start: tuple[float, float] = (0.20, 0.65)
    lanes: np.ndarray = field(init=False, repr=False, compare=False)
    tray_half_depth: float = field(init=False)

    def __post_init__(self):
        if not 1 <= int(self.trays) <= MAX_TRAYS:
            raise ValueError(f"trays must be 1..{MAX_TRAYS}, got {self.trays}")
        lane = self.depth / self.trays
        object.__setattr__(self, "lanes", (np.arange(self.trays) + 0.5) * lane)
        object.__setattr__(self, "tray_half_depth", min(0.06, 0.25 * lane))

    @property
    def workspace_low(self) -> np.ndarray:
        """Lower corner of the head's workspace, ``(0, 0, z_min)``."""
        return np.array([0.0, 0.0, self.z_min])

    @property
    def workspace_high(self) -> np.ndarray:
        """Upper corner of the head's workspace, ``(length, depth, z_max)``."""
        return np.array([self.length, self.depth, self.z_max])

    @property
    def strip_centre(self) -> float:
        """Centre of the light strip along ``x``."""
        return 0.5 * (self.strip[0] + self.strip[1])

    @property
    def goal_dim(self) -> int:
        """Dimension of the goal space ``head (3) + trays (K)``."""
        return 3 + self.trays


@dataclass(frozen=True)
class BenchState:
    """State of ``E`` benches.

    Parameters
    ----------
    head : ndarray, shape (E, 3)
        Head centre ``(x, y, z)``.
    velocity : ndarray, shape (E, 3)
        Head velocity.
    trays : ndarray, shape (E, K)
        Tray centres along ``x`` (their ``y`` is the lane, fixed).
    """

    head: np.ndarray
    velocity: np.ndarray
    trays: np.ndarray


def tray_boxes(params: GantryParams):
    """Return the half-extents of a tray inflated by the head radius: ``(hx, hy, top)``.

    The head centre touches tray ``k`` when ``|x - c_k| <= hx``, ``|y - lane_k| <= hy`` and
    ``z <= top``; the interior of that box is forbidden to the head centre.
    """
    r = params.head_radius
    return params.tray_half_length + r, params.tray_half_depth + r, params.tray_height + r


def step(state: BenchState, action: np.ndarray, params: GantryParams) -> BenchState:
    """Advance every bench by one time step.

    Parameters
    ----------
    state : BenchState
        Current states (not modified).
    action : ndarray, shape (E, 3)
        Acceleration commands, clipped to [-1, 1] and scaled by ``params.max_accel``.
    params : GantryParams
        Bench constants.

    Returns
    -------
    BenchState
        The next states.

    Notes
    -----
    1. Head: ``v <- v (1 - damping dt) + max_accel a dt``, ``p <- p + v dt``, clipped to the
       workspace (the clipped velocity components are set to zero).
    2. Contact with tray ``k`` (for each tray in turn) when the new head centre lies inside
       the tray's box inflated by the head radius. The face is chosen from where the head
       came from: from above, the head rests on the soil (``z = top``, ``v_z = 0``); from the
       side across the bench, the head is blocked (trays cannot move in ``y``); from an end
       face, the head pushes. A push is a perfectly inelastic contact followed by Coulomb
       friction over the step: ``u = max(0, u_head m_h / (m_h + m_t) - mu g dt m_t / (m_h + m_t))``;
       the tray moves by the head's remaining travel scaled by ``u / u_head`` (so a weak
       push does not move it at all), stops at the bench ends, and the head stays on its face
       with speed ``u`` along ``x``.
    3. A tray never moves unless the head is pushing it.

    Examples
    --------
    >>> p = GantryParams(trays=1)
    >>> s = BenchState(head=np.array([[0.30, p.lanes[0], 0.30]]), velocity=np.zeros((1, 3)),
    ...                trays=np.array([[0.5]]))
    >>> bool((step(s, np.ones((1, 3)), p).trays == 0.5).all())  # head high: tray stays
    True
    """
    dt = params.dt
    low, high = params.workspace_low, params.workspace_high
    action = np.clip(np.asarray(action, dtype=np.float64), -1.0, 1.0)
    p0 = state.head
    v = state.velocity * (1.0 - params.damping * dt) + params.max_accel * dt * action
    p = p0 + v * dt
    clipped = (p < low) | (p > high)
    p = np.clip(p, low, high)
    v = np.where(clipped, 0.0, v)
    trays = state.trays.copy()

    hx, hy, top = tray_boxes(params)
    share = params.head_mass / (params.head_mass + params.tray_mass)
    brake = params.friction * GRAVITY * dt * params.tray_mass / (params.head_mass + params.tray_mass)
    c_lo, c_hi = params.tray_half_length, params.length - params.tray_half_length
    for k in range(params.trays):  # a handful of trays; vectorised over benches
        lane = params.lanes[k]
        c = trays[:, k]
        inside = (np.abs(p[:, 0] - c) < hx) & (np.abs(p[:, 1] - lane) < hy) & (p[:, 2] < top)
        if not inside.any():
            continue
        from_above = inside & (p0[:, 2] >= top)
        from_side = inside & ~from_above & (np.abs(p0[:, 1] - lane) >= hy)
        from_end = inside & ~from_above & ~from_side
        # resting on the soil
        p[:, 2] = np.where(from_above, top, p[:, 2])
        v[:, 2] = np.where(from_above, 0.0, v[:, 2])
        # blocked across the bench
        side_y = lane + np.sign(p0[:, 1] - lane) * hy
        p[:, 1] = np.where(from_side, side_y, p[:, 1])
        v[:, 1] = np.where(from_side, 0.0, v[:, 1])
        # pushing an end face: s = +1 when the head is left of the tray (pushes towards +x)
        s = np.where(p0[:, 0] < c, 1.0, -1.0)
        u_head = s * v[:, 0]                               # head speed towards the tray
        gap = np.maximum(0.0, s * (c - p0[:, 0]) - hx)       # free travel before touching
        travel = s * (p[:, 0] - p0[:, 0])
        u = np.maximum(0.0, u_head * share - brake)
        ratio = np.divide(u, u_head, out=np.zeros_like(u), where=u_head > 0)
        shift = np.maximum(0.0, travel - gap) * ratio
        c_new = np.where(from_end, np.clip(c + s * shift, c_lo, c_hi), c)
        blocked = from_end & ((c_new == c_lo) | (c_new == c_hi)) & (shift > 0)
        trays[:, k] = c_new
        p[:, 0] = np.where(from_end, c_new - s * hx, p[:, 0])
        v[:, 0] = np.where(from_end, np.where(blocked, 0.0, s * u), v[:, 0])
    return BenchState(head=p, velocity=v, trays=trays)


def pushing(state: BenchState, params: GantryParams, tol: float = 1e-9) -> np.ndarray:
    """Return which trays the head is touching on an end face, bool ``(E, K)``.

    A tray can only have moved during a step if the head ends that step in this contact.
    """
    hx, hy, top = tray_boxes(params)
    dx = np.abs(state.head[:, :1] - state.trays)
    dy = np.abs(state.head[:, 1:2] - params.lanes[None, :])
    return (np.abs(dx - hx) <= tol) & (dy < hy) & (state.head[:, 2:3] < top)
