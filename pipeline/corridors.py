"""Descent corridors: where sub-standard fuel from high stations is driven, and the risk there.

A pure calculation module (it never opens files). Given a :class:`pipeline.roadgraph.RoadGraph`,
its edge profiles (:func:`pipeline.roadgraph.edge_profiles`), the stations snapped to nodes
and a fleet requirement model supplied by the caller, it sends each sub-standard station's
regular-grade volume to destinations by a gravity model over bounded shortest-path trees,
accumulates the flows on the trees, and scores every edge-direction by the fuel still in the
tank times the octane deficit there.

Method, per source station s (regular AKI below ``sea_level_standard_aki``, volume V_s > 0)
-------------------------------------------------------------------------------------------
1. Shortest-path tree: Dijkstra's method bounded at R = tank range
   (:func:`pipeline.shortest_paths.bounded_tree`, compiled, on the partition's subgraph).
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
   x's subtree, summed in one pass over the tree's nodes from the farthest to the source
   (:func:`pipeline.shortest_paths.tree_flows`; no path is walked per destination).
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

Steps 3–7 run compiled, one pass per source tree
(:func:`pipeline.shortest_paths.source_tree_sums`), with NumPy's summation order.

Trees rooted at the destinations (``tree_root``)
-----------------------------------------------
Where destinations are fewer than sources (towns against stations) and the tank grade does
not change along the way (ρ = 0), the same sums come from one tree per destination node,
grown on the reverse graph: it holds every source's shortest path to that destination. The
fuel of source s on the entry x → parent(x) has driven a = D(s) − D(x) (D: road distance to
the destination), so its volume-distance q ℓ (1 − ℓ/2R + D(x)/R − D(s)/R) is linear in D(s):
per entry, subtree sums of q and q·D(s) per tank grade give flows, volume-distance, deficit
and risk; per source, prefix sums from the destination down give its sums over its path
(:func:`pipeline.shortest_paths.root_tree_sums`). Equal to the source trees up to rounding
where shortest paths are unique; between equally short paths each pair takes one chosen from
the destination's side. ``sources_count`` counts distinct sources per entry (bit sets).

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
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any, Literal

import geopandas as gpd
import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from pydantic import BaseModel, ConfigDict, Field
from scipy import sparse

from pipeline.errors import AltigradeError
from pipeline.partitions import morton_key, partition_slices
from pipeline.roadgraph import PROFILE_QUANTILE_COLUMNS, RoadGraph
from pipeline.shortest_paths import (
    TreeWork,
    bounded_tree,
    compact_csr,
    path_nodes,
    reverse_csr,
    root_tree_sums,
    source_tree_sums,
)

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
        ``fuel_share_in_deficit``, ``destinations_reached``, ``nodes_reached`` (nodes
        settled before the search stopped: at the last destination, or at the tank range).
    summary : dict
        Totals, counts and timings [s] for the run manifest.
    """

    edges: pd.DataFrame
    stations: pd.DataFrame
    summary: dict[str, Any] = field(default_factory=dict)
    #: The ``candidate_aki`` grades asked for [AKI], shape (k,).
    candidate_aki: np.ndarray = field(default_factory=lambda: np.zeros(0))
    #: ``fuel_share_in_deficit`` of each station row had it sold each candidate grade,
    #: shape (n_stations, k); NaN where the station sends nothing.
    candidate_share_in_deficit: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))


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
    candidate_aki: ArrayLike | None = None,
    sources_per_partition: int = 1024,
    executor: Any = None,
    tree_root: Literal["auto", "sources", "destinations"] = "auto",
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
        vectorised and broadcasting: the fleet's requirement on an edge-direction (lower
        elevation → higher; grade and sustained climb add a load increment). It is called once,
        with elevations of shape (elevation bins, edge-directions) and grades and climbs of
        shape (edge-directions,).
    params : CorridorParams, optional
    local_aki : float or ndarray (n_edges,), optional
        AKI of the top-up fuel along each edge [AKI]; default ``params.refill_aki`` or the
        sea-level standard. Only matters with ``refill_dilution`` > 0.
    candidate_aki : array_like (k,), optional
        Grades [AKI] at which each source's ``fuel_share_in_deficit`` is also evaluated, as if
        the station sold that grade (same trees and flows; only the tank AKI changes), for the
        grades above the station's own. Returned in
        :attr:`CorridorResult.candidate_share_in_deficit` (NaN at and below its own grade).
    sources_per_partition : int
        Sources are ordered along a space-filling (Morton) curve of their nodes and cut into
        partitions of this many; each partition routes on the subgraph of nodes within the
        tank range (plus :data:`CUT_MARGIN_SHARE` of it) of its sources' bounding box.
    executor : pipeline.execution.Executor, optional
        Runs the partitions (in this process when None). The partitions and the order in
        which their edge sums are combined depend on the data alone, so the result is
        identical to the bit whichever executor runs them.
    tree_root : {"auto", "sources", "destinations"}
        Where the shortest-path trees grow from: one tree per source (any model), or one per
        destination node on the reverse graph (``refill_dilution`` = 0 only: the tank grade
        must not change along the way). ``"auto"`` roots them at the destinations when those
        are fewer than the sources and dilution is off. Both give the same sums up to
        rounding where shortest paths are unique; ``nodes_reached`` is 0 with destination
        roots.

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

    Cutting the graph changes no shortest path within the range R: a node reached within R
    lies within straight-line distance R of its source (an edge is never shorter than its
    chord), so every node and edge of every tree within R is kept, in the same order. The
    margin absorbs the scale error of the metric CRS where lengths are geodesic.
    """
    params = params or CorridorParams()
    t_start = time.perf_counter()
    n = graph.n_nodes
    r_m = params.tank_range_km * _M_PER_KM
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
    # every elevation bin in one call (a requirement that solves distinct values once then
    # shares them across bins)
    k = len(elev_cols)
    elev = np.stack([_column(profiles, c, "profiles").astype(float)[ent_edge] for c in elev_cols])

    def entry_requirement() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(requirement per entry and bin with −inf where none, NaN flags, mean, max)."""
        rb = np.asarray(required_aki(elev, grade, sust), dtype=float)  # (bins, nnz)
        if rb.ndim == 0:
            rb = np.full((k, nnz), float(rb))
        if rb.shape != (k, nnz):
            raise CorridorError(
                f"required_aki returned shape {rb.shape}; expected ({k}, {nnz}), one value per "
                "elevation bin and edge-direction"
            )
        req = np.ascontiguousarray(rb.T)  # (nnz, bins)
        # NaN requirement → no deficit: −inf makes max(req − tank, 0) zero without a test
        req_clean = np.where(np.isfinite(req), req, -np.inf)
        # NaN-skipping mean and max per entry, as np.nanmean / np.nanmax compute them, without
        # their all-NaN warning (the warnings filters are process-wide: not from a thread)
        has = ~np.isnan(req)
        count = has.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            req_mean = np.where(has, req, 0.0).sum(axis=1) / count
        req_max = np.where(
            count > 0, np.where(has, req, -np.inf).max(axis=1, initial=-np.inf), np.nan
        )
        return req_clean, ~np.isfinite(req).all(axis=1), req_mean, req_max

    # Where a partition may use two threads (threads mode), the requirement is solved on a
    # thread of its own while the partitions grow their trees, which need only the lengths;
    # a partition waits for it before it adds up deficits. Elsewhere it is solved first
    # (a Dask worker gets it with the network).
    beside = None
    if getattr(executor, "threads_per_piece", 1) > 1:
        beside = ThreadPoolExecutor(1, thread_name_prefix="altigrade-requirement")
        requirement: Any = beside.submit(entry_requirement)
    else:
        requirement = entry_requirement()
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
    cand = np.zeros(0) if candidate_aki is None else np.asarray(candidate_aki, dtype=float).ravel()

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
    excl: dict[int, np.ndarray] = {}
    if s_key is not None and d_id_all is not None and d_node.size:
        d_ids = pd.Series(np.arange(d_node.size), index=pd.Index(np.asarray(d_id_all)[d_ok]))
        groups = d_ids.groupby(level=0).agg(list)
        for i in np.flatnonzero(status == "source"):
            key = s_key[i]
            if key in groups.index:
                excl[int(i)] = np.asarray(groups.loc[key], dtype=np.int64)

    # Which end the trees grow from: the fewer trees, where the model allows it.
    n_src = int((status == "source").sum())
    n_roots = int(np.unique(d_node).size)
    if tree_root == "destinations" and params.refill_dilution > 0:
        raise CorridorError(
            "tree_root='destinations' needs refill_dilution = 0 (the tank grade then does not "
            "change along the way)"
        )
    if tree_root == "auto":
        tree_root = "destinations" if params.refill_dilution == 0 and n_roots < n_src else "sources"

    # Partitions of the sources, ordered along a Morton curve of their nodes.
    src_rows = np.flatnonzero(status == "source")
    src_rows = src_rows[np.argsort(morton_key(graph.node_xy[s_node[src_rows]]), kind="stable")]
    net = _Network(
        indptr=np.asarray(graph.adjacency.indptr, dtype=np.int64),
        indices=np.asarray(graph.adjacency.indices, dtype=np.int64),
        length_m=ent_len,
        node_xy=np.asarray(graph.node_xy, dtype=float),
        node_rank=_morton_rank(graph.node_xy),
        component=np.asarray(graph.component, dtype=np.int64),
        req_clean=requirement if beside is not None else requirement[0],
        local_aki=loc,
        d_node=d_node,
        d_weight=d_w,
        candidate_aki=cand,
        params=params,
        root=tree_root,
        tree_threads=getattr(executor, "threads_per_piece", 1),
    )
    parts = []
    for sl in partition_slices(src_rows.size, sources_per_partition):
        rows = src_rows[sl]
        parts.append(
            _SourceBatch(
                rows=rows,
                node=s_node[rows],
                volume_l=s_vol[rows],
                aki=s_aki[rows],
                exclude=[excl.get(int(i)) for i in rows],
            )
        )
    try:
        if executor is None:
            results = [_corridor_partition(p, net=net) for p in parts]
        else:
            results = executor.map(_corridor_partition, parts, shared={"net": net})
        if beside is not None:
            requirement = requirement.result()
        _, req_nan, req_mean, req_max = requirement
    finally:
        if beside is not None:
            beside.shutdown(wait=True)

    # Combine in partition order (the same order in every execution mode).
    sent = np.zeros(ns)
    delivered = np.zeros(ns)
    beyond = np.zeros(ns)
    unrouted = np.where(status == "not_snapped", np.where(vol_ok, s_vol, 0.0), 0.0)
    export_risk = np.zeros(ns)
    vd_total = np.zeros(ns)
    vd_deficit = np.zeros(ns)
    vd_deficit_cand = np.zeros((ns, cand.size))
    n_dest = np.zeros(ns, dtype=np.int64)
    n_reached = np.zeros(ns, dtype=np.int64)
    acc = np.zeros((len(_ACC_FIELDS), nnz))
    t_dij = 0.0
    sub_nodes = []
    for p, r in zip(parts, results, strict=True):
        rows = p.rows
        routed = r["routed"]
        status[rows[~routed]] = "no_destination"
        unrouted[rows[~routed]] = s_vol[rows[~routed]]
        sent[rows] = r["sent"]
        delivered[rows] = r["delivered"]
        beyond[rows] = r["beyond"]
        export_risk[rows] = r["export_risk"]
        vd_total[rows] = r["vd_total"]
        vd_deficit[rows] = r["vd_deficit"]
        vd_deficit_cand[rows] = r["vd_deficit_cand"]
        n_dest[rows] = r["destinations_reached"]
        n_reached[rows] = r["nodes_reached"]
        acc[:, r["entries"]] += r["acc"]
        t_dij += r["dijkstra_s"]
        sub_nodes.append(r["subgraph_nodes"])
    acc_flow, acc_vd, acc_risk, acc_fdist, acc_vdaki, acc_vddef, acc_count = acc

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
        share_cand = np.where(vd_total[:, None] > 0, vd_deficit_cand / vd_total[:, None], np.nan)
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
        "partitions": len(parts),
        "tree_root": tree_root,
        "subgraph_nodes_max": int(max(sub_nodes, default=0)),
        "subgraph_nodes_mean": float(np.mean(sub_nodes)) if sub_nodes else 0.0,
        "dijkstra_s": t_dij,
        "total_s": time.perf_counter() - t_start,
    }
    return CorridorResult(
        edges=edges,
        stations=stations,
        summary=summary,
        candidate_aki=cand,
        candidate_share_in_deficit=share_cand,
    )


