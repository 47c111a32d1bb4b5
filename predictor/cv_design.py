"""The fold design: which wells are held out together, chosen so that the cross-validation's
prediction situation matches the map's.

A CV estimates the map's error only when a held-out well is about as far from its training
wells as a map node is from its nearest well.  Both are measured by nearest-neighbour distances:

- ``G_map``: each prediction location (the map's valid nodes, subsampled; a volume's live
  traces) to its nearest well;
- ``G_cv``: each held-out well to its nearest *training* well in its fold;

and compared by the Wasserstein-1 distance W between their empirical distributions.

Designs (each a :class:`FoldDesign`: a list of (train, test) row indices, whole wells only):

- ``matched``: kNNDM (Linnenbrink, Milà, Ludwig & Meyer 2024, Geoscientific Model Development
  17:5897-5912).  When a one-sided KS test does not find the wells closer to each other than
  the map is to them, random k-fold is the matched design; otherwise the wells' positions are
  clustered (Ward) for a log-spaced range of cluster counts, clusters are dealt into k folds,
  and the configuration with the smallest W is kept.
- ``nndm``: NNDM leave-one-out (Milà, Mateu, Pebesma & Meyer 2022, Methods in Ecology and
  Evolution 13:1304-1316), for small well sets.
- ``blocks``: square blocks a variogram range wide (see :mod:`predictor.spatial_cv`).
- ``buffered``: leave one well out with an exclusion buffer.
- ``random``: shuffled k-fold, for contrast.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike
from scipy.cluster.hierarchy import fcluster, linkage
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist
from scipy.stats import ks_2samp, wasserstein_distance
from sklearn.model_selection import KFold

from .errors import ModelError
from .kriging import OrdinaryKriging
from .options import DesignName, allowed
from .spatial_cv import BlockKFold, BufferedLeaveOneOut
from .variogram import VariogramModel

DESIGNS: tuple[str, ...] = allowed(DesignName)
MAP_SAMPLE = 5000  # prediction locations kept for the distance distribution


@dataclass
class FoldDesign:
    """One fold design over the rows of a target's training table.

    ``splits`` are (train rows, test rows) pairs; every row is tested exactly once.
    ``distances`` holds, per row, the distance from its well to the nearest training well of
    its fold (``G_cv``); ``w`` the Wasserstein-1 distance of those to the map's.
    """

    name: str
    splits: list[tuple[np.ndarray, np.ndarray]]
    distances: np.ndarray
    w: float
    description: str
    details: dict = field(default_factory=dict)

    @property
    def n_splits(self) -> int:
        return len(self.splits)

    def fold_of(self, n: int) -> np.ndarray:
        """The fold (test set number) of every row."""
        out = np.full(n, -1)
        for k, (_, test) in enumerate(self.splits):
            out[test] = k
        return out

    def split(
        self,
        X: ArrayLike | None = None,
        y: ArrayLike | None = None,
        groups: ArrayLike | None = None,
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Scikit-learn style iteration over the (train, test) pairs."""
        yield from self.splits

    def get_n_splits(
        self,
        X: ArrayLike | None = None,
        y: ArrayLike | None = None,
        groups: ArrayLike | None = None,
    ) -> int:
        return self.n_splits

    def summary(self) -> dict:
        return {
            "design": self.name,
            "w": round(float(self.w), 3),
            "folds": self.n_splits,
            "median_cv_distance": round(float(np.median(self.distances)), 1),
            "description": self.description,
            **self.details,
        }


def sample_locations(n: int, seed: int = 0, size: int = MAP_SAMPLE) -> np.ndarray:
    """Indices of a seeded sample of ``n`` prediction locations: enough for their distance and
    attribute distributions, small enough to be cheap."""
    if n == 0:
        raise ModelError(
            "the grid has no valid node to predict (every node lacks an attribute value); check the"
            " grid's attribute columns"
        )
    return (
        np.sort(np.random.default_rng(seed).choice(n, size, replace=False))
        if n > size
        else np.arange(n)
    )


