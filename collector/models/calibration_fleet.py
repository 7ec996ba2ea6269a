"""
Fleet calibration: one solve over every board and every reference tag it hears.

Model (the log-distance model of collector/models/calibration.py, plus a fixed loss per wall and per
floor slab the straight line crosses, as docs/radio.md describes the venue)::

    raw_bt + o_b = P1_t − 10·n·log10(max(d_bt, 1 m)) − L_wall·walls_bt − L_floor·floors_bt

``raw_bt`` is the median raw RSSI of reference tag ``t`` at board ``b`` (one number per pair, so a
board that hears a tag a thousand times does not outvote one that hears it a hundred), ``P1_t`` the
tag's RSSI at 1 m from the plan, ``d_bt`` the 3-D distance from the plan (each floor's ``level_m``
plus the height above it), ``walls_bt`` and ``floors_bt`` the walls and slabs crossed, counted on the
plan's room outlines. Pairs on different floors are used, with the per-slab term fitted.

Unknowns: one offset ``o_b`` per board that hears at least one usable tag (what to add to its raw
RSSI, the sign of collector/models/calibration.py), one venue-wide exponent ``n`` and the two
losses. The model is linear in all of them, so the fit is iteratively reweighted least squares
with Huber weights (k = 1.345·σ̂, σ̂ = 1.4826·MAD of the residuals; Huber 1964, the 95 %-efficiency
constant): a pair far off the model (a tag moved, a board behind a metal case) loses weight instead
of dragging every offset. Per-board residuals and standard errors come with the offsets.

Near a receiver's sensitivity the weak reports are never heard, so the median of what is heard reads
too strong: `pair_medians` corrects for the cut (a normal distribution cut at the board's weakest
report), and pairs whose level is below ``min_level_dbm`` are left out.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from listenpost.collector.models.plan import Placement, VenuePlan

HUBER_K = 1.345
"""Huber's tuning constant, in robust standard deviations (95 % efficiency under Gaussian noise)."""
MAD_TO_SIGMA = 1.4826
"""MAD → σ for Gaussian data (1 / Φ⁻¹(0.75))."""
MIN_LEVEL_DBM = -105.0
"""Pairs with a weaker level are left out: about one shadowing σ (5 dB) below a −100 dBm sensitivity, so at
least a sixth of the reports are seen, enough for the cut-normal correction of `pair_medians`."""
MIN_SAMPLES = 30
"""Fewer readings per pair are left out: the median is not yet stable."""
DEFAULT_P1_DBM = -59.0
"""A reference tag whose plan gives no ``power_1m_dbm``: the usual iBeacon measured-power byte."""
FALLBACK_LOSSES_DB = (5.0, 15.0)
"""(per wall, per floor slab) dB held when the pairs cannot fix the losses. 15 dB for one slab is ITU-R
P.1238's floor penetration factor for offices near 2 GHz (from memory); 5 dB is a typical interior
partition (plasterboard about 3, brick about 6–8 dB at 2.4 GHz; from memory)."""
PLAUSIBLE_EXPONENT = (1.6, 3.3)
"""Where a fitted indoor exponent belongs once walls and slabs have their own terms: from 1.6 (line of
sight along a corridor; Rappaport, *Wireless Communications*, 2nd ed., table 4.2, from memory) to 3.3
(ITU-R P.1238 distance power-loss coefficients N = 22–33 for residential, office and commercial sites at
0.9–5.2 GHz, i.e. n = N/10; from memory, docs/references.md §7). Outside it, suspect the plan (a tag at
the wrong position or height) before the venue."""
_SAME_WALL_M = 0.01
"""Crossings this close along the line are one wall (two rooms sharing it)."""


@dataclass(frozen=True, slots=True)
class PairGeometry:
    board: str
    tag: str
    distance_m: float
    walls: int
    floors: int
    p1_dbm: float


@dataclass(frozen=True, slots=True)
class PairFit:
    """One board–tag pair as the fit saw it."""

    board: str
    tag: str
    median_dbm: float
    samples: int
    distance_m: float
    walls: int
    floors: int
    residual_db: float
    """Calibrated median minus the model, dB."""
    weight: float
    """Final Huber weight (1 = fully trusted)."""


@dataclass(frozen=True, slots=True)
class BoardFit:
    board: str
    offset_db: float
    """What to add to the board's raw RSSI, dB."""
    stderr_db: float
    """Standard error of the offset from the fit, dB (inf when the board's pairs alone fix it)."""
    residual_db: float
    """RMS residual of the board's pairs, dB."""
    tags: int
    """Reference tags used for this board."""