def _morton_rank(xy: np.ndarray) -> np.ndarray:
    """Rank of each node along the Morton curve of all nodes (ties by node number)."""
    order = np.argsort(morton_key(xy), kind="stable")
    rank = np.empty(order.size, dtype=np.int64)
    rank[order] = np.arange(order.size)
    return rank


#: Share of the tank range added around a partition's sources when cutting its subgraph: covers
#: the scale error of a metric CRS against geodesic edge lengths (well under 1 % within a
#: projection's intended area).
CUT_MARGIN_SHARE = 0.05

_ACC_FIELDS = ("flow", "vd", "risk", "fdist", "vdaki", "vddef", "count")


@dataclass(frozen=True, eq=False)
class _Network:
    """What every corridor partition reads: the routable graph as plain arrays, the
    requirement and top-up grade per entry, and the destinations (sent to a worker once)."""

    indptr: np.ndarray
    indices: np.ndarray
    length_m: np.ndarray
    node_xy: np.ndarray
    node_rank: np.ndarray
    component: np.ndarray
    #: Requirement per entry and elevation bin [AKI], −inf where none; or, while it is being
    #: solved beside the trees, a future whose result begins with it (see
    #: :meth:`requirement`).
    req_clean: Any
    local_aki: np.ndarray
    d_node: np.ndarray
    d_weight: np.ndarray
    candidate_aki: np.ndarray
    params: CorridorParams
    #: "sources": one tree per source; "destinations": one tree per destination node.
    root: str = "sources"
    #: Threads a partition may grow its destination trees on (1: one after another); the
    #: results do not depend on it.
    tree_threads: int = 1

    def requirement(self) -> np.ndarray:
        """``req_clean``, waiting for it where it is still being solved beside the trees."""
        r = self.req_clean
        return r.result()[0] if isinstance(r, Future) else r