def map_distances(map_xy: np.ndarray, wells_xy: np.ndarray) -> np.ndarray:
    """Distance from each prediction location to its nearest well."""
    map_xy = np.asarray(map_xy, float)
    if len(map_xy) == 0:
        raise ModelError(
            "the grid has no valid node to predict; check that the attribute is not all missing"
        )
    return cKDTree(wells_xy).query(map_xy)[0]


def unit_heads(xy: np.ndarray, units: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean position of each well (unit) and, per row, the index of its well in that array."""
    codes = np.unique(np.asarray(units), return_inverse=True)[1]
    counts = np.bincount(codes)
    return np.column_stack([np.bincount(codes, xy[:, i]) / counts for i in (0, 1)]), codes


def _cv_distances(xy: np.ndarray, folds: np.ndarray) -> np.ndarray:
    """Each well's distance to the nearest well outside its own fold."""
    out = np.empty(len(xy))
    for k in np.unique(folds):
        inside = folds == k
        out[inside] = cKDTree(xy[~inside]).query(xy[inside])[0]
    return out


def _deal(xy: np.ndarray, clusters: np.ndarray, k: int) -> np.ndarray:
    """Folds from clusters: big clusters (>= n/k wells) become folds of their own, the others are
    dealt round-robin in the order of their centroids along the wells' first principal axis."""
    n = len(xy)
    _, of, sizes = np.unique(
        clusters, return_inverse=True, return_counts=True
    )  # of: each well's cluster
    fold_of = np.full(sizes.size, -1)
    big = np.flatnonzero(sizes >= n / k)[:k]
    fold_of[big] = np.arange(big.size)
    rest = np.flatnonzero(fold_of < 0)
    if rest.size:  # per-cluster sums by bincount: thousands of wells and clusters stay fast
        centred = xy - xy.mean(axis=0)
        axis = np.linalg.svd(centred, full_matrices=False)[2][0]
        centroids = (
            np.column_stack([np.bincount(of, centred[:, i], sizes.size) for i in (0, 1)])
            / sizes[:, None]
        )
        order = rest[np.argsort(centroids[rest] @ axis, kind="stable")]
        fold_of[order] = (big.size + np.arange(order.size)) % k
    return fold_of[of]


def knndm_folds(
    xy: np.ndarray, g_map: np.ndarray, k: int, seed: int = 0, n_configs: int = 60
) -> tuple[np.ndarray, dict]:
    """kNNDM fold labels of the wells at ``xy`` (one row per well) for the map distances
    ``g_map``."""
    n = len(xy)
    g_ww = cKDTree(xy).query(xy, k=2)[0][:, 1]
    random = KFold(k, shuffle=True, random_state=seed)
    random_folds = np.empty(n, int)
    for f, (_, test) in enumerate(random.split(xy)):
        random_folds[test] = f
    p_value = float(ks_2samp(g_ww, g_map, alternative="greater", method="asymp").pvalue)
    info = {"ks_p_value_wells_closer": round(p_value, 4)}
    if p_value >= 0.05:
        # kNNDM's first step: random k-fold is the matched design
        info["configuration"] = (
            "random k-fold (the wells are not closer to each other than the map is to them)"
        )
        return random_folds, info
    tree = linkage(xy, method="ward")
    best = (
        wasserstein_distance(_cv_distances(xy, random_folds), g_map),
        random_folds,
        "random k-fold",
    )
    for q in np.unique(np.round(np.geomspace(k, max(k, n - 2), n_configs)).astype(int)):
        folds = _deal(xy, fcluster(tree, q, criterion="maxclust"), k)
        counts = np.bincount(folds, minlength=k)
        if counts.min() == 0 or counts.max() > n / 2:
            continue
        w = wasserstein_distance(_cv_distances(xy, folds), g_map)
        if w < best[0] - 1e-12:
            best = (w, folds, f"{q} Ward clusters dealt into {k} folds")
    info["configuration"] = best[2]
    return best[1], info


def nndm_splits(
    xy: np.ndarray, g_map: np.ndarray, min_train: float = 0.5
) -> list[tuple[np.ndarray, np.ndarray]]:
    """NNDM leave-one-out over the wells at ``xy``: (train, test) index pairs, one per well.

    Distances r are scanned upward; while the CV's nearest-training-distance CDF lies above the
    map's at r and the well's training set keeps more than ``min_train`` of the wells, the
    well's nearest training neighbour is dropped from its training set.
    """
    n = len(xy)
    d = cdist(xy, xy)
    np.fill_diagonal(d, np.inf)
    g_map = np.sort(g_map)
    g = d.min(axis=1)
    kept = np.full(n, n - 1)
    r_max = g_map[-1]
    last = (-np.inf, -1)
    while True:
        later = (g > last[0]) | ((g == last[0]) & (np.arange(n) > last[1]))
        if not later.any():
            break
        order = np.lexsort((np.arange(n)[later], g[later]))
        j = int(np.flatnonzero(later)[order[0]])
        r = g[j]
        if r > r_max or not np.isfinite(r):
            break
        f_cv = np.mean(g <= r)
        f_map = np.searchsorted(g_map, r, side="right") / len(g_map)
        drop = np.flatnonzero(d[j] == r)
        if f_cv > f_map and kept[j] - drop.size > min_train * n:
            d[j, drop] = np.inf
            kept[j] -= drop.size
            g[j] = d[j].min()
            continue  # look again at the same position in the scan: g[j] moved up
        last = (r, j)
    everyone = np.arange(n)
    return [(everyone[np.isfinite(d[j]) & (everyone != j)], np.array([j])) for j in range(n)]


def _rows(units: np.ndarray, unit_splits) -> list[tuple[np.ndarray, np.ndarray]]:
    """Unit-level (well) splits as row-level (sample) splits."""
    out = []
    for train, test in unit_splits:
        out.append((np.flatnonzero(np.isin(units, train)), np.flatnonzero(np.isin(units, test))))
    return out


def _unit_distances(heads: np.ndarray, unit_splits) -> np.ndarray:
    out = np.empty(len(heads))
    for train, test in unit_splits:
        out[test] = cKDTree(heads[train]).query(heads[test])[0]
    return out


def design_folds(
    name: str,
    heads: np.ndarray,
    units: np.ndarray,
    g_map: np.ndarray,
    n_splits: int,
    block_size: float,
    block_angle: float = 0.0,
    seed: int = 0,
) -> FoldDesign:
    """The fold design ``name`` over the rows whose wells are ``units`` (row -> well index)
    and whose wells sit at ``heads`` (one row per well)."""
    n = len(heads)
    if n < n_splits:
        raise ModelError(
            f"{n} wells cannot fill {n_splits} CV folds; use fewer folds (--folds) or add wells"
        )
    details: dict = {}
    if name == "matched":
        folds, details = knndm_folds(heads, g_map, n_splits, seed)
        unit_splits = [
            (np.flatnonzero(folds != k), np.flatnonzero(folds == k)) for k in range(n_splits)
        ]
        text = (
            f"{n_splits} folds matched to the map's prediction distances (kNNDM):"
            f" {details['configuration']}"
        )
    elif name == "nndm":
        unit_splits = nndm_splits(heads, g_map)
        text = (
            "leave-one-well-out with neighbours dropped to match the map's prediction distances"
            " (NNDM)"
        )
    elif name == "random":
        unit_splits = list(KFold(n_splits, shuffle=True, random_state=seed).split(heads))
        text = f"{n_splits}-fold random CV (for contrast: nearby wells are alike)"
    elif name == "blocks":
        unit_splits = list(
            BlockKFold(block_size, n_splits, block_angle, coordinates=heads).split(heads)
        )
        text = f"{n_splits}-fold CV over {block_size:.0f} m blocks"
    elif name == "buffered":
        unit_splits = list(BufferedLeaveOneOut(block_size, coordinates=heads).split(heads))
        text = f"leave-one-well-out with a {block_size:.0f} m exclusion buffer"
    else:
        raise ModelError(f"unknown CV design {name!r}; choose one of {', '.join(DESIGNS)}")
    unit_splits = [(np.asarray(tr, int), np.asarray(te, int)) for tr, te in unit_splits]
    g_cv = _unit_distances(heads, unit_splits)
    w = float(wasserstein_distance(g_cv, g_map))
    return FoldDesign(name, _rows(units, unit_splits), g_cv[units], w, text, details)


CDF_LEVELS = np.linspace(0.0, 1.0, 41)


def distance_summary(g_map: np.ndarray, designs: dict[str, FoldDesign], chosen: str) -> dict:
    """What the card records: the map's distances, W and the median CV distance per design, and
    quantiles of every distance distribution (for the CDF figure)."""

    def quantiles(values: ArrayLike):
        return np.round(np.quantile(values, CDF_LEVELS), 1).tolist()

    return {
        "chosen": chosen,
        "map_median_distance": round(float(np.median(g_map)), 1),
        "map_q90_distance": round(float(np.quantile(g_map, 0.9)), 1),
        "designs": {k: d.summary() for k, d in designs.items()},
        "cdf": {
            "levels": np.round(CDF_LEVELS, 3).tolist(),
            "map": quantiles(g_map),
            **{k: quantiles(d.distances) for k, d in designs.items()},
        },
    }


def representative_weights(
    base: np.ndarray,
    margins: list[tuple[np.ndarray, np.ndarray]],
    n_bins: int = 4,
    iterations: int = 50,
) -> tuple[np.ndarray, float]:
    """Rake ``base`` weights (iterative proportional fitting) so that, for every margin
    (values at the held-out wells, the same quantity at the map's locations), the weighted
    share of wells in each of the map's quantile bins equals the map's share.

    Target-weighted CV (Brenning & Suesse 2026, arXiv:2603.29981, preprint): the held-out wells
    then stand for the map in nearest-well distance and attribute distribution.  A map bin that
    no well falls into cannot be represented; the share of the map in such bins is returned
    beside the weights.
    """
    w = np.asarray(base, float).copy()
    binned = []
    unsupported = 0.0
    for wells_values, map_values in margins:
        edges = np.unique(np.quantile(map_values, np.linspace(0, 1, n_bins + 1)[1:-1]))
        well_bin, map_bin = np.digitize(wells_values, edges), np.digitize(map_values, edges)
        share = np.bincount(map_bin, minlength=edges.size + 1) / len(map_values)
        empty = np.bincount(well_bin, minlength=edges.size + 1) == 0
        unsupported = max(unsupported, float(share[empty].sum()))
        share = np.where(empty, 0.0, share)
        binned.append((well_bin, share / share.sum()))
    for _ in range(iterations):
        for well_bin, share in binned:
            current = np.bincount(well_bin, weights=w, minlength=share.size) / w.sum()
            w *= np.divide(share, current, out=np.ones_like(share), where=current > 0)[well_bin]
    return w * len(w) / w.sum(), unsupported


def kriging_variance_ratio(
    variogram: VariogramModel,
    heads: np.ndarray,
    head_of: np.ndarray,
    splits: list[tuple[np.ndarray, np.ndarray]],
    map_xy: np.ndarray,
    weights: np.ndarray,
) -> float:
    """How much closer to their information the map's nodes are than the held-out wells.

    The mean ordinary-kriging variance of the map's locations (from every well) divided by the
    weighted mean kriging variance of the held-out wells (each from its fold's training wells),
    both under the residual ``variogram``.  No fold design can hold a well out closer to its
    training wells than the well spacing, while on dense regular drilling every map node lies
    within a spacing of a well, and each fold trains on fewer wells than the map: the ratio says
    by how much the CV's squared error overstates the map's there (1 when they match; the
    kriging variance as the error's expected size given the data's positions, common practice).
    """

    def variance(train: np.ndarray, at: np.ndarray) -> np.ndarray:
        points = heads[train]
        ok = OrdinaryKriging(variogram).fit(points[:, 0], points[:, 1], np.zeros(len(points)))
        return ok.predict(at[:, 0], at[:, 1], return_variance=True)[1]

    held_out = np.empty(len(head_of))
    for train_rows, test_rows in splits:
        held_out[test_rows] = variance(np.unique(head_of[train_rows]), heads[head_of[test_rows]])
    on_map = float(np.mean(variance(np.arange(len(heads)), np.asarray(map_xy, float))))
    cv = float(np.average(held_out, weights=weights))
    return on_map / cv if cv > 0 else 1.0