@dataclass(frozen=True, slots=True)
class FleetFit:
    boards: tuple[BoardFit, ...]
    exponent: float
    exponent_stderr: float
    wall_db: float
    floor_db: float
    sigma_db: float
    """Robust residual scale, dB."""
    huber_k_db: float
    """The Huber threshold of the final iteration, dB (k·σ̂)."""
    pairs: tuple[PairFit, ...]
    unheard: tuple[str, ...]
    """Boards of the plan with no usable reference-tag pair: no offset for them."""
    iterations: int
    losses_held: bool = False
    """The losses were held at ``fallback_losses`` because the pairs could not fix them."""

    @property
    def exponent_plausible(self) -> bool:
        return PLAUSIBLE_EXPONENT[0] <= self.exponent <= PLAUSIBLE_EXPONENT[1]


# -- geometry from the plan ------------------------------------------------------------------------------


def pair_geometry(plan: VenuePlan, board: Placement, tag: Placement, p1_dbm: float) -> PairGeometry:
    """Distance, walls and slabs between a board and a tag, from the plan's floors and room outlines."""
    levels = {f.id: f.level_m for f in plan.floors}
    order = sorted(plan.floors, key=lambda f: f.level_m)
    a = np.array([board.x, board.y, levels[board.floor] + board.height_m])
    b = np.array([tag.x, tag.y, levels[tag.floor] + tag.height_m])
    distance = float(np.linalg.norm(b - a))
    ia = next(i for i, f in enumerate(order) if f.id == board.floor)
    ib = next(i for i, f in enumerate(order) if f.id == tag.floor)
    walls = 0
    lo, hi = min(ia, ib), max(ia, ib)
    for i in range(lo, hi + 1):
        # The part of the line on floor i: between its slab and the next one up.
        if lo == hi:
            s0, s1 = 0.0, 1.0
        else:
            z0 = order[i].level_m if i > lo else -math.inf
            z1 = order[i + 1].level_m if i < hi else math.inf
            ts = sorted(((z0 - a[2]) / (b[2] - a[2]), (z1 - a[2]) / (b[2] - a[2])))
            s0, s1 = max(0.0, ts[0]), min(1.0, ts[1])
        p, q = a[:2] + s0 * (b[:2] - a[:2]), a[:2] + s1 * (b[:2] - a[:2])
        walls += _walls_on_floor(plan, order[i].id, p, q)
    return PairGeometry(board.id, tag.id, distance, walls, hi - lo, p1_dbm)


def _walls_on_floor(plan: VenuePlan, floor_id: str, p: np.ndarray, q: np.ndarray) -> int:
    """Distinct crossings of the segment p→q with the room outlines of one floor (ends excluded)."""
    d = q - p
    length = float(np.hypot(*d))
    if length < _SAME_WALL_M:
        return 0
    eps = _SAME_WALL_M / length
    ts: list[float] = []
    for room in plan.floor(floor_id).rooms:
        poly = room.polygon
        for i in range(len(poly)):
            e0, e1 = np.array(poly[i - 1]), np.array(poly[i])
            e = e1 - e0
            den = d[0] * e[1] - d[1] * e[0]
            if abs(den) < 1e-12:
                continue  # parallel: running along a wall is not crossing it
            w = e0 - p
            t = (w[0] * e[1] - w[1] * e[0]) / den
            u = (w[0] * d[1] - w[1] * d[0]) / den
            if eps < t < 1 - eps and -1e-9 <= u <= 1 + 1e-9:
                ts.append(t)
    ts.sort()
    return sum(1 for i, t in enumerate(ts) if i == 0 or t - ts[i - 1] > eps)


def plan_geometry(
    plan: VenuePlan, default_p1_dbm: float = DEFAULT_P1_DBM
) -> dict[tuple[str, str], PairGeometry]:
    """Every board × reference tag of the plan."""
    return {
        (b.id, t.id): pair_geometry(
            plan, b, t, t.power_1m_dbm if t.power_1m_dbm is not None else default_p1_dbm
        )
        for b in plan.boards
        for t in plan.reference_tags
    }


# -- the solve -------------------------------------------------------------------------------------------


