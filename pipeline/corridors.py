"""Descent corridors: where sub-standard fuel from high stations is driven, and the risk there.

A pure calculation module (it never opens files). Given a :class:`pipeline.roadgraph.RoadGraph`,
its edge profiles (:func:`pipeline.roadgraph.edge_profiles`), the stations snapped to nodes
and a fleet requirement model supplied by the caller, it sends each sub-standard station's
regular-grade volume to destinations by a gravity model over bounded shortest-path trees,
accumulates the flows on the trees, and scores every edge-direction by the fuel still in the
tank times the octane deficit there.

Method, per source station s (regular AKI below ``sea_level_standard_aki``, volume V_s > 0)
-------------------------------------------------------------------------------------------
1. Shortest-path tree: ``scipy.sparse.csgraph.dijkstra(indices=sources, limit=R,
   return_predecessors=True)`` on the length-weighted adjacency, R = tank range.
2. Gravity split, constrained at the source only (all of V_s leaves; destinations take what
   their weight and distance attract)::

       q_sj = V_s · w_j f(d_sj) / Σ_k w_k f(d_sk)

   over destinations k in the source's (weakly) connected component, except the source's
   own row (matched by ``id``). f is the decay (``"exponential"``: f = exp(−d/d0);
   ``"power"``: f = max(d, d_min)^−β). A destination not reached within R takes its share at
   d = max(R, straight-line distance) — a lower bound of its road distance — and that share
   is reported as ``beyond_range`` (not routed: it would leave the tank range). Destinations
   in another component take no share; a source with no destination at all is ``unrouted``.
   Conservation: sent = delivered + beyond_range, per source.
3. Flows on the tree: the flow on the tree edge into node x is the total q of destinations in
   x's subtree, by :func:`subtree_sums` (pointer jumping, O(n log depth) numpy work; no path
   is ever walked per destination).
4. Tank model: fuel is used uniformly over the tank range, so the share of the station's fuel
   still in the tank at distance x is σ(x) = max(0, 1 − x/R). On a tree edge from distance a
   to b = a + ℓ carrying flow F the volume-distance of that fuel is
   VD = F · ∫_a^b σ(x) dx  [L·km/month] (closed form, exact also where the edge crosses R);
   the exposure VD/ℓ = F·mean σ [L/month] is the station's fuel still in tanks on the edge.
5. Tank AKI at the edge midpoint m = a + ℓ/2 with top-ups of local fuel (``refill_dilution``
   ρ, local grade A_loc)::

       x = ρ · (1 − σ(m)),   A_tank = (1 − x)·A_s + x·A_loc   (pipeline.octane.blend_linear)

   ρ = 0: no top-ups, the tank holds the station's grade until empty; ρ = 1: every litre
   burned is replaced by local fuel.
6. Deficit D = max(0, A_req − A_tank) with A_req = required_aki(elevation, uphill grade,
   sustained climb) of the edge-direction (caller's fleet model); NaN requirement → D = 0
   (counted in the summary). With ``requirement_elevation="profile"`` (default) the
   requirement is evaluated at the edge's five length quantiles of elevation
   (``elevation_p10_m`` … ``elevation_p90_m``, each a fifth of the length) and
   D = mean_b max(0, A_req,b − A_tank): a long edge down a grade is scored on its low part
   as well, not at its mean elevation; ``"mean"`` / ``"min"`` use one elevation per edge.
7. Risk = D · VD / R_km  [L·AKI/month]. VD / R_km expresses the volume-distance in litres
   carried a whole tank range (V litres driven the full range R give V·∫_0^R σ dx / R = V/2),
   so a station's risk is comparable across networks whatever their edge lengths. It is a
   ranking index for inspections, not a count of knocking engines.

Per station: ``export_risk_l_aki_per_month`` = Σ risk over its tree;
``fuel_share_in_deficit`` = Σ VD·φ / Σ VD over its tree, φ = the share of the edge's length
(its elevation bins) where D > 0 — the share of its exported fuel's volume-distance that is
driven where the fleet needs more octane than is in the tank; NaN when it sends nothing over
any edge.

References
----------
Wilson, A. G. (1967), "A statistical theory of spatial distribution models", Transportation
Research 1, 253–269 (exponential deterrence; from memory). Zipf, G. K. (1946), "The P1P2/D
hypothesis", American Sociological Review 11, 677–686 (power deterrence; from memory).
Dijkstra, E. W. (1959), Numerische Mathematik 1, 269–271. Pointer jumping: Wyllie, J. C. (1979),
"The complexity of parallel computations", PhD thesis, Cornell (list ranking; from memory).
Tank range 480–640 km: /work/shared/DOMAIN.md §4 (from memory).
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, Literal

import geopandas as gpd
import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, Field
from scipy.sparse.csgraph import dijkstra

from pipeline.errors import AltigradeError
from pipeline.roadgraph import PROFILE_QUANTILE_COLUMNS, RoadGraph

try:  # the project's own blending function; a local linear blend otherwise
    from pipeline.octane import blend_linear as _blend_linear
except ImportError:  # pragma: no cover - octane.py is part of the package
    _blend_linear = None

__all__ = [
    "CorridorError",
    "CorridorParams",
    "CorridorResult",
    "DECAY_MODELS",
    "RequiredAki",
    "compute_corridors",
    "corridor_lines",
    "decay_weight",
    "subtree_sums",
    "tank_share",
]

#: Vectorised fleet requirement: (elevation_m, uphill_grade_pct, sustained_climb_m) → AKI.
RequiredAki = Callable[[np.ndarray, np.ndarray, np.ndarray], np.ndarray]

#: Distance-decay models by key: a short description and the published source.
DECAY_MODELS: dict[str, str] = {
    "exponential": "f(d) = exp(−d/d0); Wilson (1967) entropy-maximising spatial interaction",
    "power": "f(d) = max(d, d_min)^−β; gravity model, Zipf (1946)",
}

_M_PER_KM = 1000.0


class CorridorError(AltigradeError, ValueError):
    """Inputs to the corridor calculation are inconsistent (missing columns, wrong sizes)."""


class CorridorParams(BaseModel):
    """Parameters of the corridor calculation (frozen; unknown keys are rejected).

    Every default is a planning choice; the source of each is given beside it.
    """

    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    tank_range_km: float = Field(
        500.0,
        gt=0,
        description="Distance a tank of fuel lasts [km]; DOMAIN.md §4: a typical tank takes a "
        "car 480–640 km (from memory); 500 km sits in the lower half because tanks are "
        "seldom run from full to empty.",
    )
    decay_model: Literal["exponential", "power"] = Field(
        "exponential", description="Distance-decay model key; one of DECAY_MODELS."
    )
    decay_km: float = Field(
        60.0,
        gt=0,
        description="d0 of the exponential decay [km]: trip lengths fall by e every 60 km "
        "(planning choice, from memory: most refuelled trips end within an hour's drive).",
    )
    decay_exponent: float = Field(
        2.0,
        gt=0,
        description="β of the power decay [-]; 2 is the classic gravity value (from memory).",
    )
    decay_min_distance_km: float = Field(
        1.0, gt=0, description="d_min of the power decay [km] (keeps f finite at d = 0)."
    )
    snap_distance_m: float = Field(
        500.0,
        ge=0,
        description="Largest distance from a station or town to the road network [m]; used by "
        "the caller with pipeline.roadgraph.snap_points (planning choice).",
    )
    sea_level_standard_aki: float = Field(
        87.0,
        gt=0,
        description="Lowest regular grade sold at sea level [AKI]; stations below it export "
        "(common practice in North America, from memory; take it from the local rule).",
    )
    refill_dilution: float = Field(
        0.0,
        ge=0,
        le=1,
        description="Share of burned fuel replaced by top-ups of local fuel [0–1]; 0 keeps the "
        "station's grade in the tank until empty (conservative).",
    )
    refill_aki: float | None = Field(
        None, gt=0, description="AKI of the local top-up fuel [AKI]; None: the sea-level standard."
    )
    requirement_elevation: Literal["profile", "mean", "min"] = Field(
        "profile",
        description="Which edge elevations enter the requirement: 'profile' = the five "
        "length quantiles of the edge profile (each a fifth of its length), 'mean' = the "
        "length-weighted mean, 'min' = the minimum (worst case: lowest, highest requirement).",
    )


@dataclass(frozen=True, eq=False)
class CorridorResult:
    """Output of :func:`compute_corridors`.

    Attributes
    ----------
    edges : DataFrame
        One row per edge-direction that carries flow. Columns: ``edge``, ``direction``
        ("forward" u→v / "reverse" v→u), ``from_node``, ``to_node``, ``length_m``,
        ``flow_l_per_month``, ``exposure_l_per_month`` (flow × mean tank share over the edge),
        ``volume_distance_l_km_per_month``, ``distance_km`` and ``tank_share`` (flow-weighted
        mean distance from the sources at the edge midpoint, and share σ there),
        ``required_aki`` and ``required_max_aki`` (mean and largest of the requirement over
        the edge's elevation bins), ``tank_aki`` and ``deficit_aki`` (volume-distance-weighted
        means over sources), ``risk_l_aki_per_month``, ``sources_count``.
    stations : DataFrame
        One row per input row of ``sources`` (same index): ``node``, ``aki``,
        ``volume_l_per_month``, ``is_source``, ``status``, ``sent_l_per_month``,
        ``delivered_l_per_month``, ``beyond_range_l_per_month``, ``unrouted_l_per_month``,
        ``export_risk_l_aki_per_month``, ``volume_distance_l_km_per_month``,
        ``fuel_share_in_deficit``, ``destinations_reached``, ``nodes_reached``.
    summary : dict
        Totals, counts and timings [s] for the run manifest.
    """

    edges: pd.DataFrame
    stations: pd.DataFrame
    summary: dict[str, Any] = field(default_factory=dict)


# ----------------------------------------------------------------------------------------------
# Building blocks
# ----------------------------------------------------------------------------------------------


def decay_weight(distance_km: np.ndarray, params: CorridorParams) -> np.ndarray:
    """Distance-decay factor f(d) of the gravity model.

    Parameters
    ----------
    distance_km : array_like
        Road distance [km], ≥ 0.
    params : CorridorParams
        ``decay_model`` and its coefficients.

    Returns
    -------
    f [-], 1 at d = 0 for the exponential model.

    Notes
    -----
    exponential: f = exp(−d/d0) (Wilson 1967); power: f = max(d, d_min)^−β (Zipf 1946).
    Both from memory; the coefficients are planning choices.
    """
    d = np.asarray(distance_km, dtype=float)
    if params.decay_model == "exponential":
        return np.exp(-d / params.decay_km)
    if params.decay_model == "power":
        return np.maximum(d, params.decay_min_distance_km) ** (-params.decay_exponent)
    raise CorridorError(  # pragma: no cover - pydantic rejects other keys
        f"unknown decay_model {params.decay_model!r}; valid: {sorted(DECAY_MODELS)}"
    )


def tank_share(distance_m: np.ndarray, tank_range_m: float) -> np.ndarray:
    """Share of a station's fuel still in the tank after ``distance_m`` [m] of driving:
    σ = max(0, 1 − d/R) (fuel used uniformly over the tank range R [m]; DOMAIN.md §4)."""
    d = np.asarray(distance_m, dtype=float)
    return np.maximum(0.0, 1.0 - d / tank_range_m)


def _share_integral_m(a: np.ndarray, b: np.ndarray, r: float) -> np.ndarray:
    """∫_a^b max(0, 1 − x/R) dx [m] for 0 ≤ a ≤ b."""
    a2 = np.minimum(a, r)
    b2 = np.minimum(b, r)
    return (b2 - a2) - (b2 * b2 - a2 * a2) / (2.0 * r)


def subtree_sums(parent: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """Sum of ``weight`` over each node's subtree in a forest.

    Parameters
    ----------
    parent : ndarray of int, shape (k,)
        Parent of each node (index into the same arrays); −1 for a root.
    weight : ndarray of float, shape (k,)
        Value at each node (e.g. the volume delivered there [L/month]).

    Returns
    -------
    ndarray, shape (k,): S(x) = Σ weight over x and all its descendants — the flow on the tree
    edge from parent(x) into x.

    Notes
    -----
    Pointer jumping: with A_j(x) the 2^j-th ancestor and S_j(x) the sum over descendants less
    than 2^j levels below x (S_0 = weight, A_0 = parent),

        S_{j+1}(x) = S_j(x) + Σ_{y : A_j(y) = x} S_j(y),    A_{j+1}(x) = A_j(A_j(x)),

    one ``numpy.bincount`` per round, ⌈log2(depth + 1)⌉ rounds: O(k log depth) work without a
    loop over nodes or levels. Wyllie (1979), list ranking by pointer jumping (from memory).
    """
    parent = np.asarray(parent, dtype=np.int64)
    k = parent.size
    s = np.zeros(k + 1)
    s[:k] = np.asarray(weight, dtype=float)
    anc = np.full(k + 1, k, dtype=np.int64)
    anc[:k] = np.where(parent >= 0, parent, k)
    while True:
        live = anc[:k] != k
        if not live.any():
            break
        s += np.bincount(anc, weights=s, minlength=k + 1)
        s[k] = 0.0
        anc = anc[anc]
    return s[:k]


def _blend(a: np.ndarray, b: np.ndarray, x: np.ndarray) -> np.ndarray:
    if _blend_linear is not None:
        return np.asarray(_blend_linear(a, b, x), dtype=float)
    return (1.0 - x) * a + x * b  # pragma: no cover


def _column(df: pd.DataFrame, name: str, what: str) -> np.ndarray:
    if name not in df.columns:
        hint = (
            " (profiles without elevation quantiles: use requirement_elevation='mean')"
            if name in PROFILE_QUANTILE_COLUMNS
            else ""
        )
        raise CorridorError(f"{what} lacks the column {name!r}; has {list(df.columns)}{hint}")
    return df[name].to_numpy()


# ----------------------------------------------------------------------------------------------
# The calculation
# ----------------------------------------------------------------------------------------------


def compute_corridors(
    graph: RoadGraph,
    profiles: pd.DataFrame,
    sources: pd.DataFrame,
    destinations: pd.DataFrame | None,
    required_aki: RequiredAki,
    params: CorridorParams | None = None,
    *,
    local_aki: float | np.ndarray | None = None,
    batch_bytes: float = 256e6,
) -> CorridorResult:
    """Flows of sub-standard fuel from stations over the road graph, and the risk they carry.

    Parameters
    ----------
    graph : RoadGraph
    profiles : DataFrame
        :func:`pipeline.roadgraph.edge_profiles` of ``graph`` (one row per edge, in edge order).
    sources : DataFrame
        All stations, one row each: ``node`` (int, −1 if not snapped), ``volume_l``
        (regular-grade litres per month), ``aki`` (regular AKI); optional ``id``. Rows with
        ``aki`` below ``params.sea_level_standard_aki`` and a positive volume send fuel.
    destinations : DataFrame or None
        ``node``, ``weight`` (e.g. town population), optional ``id`` (a destination whose
        ``id`` equals the source's is skipped). None: every station row of ``sources`` is a
        destination weighted by its ``volume_l``, the station itself excluded.
    required_aki : callable
        ``required_aki(elevation_m, uphill_grade_pct, sustained_climb_m) -> ndarray`` [AKI],
        vectorised: the fleet's requirement on an edge-direction (lower elevation → higher;
        grade and sustained climb add a load increment).
    params : CorridorParams, optional
    local_aki : float or ndarray (n_edges,), optional
        AKI of the top-up fuel along each edge [AKI]; default ``params.refill_aki`` or the
        sea-level standard. Only matters with ``refill_dilution`` > 0.
    batch_bytes : float
        Memory budget for one Dijkstra batch (distance + predecessor rows) [bytes].

    Returns
    -------
    CorridorResult

    Raises
    ------
    CorridorError
        Missing columns, profiles of another graph, a requirement of the wrong shape.

    Notes
    -----
    The model (gravity split, tank share, dilution, deficit, risk) is given in the module
    docstring with its equations. Units: flows L/month, distances km, risk L·AKI/month.
    """
    params = params or CorridorParams()
    t_start = time.perf_counter()
    n = graph.n_nodes
    r_m = params.tank_range_km * _M_PER_KM
    r_km = params.tank_range_km
    standard = params.sea_level_standard_aki

    # Requirement per CSR entry (edge-direction).
    if len(profiles) != graph.n_edges:
        raise CorridorError(
            f"profiles have {len(profiles)} rows but the graph has {graph.n_edges} edges"
        )
    ent_edge = graph.entry_edge
    ent_fwd = graph.entry_forward
    ent_len = np.asarray(graph.adjacency.data, dtype=float)
    nnz = ent_len.size
    elev_cols = {
        "profile": PROFILE_QUANTILE_COLUMNS,
        "mean": ("elevation_mean_m",),
        "min": ("elevation_min_m",),
    }[params.requirement_elevation]
    gf = _column(profiles, "grade_forward_pct", "profiles").astype(float)
    gr = _column(profiles, "grade_reverse_pct", "profiles").astype(float)
    sf = _column(profiles, "sustained_climb_forward_m", "profiles").astype(float)
    sr = _column(profiles, "sustained_climb_reverse_m", "profiles").astype(float)
    grade = np.where(ent_fwd, gf[ent_edge], gr[ent_edge])
    sust = np.where(ent_fwd, sf[ent_edge], sr[ent_edge])
    req_bins = []
    for c in elev_cols:
        elev = _column(profiles, c, "profiles").astype(float)[ent_edge]
        rb = np.asarray(required_aki(elev, grade, sust), dtype=float)
        if rb.ndim == 0:
            rb = np.full(nnz, float(rb))
        if rb.shape != (nnz,):
            raise CorridorError(
                f"required_aki returned shape {rb.shape}; expected ({nnz},), one value per "
                "edge-direction"
            )
        req_bins.append(rb)
    req = np.column_stack(req_bins) if req_bins else np.zeros((nnz, 1))  # (nnz, bins)
    req_nan = ~np.isfinite(req).all(axis=1)
    n_bins = req.shape[1]
    # NaN requirement → no deficit: −inf makes max(req − tank, 0) zero without a test
    req_clean = np.where(np.isfinite(req), req, -np.inf)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        req_mean = np.nanmean(req, axis=1) if nnz else np.zeros(0)
        req_max = np.nanmax(req, axis=1) if nnz else np.zeros(0)
    loc_default = params.refill_aki if params.refill_aki is not None else standard
    if local_aki is None:
        loc = np.full(nnz, loc_default)
    else:
        la = np.asarray(local_aki, dtype=float)
        if la.ndim == 0:
            loc = np.full(nnz, float(la))
        elif la.shape == (graph.n_edges,):
            loc = la[ent_edge]
        else:
            raise CorridorError("local_aki must be a scalar or one value per edge")
        loc = np.where(np.isfinite(loc), loc, loc_default)

    # Sources.
    s_node = _column(sources, "node", "sources").astype(np.int64)
    s_vol = _column(sources, "volume_l", "sources").astype(float)
    s_aki = _column(sources, "aki", "sources").astype(float)
    ns = s_node.size
    status = np.full(ns, "source", dtype=object)
    status[~np.isfinite(s_aki)] = "no_aki"
    status[np.isfinite(s_aki) & (s_aki >= standard)] = "meets_standard"
    vol_ok = np.isfinite(s_vol) & (s_vol > 0)
    status[(status == "source") & ~vol_ok] = "no_volume"
    status[(status == "source") & ((s_node < 0) | (s_node >= n))] = "not_snapped"
    s_id = sources["id"].to_numpy() if "id" in sources.columns else None

    # Destinations.
    if destinations is None:
        d_node_all = s_node
        d_w_all = np.where(vol_ok, s_vol, 0.0)
        d_id_all = np.arange(ns)
        s_key = np.arange(ns)
    else:
        d_node_all = _column(destinations, "node", "destinations").astype(np.int64)
        d_w_all = _column(destinations, "weight", "destinations").astype(float)
        d_id_all = destinations["id"].to_numpy() if "id" in destinations.columns else None
        s_key = s_id if d_id_all is not None else None
    d_ok = (d_node_all >= 0) & (d_node_all < n) & np.isfinite(d_w_all) & (d_w_all > 0)
    d_node = d_node_all[d_ok]
    d_w = d_w_all[d_ok]
    d_xy = graph.node_xy[d_node] if d_node.size else np.zeros((0, 2))
    d_comp = graph.component[d_node] if d_node.size else np.zeros(0, dtype=np.int64)
    excl: dict[int, np.ndarray] = {}
    if s_key is not None and d_id_all is not None and d_node.size:
        d_ids = pd.Series(np.arange(d_node.size), index=pd.Index(np.asarray(d_id_all)[d_ok]))
        groups = d_ids.groupby(level=0).agg(list)
        for i in np.flatnonzero(status == "source"):
            key = s_key[i]
            if key in groups.index:
                excl[int(i)] = np.asarray(groups.loc[key], dtype=np.int64)

    # Outputs per station.
    sent = np.zeros(ns)
    delivered = np.zeros(ns)
    beyond = np.zeros(ns)
    unrouted = np.where(status == "not_snapped", np.where(vol_ok, s_vol, 0.0), 0.0)
    export_risk = np.zeros(ns)
    vd_total = np.zeros(ns)
    vd_deficit = np.zeros(ns)
    n_dest = np.zeros(ns, dtype=np.int64)
    n_reached = np.zeros(ns, dtype=np.int64)

    # Accumulators per CSR entry.
    acc_flow = np.zeros(nnz)
    acc_vd = np.zeros(nnz)
    acc_risk = np.zeros(nnz)
    acc_fdist = np.zeros(nnz)
    acc_vdaki = np.zeros(nnz)
    acc_vddef = np.zeros(nnz)
    acc_count = np.zeros(nnz)

    src_rows = np.flatnonzero(status == "source")
    batch = max(1, int(batch_bytes // max(1, n * 12)))
    lmap = np.full(n, -1, dtype=np.int64)
    t_dij = 0.0
    dilution = params.refill_dilution
    for b0 in range(0, src_rows.size, batch):
        rows = src_rows[b0 : b0 + batch]
        t0 = time.perf_counter()
        dist, pred = dijkstra(
            graph.adjacency,
            directed=True,
            indices=s_node[rows],
            limit=r_m,
            return_predecessors=True,
        )
        t_dij += time.perf_counter() - t0
        parts: list[tuple[np.ndarray, ...]] = []
        for r, i in enumerate(rows):
            d = dist[r]
            pr = pred[r]
            src = s_node[i]
            w = d_w
            if i in excl:
                w = d_w.copy()
                w[excl[i]] = 0.0
            dd = d[d_node]
            fin = np.isfinite(dd)
            live = w > 0
            reach = fin & live
            far = ~fin & live & (d_comp == graph.component[src])
            f = np.zeros(d_node.size)
            f[reach] = decay_weight(dd[reach] / _M_PER_KM, params)
            if far.any():
                eu = np.hypot(*(d_xy[far] - graph.node_xy[src]).T)
                f[far] = decay_weight(np.maximum(eu, r_m) / _M_PER_KM, params)
            g = w * f
            tot = g.sum()
            if not tot > 0:
                status[i] = "no_destination"
                unrouted[i] = s_vol[i]
                continue
            q = s_vol[i] * (g / tot)
            sent[i] = s_vol[i]
            beyond[i] = q[far].sum()
            n_dest[i] = int(reach.sum())

            fin_all = np.isfinite(d)
            k = int(np.count_nonzero(fin_all))
            n_reached[i] = k
            if 2 * k < n:
                # Few nodes reached: work on the reached ones only.
                reached = np.flatnonzero(fin_all)
                lmap[reached] = np.arange(k)
                prr = pr[reached]
                par = np.where(prr >= 0, lmap[np.maximum(prr, 0)], -1)
                dem = np.bincount(lmap[d_node[reach]], weights=q[reach], minlength=k)
                root = lmap[src]
                lmap[reached] = -1
            else:
                # Most nodes reached: unreached ones are isolated roots with no demand.
                reached = None
                prr = pr
                par = np.where(pr >= 0, pr, -1)
                dem = np.bincount(d_node[reach], weights=q[reach], minlength=n)
                root = src
            s_sub = subtree_sums(par, dem)
            delivered[i] = s_sub[root]
            fl = np.flatnonzero((s_sub > 0) & (par >= 0))
            if fl.size == 0:
                continue
            head = fl if reached is None else reached[fl]
            tail = prr[fl]
            flow = s_sub[fl]
            ent = graph.entry_index(tail, head)
            a = d[tail]
            ell = ent_len[ent]
            vd = flow * _share_integral_m(a, a + ell, r_m) / _M_PER_KM
            mid = a + 0.5 * ell
            if dilution > 0:
                x = dilution * (1.0 - tank_share(mid, r_m))
                tank = _blend(np.full(x.size, s_aki[i]), loc[ent], x)
            else:
                tank = np.full(fl.size, s_aki[i])
            dbin = np.maximum(req_clean[ent] - tank[:, None], 0.0)
            deficit = dbin.sum(axis=1) / n_bins
            # share of the edge's length (its elevation bins) in deficit
            in_deficit = np.count_nonzero(dbin > 0, axis=1) / n_bins
            risk = vd * deficit / r_km
            export_risk[i] = risk.sum()
            vd_total[i] = vd.sum()
            vd_deficit[i] = (vd * in_deficit).sum()
            parts.append((ent, flow, vd, risk, flow * mid, vd * tank, vd * deficit))
        if parts:
            cat = [np.concatenate(c) for c in zip(*parts, strict=True)]
            ent_all = cat[0]
            for accum, vals in zip(
                (acc_flow, acc_vd, acc_risk, acc_fdist, acc_vdaki, acc_vddef),
                cat[1:],
                strict=True,
            ):
                accum += np.bincount(ent_all, weights=vals, minlength=nnz)
            acc_count += np.bincount(ent_all, minlength=nnz)
        del dist, pred

    # Edge-direction table.
    sel = np.flatnonzero(acc_flow > 0)
    e = ent_edge[sel]
    fwd = ent_fwd[sel]
    with np.errstate(invalid="ignore", divide="ignore"):
        vd_s = acc_vd[sel]
        edges = pd.DataFrame(
            {
                "edge": e,
                "direction": np.where(fwd, "forward", "reverse"),
                "from_node": np.where(fwd, graph.u[e], graph.v[e]),
                "to_node": np.where(fwd, graph.v[e], graph.u[e]),
                "length_m": ent_len[sel],
                "flow_l_per_month": acc_flow[sel],
                "exposure_l_per_month": vd_s * _M_PER_KM / ent_len[sel],
                "volume_distance_l_km_per_month": vd_s,
                "distance_km": acc_fdist[sel] / acc_flow[sel] / _M_PER_KM,
                # σ = 1 − m/R exactly: a tree edge ends at a node reached within R, so m < R
                "tank_share": 1.0 - acc_fdist[sel] / acc_flow[sel] / r_m,
                "required_aki": req_mean[sel],
                "required_max_aki": req_max[sel],
                "tank_aki": np.where(vd_s > 0, acc_vdaki[sel] / vd_s, np.nan),
                "deficit_aki": np.where(vd_s > 0, acc_vddef[sel] / vd_s, 0.0),
                "risk_l_aki_per_month": acc_risk[sel],
                "sources_count": acc_count[sel].astype(np.int64),
            }
        )
        share_def = np.where(vd_total > 0, vd_deficit / vd_total, np.nan)
    stations = pd.DataFrame(
        {
            "node": s_node,
            "aki": s_aki,
            "volume_l_per_month": s_vol,
            "is_source": status == "source",
            "status": status.astype(str),
            "sent_l_per_month": sent,
            "delivered_l_per_month": delivered,
            "beyond_range_l_per_month": beyond,
            "unrouted_l_per_month": unrouted,
            "export_risk_l_aki_per_month": export_risk,
            "volume_distance_l_km_per_month": vd_total,
            "fuel_share_in_deficit": share_def,
            "destinations_reached": n_dest,
            "nodes_reached": n_reached,
        },
        index=sources.index,
    )
    summary = {
        "sources": int((status == "source").sum()),
        "stations": int(ns),
        "destinations": int(d_node.size),
        "edge_directions_with_flow": int(sel.size),
        "edge_directions_at_risk": int((acc_risk > 0).sum()),
        "requirement_nan_edge_directions": int(req_nan.sum()),
        "sent_l_per_month": float(sent.sum()),
        "delivered_l_per_month": float(delivered.sum()),
        "beyond_range_l_per_month": float(beyond.sum()),
        "unrouted_l_per_month": float(unrouted.sum()),
        "export_risk_l_aki_per_month": float(export_risk.sum()),
        "dijkstra_batch_size": int(batch),
        "dijkstra_s": t_dij,
        "total_s": time.perf_counter() - t_start,
    }
    return CorridorResult(edges=edges, stations=stations, summary=summary)


def corridor_lines(
    graph: RoadGraph, result: CorridorResult, *, min_flow_l_per_month: float = 0.0
) -> gpd.GeoDataFrame:
    """Edges that carry exported fuel, as a GeoDataFrame (one row per edge, ``graph.crs``).

    Parameters
    ----------
    graph : RoadGraph
        The graph the result was computed on.
    result : CorridorResult
    min_flow_l_per_month : float
        Leave out edges whose total flow is at or below this [L/month] (and carry no risk).

    Returns
    -------
    GeoDataFrame with ``edge``, ``u``, ``v``, ``direction`` ("forward" / "reverse" / "both":
    which directions carry flow), ``flow_l_per_month`` (both directions),
    ``flow_forward_l_per_month``, ``flow_reverse_l_per_month``, ``deficit_aki``
    (volume-distance-weighted mean over both directions), ``required_aki`` (the larger of the
    two directions that carry flow), ``risk_l_aki_per_month``, ``sources_count`` (sources whose
    tree uses the edge; a tree uses an edge in one direction only), ``length_m``,
    ``road_class``, geometry (oriented u → v).
    """
    ed = result.edges
    cols = [
        "edge", "u", "v", "direction", "flow_l_per_month", "flow_forward_l_per_month",
        "flow_reverse_l_per_month", "deficit_aki", "required_aki", "risk_l_aki_per_month",
        "sources_count", "length_m", "road_class",
    ]
    if ed.empty:
        return gpd.GeoDataFrame({c: [] for c in cols}, geometry=[], crs=graph.crs)
    fwd = ed["direction"].to_numpy() == "forward"
    e = ed["edge"].to_numpy()
    flow = ed["flow_l_per_month"].to_numpy()
    g = pd.DataFrame(
        {
            "edge": e,
            "flow_f": np.where(fwd, flow, 0.0),
            "flow_r": np.where(fwd, 0.0, flow),
            "vd": ed["volume_distance_l_km_per_month"].to_numpy(),
            "vddef": ed["volume_distance_l_km_per_month"].to_numpy() * ed["deficit_aki"].to_numpy(),
            "req": ed["required_aki"].to_numpy(),
            "risk": ed["risk_l_aki_per_month"].to_numpy(),
            "count": ed["sources_count"].to_numpy(),
        }
    ).groupby("edge", sort=True).agg(
        flow_f=("flow_f", "sum"),
        flow_r=("flow_r", "sum"),
        vd=("vd", "sum"),
        vddef=("vddef", "sum"),
        req=("req", "max"),
        risk=("risk", "sum"),
        count=("count", "sum"),
    )
    total = g["flow_f"] + g["flow_r"]
    keep = (total > min_flow_l_per_month) | (g["risk"] > 0)
    g = g[keep]
    total = total[keep]
    idx = g.index.to_numpy()
    has_f = g["flow_f"].to_numpy() > 0
    has_r = g["flow_r"].to_numpy() > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        deficit = np.where(g["vd"] > 0, g["vddef"] / g["vd"], 0.0)
    out = gpd.GeoDataFrame(
        {
            "edge": idx,
            "u": graph.u[idx],
            "v": graph.v[idx],
            "direction": np.where(has_f & has_r, "both", np.where(has_f, "forward", "reverse")),
            "flow_l_per_month": total.to_numpy(),
            "flow_forward_l_per_month": g["flow_f"].to_numpy(),
            "flow_reverse_l_per_month": g["flow_r"].to_numpy(),
            "deficit_aki": deficit,
            "required_aki": g["req"].to_numpy(),
            "risk_l_aki_per_month": g["risk"].to_numpy(),
            "sources_count": g["count"].to_numpy().astype(np.int64),
            "length_m": graph.length_m[idx],
            "road_class": graph.attributes["road_class"].to_numpy(dtype=object)[idx],
        },
        geometry=graph.geometry[idx],
        crs=graph.crs,
    )
    return out.reset_index(drop=True)