@dataclass(frozen=True, eq=False)
class _SourceBatch:
    """One partition of sources: station rows, their nodes, volumes, grades and the
    destinations each must skip (its own row)."""

    rows: np.ndarray
    node: np.ndarray
    volume_l: np.ndarray
    aki: np.ndarray
    exclude: list


def _cut(net: _Network, node: np.ndarray) -> tuple[Any, np.ndarray, np.ndarray, np.ndarray]:
    """The subgraph a partition routes on: nodes in its sources' bounding box grown by the
    tank range and margin, numbered along the whole graph's Morton curve (nearby nodes close
    in memory), with their entries sorted by (tail, head) in that numbering.

    The numbering depends on the whole graph only, so any two cuts order their common nodes
    and entries alike, and a tree grown on either is the same.

    Returns (adjacency, global node of each local node, global entry of each local entry,
    local number of each global node, −1 outside the cut)."""
    r = net.params.tank_range_km * _M_PER_KM * (1.0 + CUT_MARGIN_SHARE)
    xy = net.node_xy
    n = xy.shape[0]
    sxy = xy[node]
    x0, y0 = sxy.min(axis=0) - r
    x1, y1 = sxy.max(axis=0) + r
    keep = (xy[:, 0] >= x0) & (xy[:, 0] <= x1) & (xy[:, 1] >= y0) & (xy[:, 1] <= y1)
    nodes = np.flatnonzero(keep).astype(np.int64)
    nodes = nodes[np.argsort(net.node_rank[nodes], kind="stable")]
    k = nodes.size
    local = np.full(n, -1, dtype=np.int64)
    local[nodes] = np.arange(k)
    tails = np.repeat(np.arange(n, dtype=np.int64), np.diff(net.indptr))
    ents = np.flatnonzero(keep[tails] & keep[net.indices]).astype(np.int64)
    key = local[tails[ents]] * k + local[net.indices[ents]]
    perm = np.argsort(key, kind="stable")
    ents = ents[perm]
    key = key[perm]
    indptr = np.zeros(k + 1, dtype=np.int64)
    np.cumsum(np.bincount(key // max(k, 1), minlength=k), out=indptr[1:])
    adj = sparse.csr_matrix((net.length_m[ents], key % max(k, 1), indptr), shape=(k, k))
    return adj, nodes, ents, local


def _corridor_partition(part: _SourceBatch, net: _Network) -> dict[str, Any]:
    """One partition of sources, by trees rooted where ``net.root`` says."""
    if net.root == "destinations":
        return _partition_by_destination(part, net)
    return _partition_by_source(part, net)


def _partition_outputs(m: int, n_candidates: int, subgraph_nodes: int) -> dict[str, Any]:
    """Zeroed per-source results of a partition of ``m`` sources (both tree roots fill the
    same keys; the driver combines them in partition order)."""
    return {
        "routed": np.zeros(m, dtype=bool),
        "sent": np.zeros(m),
        "delivered": np.zeros(m),
        "beyond": np.zeros(m),
        "export_risk": np.zeros(m),
        "vd_total": np.zeros(m),
        "vd_deficit": np.zeros(m),
        "vd_deficit_cand": np.zeros((m, n_candidates)),
        "destinations_reached": np.zeros(m, dtype=np.int64),
        "nodes_reached": np.zeros(m, dtype=np.int64),
        "subgraph_nodes": int(subgraph_nodes),
    }


def _gravity(
    part: _SourceBatch, net: _Network, dd: np.ndarray, j: int, out: dict[str, Any]
) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Step 2 for source j of the partition: its share q [L/month] to every destination, given
    the road distances ``dd`` [m] (inf where not reached within R). Records ``routed``,
    ``sent``, ``beyond`` and ``destinations_reached`` in ``out``; returns (q, reached, far),
    or None when no destination attracts anything."""
    params = net.params
    r_m = params.tank_range_km * _M_PER_KM
    w = net.d_weight
    if part.exclude[j] is not None:
        w = w.copy()
        w[part.exclude[j]] = 0.0
    fin = np.isfinite(dd)
    live = w > 0
    reach = fin & live
    far = ~fin & live & (net.component[net.d_node] == net.component[part.node[j]])
    f = np.zeros(dd.size)
    f[reach] = decay_weight(dd[reach] / _M_PER_KM, params)
    if far.any():
        eu = np.hypot(*(net.node_xy[net.d_node[far]] - net.node_xy[part.node[j]]).T)
        f[far] = decay_weight(np.maximum(eu, r_m) / _M_PER_KM, params)
    g = w * f
    tot = g.sum()
    if not tot > 0:
        return None
    q = part.volume_l[j] * (g / tot)
    out["routed"][j] = True
    out["sent"][j] = part.volume_l[j]
    out["beyond"][j] = q[far].sum()
    out["destinations_reached"][j] = int(reach.sum())
    return q, reach, far


#: Roots per chunk of town trees below which a partition's trees stay in one chunk.
_MIN_TREES_PER_CHUNK = 4

#: Per-source outputs the tree sums add into (``root_tree_sums``).
_TREE_SUM_OUTPUTS = ("export_risk", "vd_total", "vd_deficit", "vd_deficit_cand")


def _tree_chunks(n_roots: int) -> list[np.ndarray]:
    """The roots of a partition cut into two chunks (alternate roots, for balance), or one
    when there are few. Fixed by the number of roots alone, never by the execution mode: each
    chunk's sums are added in their own arrays and then in chunk order, so the bits are the
    same whether the chunks run one after another or side by side."""
    if n_roots < 2 * _MIN_TREES_PER_CHUNK:
        return [np.arange(n_roots)]
    return [np.arange(0, n_roots, 2), np.arange(1, n_roots, 2)]


def _each_chunk(fn: Callable[[Any], Any], items: list, threads: int) -> list:
    """``[fn(item) for item in items]``, on ``threads`` threads when more than one (the tree
    code is compiled and releases the interpreter lock)."""
    if threads <= 1 or len(items) <= 1:
        return [fn(it) for it in items]
    with ThreadPoolExecutor(min(threads, len(items)), thread_name_prefix="altigrade-trees") as ex:
        return list(ex.map(fn, items))


def _partition_by_destination(part: _SourceBatch, net: _Network) -> dict[str, Any]:
    """The same sums as :func:`_partition_by_source` from one tree per destination node,
    grown on the reverse graph towards it: where destinations are fewer than sources (towns
    against stations) far fewer trees. Needs a tank grade that does not change along the way
    (``refill_dilution`` = 0): volume-distance and deficit then add up per grade
    (:func:`pipeline.shortest_paths.root_tree_sums`). Equal to the source-rooted sums up to
    rounding where shortest paths are unique; where several are equally short, each pair is
    routed on one of them, chosen from the destination's side."""
    params = net.params
    r_m = params.tank_range_km * _M_PER_KM
    adj, nodes, ents, local = _cut(net, part.node)
    k_all = nodes.size
    nnz = ents.size
    src_local = local[part.node]
    cand = net.candidate_aki
    m = part.rows.size
    out = _partition_outputs(m, cand.size, k_all)
    rindptr, rindices, rlen, rent = reverse_csr(
        np.asarray(adj.indptr, dtype=np.int64),
        np.asarray(adj.indices, dtype=np.int64),
        np.asarray(adj.data, dtype=float),
    )
    rindptr, rindices = compact_csr(rindptr, rindices)
    reach_m = r_m * (1.0 + CUT_MARGIN_SHARE)
    # destination nodes (unique, in node order) within straight-line reach of a source
    d_local = local[net.d_node]
    d_live = (d_local >= 0) & (net.d_weight > 0)
    s_xy = net.node_xy[part.node]
    roots = np.unique(net.d_node[d_live])
    near = (
        np.hypot(
            net.node_xy[roots][:, None, 0] - s_xy[None, :, 0],
            net.node_xy[roots][:, None, 1] - s_xy[None, :, 1],
        )
        <= reach_m
    )  # (roots, sources)
    roots, near = roots[near.any(axis=1)], near[near.any(axis=1)]
    dist = np.full((m, roots.size), np.inf)  # road distance source -> root [m]
    trees: list = [None] * roots.size
    chunks = _tree_chunks(roots.size)

    def grow(chunk: np.ndarray) -> float:
        """The trees of one chunk of roots (work arrays of its own); returns Dijkstra time."""
        work = TreeWork(k_all)
        targets = np.zeros(k_all, dtype=bool)
        pos = np.full(k_all, -1, dtype=np.int64)
        mark = np.zeros(k_all, dtype=bool)
        t_dij = 0.0
        for u in chunk.tolist():
            root = roots[u]
            t0 = time.perf_counter()
            tg = src_local[near[u]]
            targets[tg] = True
            k = bounded_tree(rindptr, rindices, rlen, local[root], r_m, work, targets)
            targets[tg] = False
            t_dij += time.perf_counter() - t0
            # keep only the part of the tree on the partition's sources' paths to the root
            order = work.order[:k]
            pos[order] = 0
            ends = np.unique(src_local[near[u] & (pos[src_local] == 0)])
            pos[order] = -1
            keep = path_nodes(work, ends, mark)
            if keep.size == 0:
                continue
            pos[keep] = np.arange(keep.size)
            parent = np.full(keep.size, -1, dtype=np.int64)
            fent = np.full(keep.size, -1, dtype=np.int64)
            parent[1:] = pos[work.pred_node[keep[1:]]]
            fent[1:] = rent[work.pred_entry[keep[1:]]]
            sp = np.where(near[u], pos[src_local], -1)
            dtree = work.dist[keep]
            dist[sp >= 0, u] = dtree[sp[sp >= 0]]  # column u: this chunk's alone
            trees[u] = (parent, fent, dtree, sp)
            pos[keep] = -1
        work.reset()
        return t_dij

    t_dij = sum(_each_chunk(grow, chunks, net.tree_threads))
    # the gravity split per source over all destinations (rows of net.d_node)
    root_of = np.full(net.d_node.size, -1, dtype=np.int64)
    if roots.size:
        hit = d_live & np.isin(net.d_node, roots)
        root_of[hit] = np.searchsorted(roots, net.d_node[hit])
    q_root = np.zeros((m, roots.size))
    for j in range(m):
        dd = np.full(net.d_node.size, np.inf)
        has = root_of >= 0
        dd[has] = dist[j, root_of[has]]
        split = _gravity(part, net, dd, j, out)
        if split is None:
            continue
        q, reach, _ = split
        out["delivered"][j] = q[reach].sum()
        np.add.at(q_root[j], root_of[reach], q[reach])
    # per tree: flows, volume-distance and deficit sums
    grades, grade_idx = np.unique(part.aki, return_inverse=True)
    cand_ok = cand[None, :] > part.aki[:, None]
    acc = np.zeros((len(_ACC_FIELDS), nnz))
    bits = np.zeros((nnz, max(1, -(-m // 64))), dtype=np.uint64)
    req = np.ascontiguousarray(net.requirement()[ents])
    ent_len = net.length_m[ents]

    def add_trees(chunk: np.ndarray, c: int) -> tuple[np.ndarray, np.ndarray, dict]:
        """Sums of one chunk's trees. Edge sums: the first chunk adds into the partition's
        arrays, every other chunk into arrays of its own (added below, in chunk order). Each
        source's sums: kept per tree, and added below in root order, as one chunk would."""
        sums, sum_bits = (acc, bits) if c == 0 else (np.zeros_like(acc), np.zeros_like(bits))
        sum_out = {k: np.zeros_like(out[k]) for k in _TREE_SUM_OUTPUTS}
        per_tree = {}
        for u in chunk.tolist():
            if trees[u] is None:
                continue
            parent, fent, dtree, sp = trees[u]
            use = (sp >= 0) & (q_root[:, u] > 0)
            if not use.any():
                continue
            rows = np.flatnonzero(use)
            root_tree_sums(
                parent,
                fent,
                dtree,
                sp[rows],
                q_root[rows, u],
                grade_idx[rows].astype(np.int64),
                rows.astype(np.int64),
                cand_ok,
                ent_len,
                req,
                grades.astype(float),
                cand.astype(float),
                r_m,
                sums,
                sum_bits,
                sum_out,
            )
            # each source is added once per tree: these are that tree's terms, exactly
            per_tree[u] = (rows, {k: sum_out[k][rows].copy() for k in _TREE_SUM_OUTPUTS})
            for k in _TREE_SUM_OUTPUTS:
                sum_out[k][rows] = 0.0
        return sums, sum_bits, per_tree

    chunk_sums = _each_chunk(
        lambda cc: add_trees(*cc), [(ch, c) for c, ch in enumerate(chunks)], net.tree_threads
    )
    terms = {}
    for c, (sums, sum_bits, per_tree) in enumerate(chunk_sums):
        if c > 0:
            acc += sums
            bits |= sum_bits
        terms.update(per_tree)
    for u in sorted(terms):  # root order, whatever the chunks
        rows, vals = terms[u]
        for k in _TREE_SUM_OUTPUTS:
            out[k][rows] += vals[k]
    acc[6] = np.bitwise_count(bits).sum(axis=1)
    out["vd_deficit_cand"][~cand_ok] = np.nan
    used = np.flatnonzero(acc[6] > 0)
    out["entries"] = ents[used]
    out["acc"] = acc[:, used]
    out["dijkstra_s"] = t_dij
    return out


def _partition_by_source(part: _SourceBatch, net: _Network) -> dict[str, Any]:
    """Routes one partition of sources on its subgraph and prices their trees (steps 1–7 of
    the module docstring). Per source: the station results; per local entry: the sums over
    the partition's sources, in source order (each tree uses an entry at most once)."""
    params = net.params
    r_m = params.tank_range_km * _M_PER_KM
    r_km = params.tank_range_km
    dilution = params.refill_dilution
    adj, nodes, ents, local = _cut(net, part.node)
    k_all = nodes.size
    nnz = ents.size
    src_local = local[part.node]
    d_local = local[net.d_node]
    d_in = d_local >= 0
    d_xy = net.node_xy[net.d_node]
    ent_len = net.length_m[ents]
    req_clean = np.ascontiguousarray(net.requirement()[ents])
    loc = np.ascontiguousarray(net.local_aki[ents], dtype=float)
    cand = net.candidate_aki
    m = part.rows.size
    out = _partition_outputs(m, cand.size, k_all)
    acc = np.zeros((nnz, len(_ACC_FIELDS)))  # a row per entry (transposed at the end)
    work = TreeWork(k_all)
    # A tree may stop once every destination that could lie within the range is settled:
    # the flows use only the paths to them. Those within straight-line reach R(1 + margin)
    # of the source are inside every cut, so the stopping point is the same on any cut.
    targets = np.zeros(k_all, dtype=bool)
    reach_m = r_m * (1.0 + CUT_MARGIN_SHARE)
    d_live = d_in & (net.d_weight > 0)
    indptr, indices = compact_csr(adj.indptr, adj.indices)
    t_dij = 0.0
    for j in range(m):
        t0 = time.perf_counter()
        near = d_live & (np.hypot(*(d_xy - net.node_xy[part.node[j]]).T) <= reach_m)
        targets[d_local[near]] = True
        k = bounded_tree(indptr, indices, ent_len, src_local[j], r_m, work, targets)
        targets[d_local[near]] = False
        t_dij += time.perf_counter() - t0
        d = work.dist
        dd = np.full(d_local.size, np.inf)
        dd[d_in] = d[d_local[d_in]]
        out["nodes_reached"][j] = k
        split = _gravity(part, net, dd, j, out)
        if split is None:
            continue
        q, reach, _ = split
        # demand at the destination nodes (in destination order), subtree sums, prices
        (
            out["delivered"][j],
            out["export_risk"][j],
            out["vd_total"][j],
            out["vd_deficit"][j],
        ) = source_tree_sums(
            work,
            d_local[reach],
            q[reach],
            ent_len,
            req_clean,
            loc,
            part.aki[j],
            cand,
            r_m,
            r_km,
            dilution,
            acc,
            out["vd_deficit_cand"][j],
        )
    work.reset()
    used = np.flatnonzero(acc[:, 6] > 0)
    out["entries"] = ents[used]
    out["acc"] = np.ascontiguousarray(acc[used].T)
    out["dijkstra_s"] = t_dij
    return out


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
        "edge",
        "u",
        "v",
        "direction",
        "flow_l_per_month",
        "flow_forward_l_per_month",
        "flow_reverse_l_per_month",
        "deficit_aki",
        "required_aki",
        "risk_l_aki_per_month",
        "sources_count",
        "length_m",
        "road_class",
    ]
    if ed.empty:
        return gpd.GeoDataFrame({c: [] for c in cols}, geometry=[], crs=graph.crs)
    fwd = ed["direction"].to_numpy() == "forward"
    e = ed["edge"].to_numpy()
    flow = ed["flow_l_per_month"].to_numpy()
    g = (
        pd.DataFrame(
            {
                "edge": e,
                "flow_f": np.where(fwd, flow, 0.0),
                "flow_r": np.where(fwd, 0.0, flow),
                "vd": ed["volume_distance_l_km_per_month"].to_numpy(),
                "vddef": ed["volume_distance_l_km_per_month"].to_numpy()
                * ed["deficit_aki"].to_numpy(),
                "req": ed["required_aki"].to_numpy(),
                "risk": ed["risk_l_aki_per_month"].to_numpy(),
                "count": ed["sources_count"].to_numpy(),
            }
        )
        .groupby("edge", sort=True)
        .agg(
            flow_f=("flow_f", "sum"),
            flow_r=("flow_r", "sum"),
            vd=("vd", "sum"),
            vddef=("vddef", "sum"),
            req=("req", "max"),
            risk=("risk", "sum"),
            count=("count", "sum"),
        )
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