def pair_medians(
    boards: Sequence[str] | np.ndarray,
    tags: Sequence[str] | np.ndarray,
    raw_dbm: Sequence[float] | np.ndarray,
    *,
    floor_dbm: Mapping[str, float] | float | None = None,
    sigma_db: float | None = None,
) -> dict[tuple[str, str], tuple[float, int]]:
    """
    Level (dBm) and reading count per (board, tag).

    Without ``floor_dbm`` the level is the median. With it (the weakest report a board delivers, per
    board or one for all), the level is the mean of a normal distribution cut at that floor whose
    visible part has the pair's mean: far pairs lose their weak reports below the receiver's
    sensitivity, and their plain median reads several dB too strong. ``sigma_db`` is the shadowing
    spread (default: the median standard deviation of the pairs well above the floor).
    """
    b = np.asarray(boards, dtype=object)
    t = np.asarray(tags, dtype=object)
    x = np.asarray(raw_dbm, dtype=np.float64)
    if not (len(b) == len(t) == len(x)):
        raise ValueError("raw_dbm: boards, tags and readings must have the same length")
    if x.size and not np.all(np.isfinite(x)):
        raise ValueError("raw_dbm: every reading must be a finite number")
    groups: dict[tuple[str, str], list[int]] = {}
    for i, key in enumerate(zip(b.tolist(), t.tolist(), strict=True)):
        groups.setdefault((str(key[0]), str(key[1])), []).append(i)
    if floor_dbm is None:
        return {k: (float(np.median(x[idx])), len(idx)) for k, idx in groups.items()}

    def floor_of(board: str) -> float:
        return float(floor_dbm if not isinstance(floor_dbm, Mapping) else floor_dbm.get(board, -math.inf))

    if sigma_db is None:
        # Standard deviation, not IQR: reports are whole dBm, so quartiles move in 1 dB steps. Sheppard's
        # correction takes out the rounding's own 1/12 dB².
        spreads = [
            math.sqrt(max(float(np.var(x[idx])) - 1.0 / 12.0, 0.0))
            for k, idx in groups.items()
            if len(idx) >= MIN_SAMPLES and np.percentile(x[idx], 2) > floor_of(k[0]) + 1.0
        ]
        if not spreads:
            raise ValueError("sigma_db: no pair lies well above the floor to measure the spread on")
        sigma_db = float(np.median(spreads))
    out = {}
    for k, idx in groups.items():
        out[k] = (_truncated_mean_level(x[idx], floor_of(k[0]), sigma_db), len(idx))
    return out


def _truncated_mean_level(x: np.ndarray, floor: float, sigma: float) -> float:
    """μ of N(μ, σ²) cut below at ``floor`` whose visible mean is mean(x) (bisection; monotone in μ)."""
    seen = float(np.mean(x))
    if not math.isfinite(floor):
        return seen

    def visible_mean(mu: float) -> float:
        a = (floor - mu) / sigma
        # φ(a) / (1 − Φ(a)), with 1 − Φ(a) = erfc(a/√2)/2 and taken in logs. The search keeps
        # μ ≥ mean − 10σ and every reading lies above the floor, so a ≤ 10: erfc stays above 1e-23.
        return mu + sigma * math.exp(
            -0.5 * a * a - 0.5 * math.log(2 * math.pi) - math.log(0.5 * math.erfc(a / math.sqrt(2)))
        )

    lo, hi = seen - 10.0 * sigma, seen
    for _ in range(80):
        mid = (lo + hi) / 2
        if visible_mean(mid) < seen:
            lo = mid
        else:
            hi = mid
    return (lo + hi) / 2


def design(
    medians: Mapping[tuple[str, str], tuple[float, int]],
    geometry: Mapping[tuple[str, str], PairGeometry],
    *,
    min_level_dbm: float = MIN_LEVEL_DBM,
    min_samples: int = MIN_SAMPLES,
    wall_db: float | None = None,
    floor_db: float | None = None,
) -> tuple[list[str], list[tuple[str, str]], np.ndarray, np.ndarray]:
    """
    The linear system ``A·θ ≈ y`` of the usable pairs: θ = (offsets per board, n, L_wall, L_floor),
    ``y = raw − P1``; returns (boards, pairs, A, y). A loss given (not None) is held at that value
    and left out of θ.
    """
    fit_walls, fit_floors = wall_db is None, floor_db is None
    pairs = sorted(
        k
        for k, (med, count) in medians.items()
        if k in geometry and count >= min_samples and med >= min_level_dbm
    )
    boards = sorted({b for b, _ in pairs})
    col = {b: i for i, b in enumerate(boards)}
    extra = 1 + fit_walls + fit_floors
    a = np.zeros((len(pairs), len(boards) + extra))
    y = np.zeros(len(pairs))
    for r, k in enumerate(pairs):
        g = geometry[k]
        a[r, col[k[0]]] = -1.0
        a[r, len(boards)] = -10.0 * math.log10(max(g.distance_m, 1.0))
        if fit_walls:
            a[r, len(boards) + 1] = -g.walls
        if fit_floors:
            a[r, len(boards) + 1 + fit_walls] = -g.floors
        y[r] = medians[k][0] - g.p1_dbm + (wall_db or 0.0) * g.walls + (floor_db or 0.0) * g.floors
    return boards, pairs, a, y


def solve_fleet(
    medians: Mapping[tuple[str, str], tuple[float, int]],
    geometry: Mapping[tuple[str, str], PairGeometry],
    *,
    all_boards: Iterable[str] = (),
    min_level_dbm: float = MIN_LEVEL_DBM,
    min_samples: int = MIN_SAMPLES,
    wall_db: float | None = None,
    floor_db: float | None = None,
    fallback_losses: tuple[float, float] | None = None,
    max_iterations: int = 100,
    tolerance_db: float = 1e-9,
) -> FleetFit:
    """
    Offsets, exponent and losses from per-pair medians (see the module docstring).

    Args:
        medians: (board, tag) → (median raw RSSI dBm, readings), e.g. from `pair_medians`.
        geometry: (board, tag) → `PairGeometry`, e.g. from `plan_geometry`.
        all_boards: boards to list as unheard when they have no usable pair.
        wall_db, floor_db: hold the loss per wall / per slab at this value instead of fitting it. With
            few reference tags the exponent and the fleet's mean offset trade off against the losses
            (pairs at similar distances); a known loss pins them.
        fallback_losses: (wall, slab) dB to hold the free losses at when the pairs cannot fix them
            (`FleetFit.losses_held` tells), instead of raising.

    Raises:
        ValueError: too few usable pairs to fix the unknowns (more pairs than unknowns are needed),
            or the pairs do not separate the exponent from the losses (e.g. all at one distance).
    """
    boards, pairs, a, y = design(
        medians,
        geometry,
        min_level_dbm=min_level_dbm,
        min_samples=min_samples,
        wall_db=wall_db,
        floor_db=floor_db,
    )
    fit_walls, fit_floors = wall_db is None, floor_db is None
    unknowns = a.shape[1]
    if (
        fallback_losses is not None
        and (fit_walls or fit_floors)
        and (len(pairs) <= unknowns or np.linalg.matrix_rank(a) < unknowns)
    ):
        held = solve_fleet(
            medians,
            geometry,
            all_boards=all_boards,
            min_level_dbm=min_level_dbm,
            min_samples=min_samples,
            wall_db=fallback_losses[0] if wall_db is None else wall_db,
            floor_db=fallback_losses[1] if floor_db is None else floor_db,
            max_iterations=max_iterations,
            tolerance_db=tolerance_db,
        )
        return dataclasses.replace(held, losses_held=True)
    if len(pairs) <= unknowns:
        raise ValueError(
            f"pairs: {len(pairs)} usable board–tag pairs for {unknowns} unknowns; more reference tags "
            "must be heard (at least one more pair than unknowns)"
        )
    if np.linalg.matrix_rank(a) < unknowns:
        raise ValueError(
            "pairs: the distances, walls and floors heard do not separate the exponent from the losses; "
            "give the losses (wall_db, floor_db) or add reference tags"
        )
    w = np.ones(len(y))
    theta = np.zeros(unknowns)
    k = sigma = 0.0
    it = 0
    for it in range(1, max_iterations + 1):
        sw = np.sqrt(w)
        new, *_ = np.linalg.lstsq(a * sw[:, None], y * sw, rcond=None)
        r = y - a @ new
        sigma = _robust_scale(a, w, r)
        k = HUBER_K * sigma
        w = np.minimum(1.0, k / np.maximum(np.abs(r), 1e-12))
        done = it > 1 and float(np.max(np.abs(new - theta))) < tolerance_db
        theta = new
        if done:
            break
    r = y - a @ theta
    # Covariance of the weighted fit, scaled by the robust residual variance.
    aw = a * np.sqrt(w)[:, None]
    cov = np.linalg.pinv(aw.T @ aw) * sigma**2
    dof = len(y) - unknowns
    se = np.sqrt(np.maximum(np.diag(cov), 0.0)) if dof > 0 else np.full(unknowns, np.inf)
    nb = len(boards)
    board_fits = []
    for i, b in enumerate(boards):
        rows = [j for j, p in enumerate(pairs) if p[0] == b]
        board_fits.append(
            BoardFit(
                board=b,
                offset_db=float(theta[i]),
                stderr_db=float(se[i]),
                residual_db=float(np.sqrt(np.mean(r[rows] ** 2))),
                tags=len(rows),
            )
        )
    pair_fits = tuple(
        PairFit(
            board=p[0],
            tag=p[1],
            median_dbm=medians[p][0],
            samples=medians[p][1],
            distance_m=geometry[p].distance_m,
            walls=geometry[p].walls,
            floors=geometry[p].floors,
            residual_db=float(r[j]),
            weight=float(w[j]),
        )
        for j, p in enumerate(pairs)
    )
    return FleetFit(
        boards=tuple(board_fits),
        exponent=float(theta[nb]),
        exponent_stderr=float(se[nb]),
        wall_db=float(theta[nb + 1]) if fit_walls else float(wall_db or 0.0),
        floor_db=float(theta[nb + 1 + fit_walls]) if fit_floors else float(floor_db or 0.0),
        sigma_db=sigma,
        huber_k_db=k,
        pairs=pair_fits,
        unheard=tuple(sorted(set(all_boards) - set(boards))),
        iterations=it,
    )


def _robust_scale(a: np.ndarray, w: np.ndarray, r: np.ndarray) -> float:
    """1.4826·MAD of the studentised residuals, leaving out pairs the fit must pass through exactly
    (a board heard by one tag only has a zero residual that says nothing about the noise)."""
    aw = a * np.sqrt(w)[:, None]
    h = np.einsum("ij,ji->i", aw, np.linalg.pinv(aw.T @ aw) @ aw.T)
    free = h < 0.999
    if not free.any():
        return 1e-6
    z = r[free] / np.sqrt(1.0 - h[free])
    return max(MAD_TO_SIGMA * float(np.median(np.abs(z - np.median(z)))), 1e-6)


def calibrate_fleet(
    plan: VenuePlan,
    boards: Sequence[str] | np.ndarray,
    tags: Sequence[str] | np.ndarray,
    raw_dbm: Sequence[float] | np.ndarray,
    **kwargs: object,
) -> FleetFit:
    """`solve_fleet` on raw readings ``(board, tag, raw RSSI)`` of the plan's reference tags."""
    geometry = plan_geometry(plan)
    return solve_fleet(
        pair_medians(boards, tags, raw_dbm),
        geometry,
        all_boards=[b.id for b in plan.boards],
        **kwargs,  # type: ignore[arg-type]
    )


def fit_json(fit: FleetFit) -> dict[str, object]:
    """The fit as plain JSON (the admin API's answer)."""

    def num(v: float) -> float | None:
        return round(v, 4) if math.isfinite(v) else None

    return {
        "exponent": num(fit.exponent),
        "exponent_stderr": num(fit.exponent_stderr),
        "exponent_plausible": fit.exponent_plausible,
        "wall_db": num(fit.wall_db),
        "floor_db": num(fit.floor_db),
        "sigma_db": num(fit.sigma_db),
        "iterations": fit.iterations,
        "losses_held": fit.losses_held,
        "boards": [
            {
                "board": b.board,
                "offset_db": num(b.offset_db),
                "stderr_db": num(b.stderr_db),
                "residual_db": num(b.residual_db),
                "tags": b.tags,
            }
            for b in fit.boards
        ],
        "unheard": list(fit.unheard),
        "pairs": [
            {
                "board": p.board,
                "tag": p.tag,
                "median_dbm": num(p.median_dbm),
                "samples": p.samples,
                "distance_m": num(p.distance_m),
                "walls": p.walls,
                "floors": p.floors,
                "residual_db": num(p.residual_db),
                "weight": num(p.weight),
            }
            for p in fit.pairs
        ],
    }


__all__ = [
    "FALLBACK_LOSSES_DB",
    "PLAUSIBLE_EXPONENT",
    "BoardFit",
    "FleetFit",
    "PairFit",
    "PairGeometry",
    "calibrate_fleet",
    "design",
    "fit_json",
    "pair_geometry",
    "pair_medians",
    "plan_geometry",
    "solve_fleet",
]
