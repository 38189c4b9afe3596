"""From a model as the user wrote it (:class:`~scalewright.studyfile.ModelSpec`)
to matrices with free and fixed cells (:class:`~scalewright.layout.Layout`).

Identification and scaling (stated in the report through ``Layout.notes``):

* ``unit-variance`` (default): every latent variable that no other latent
  variable explains has variance 1; a first-order construct under a
  higher-order factor has disturbance variance 1; all loadings are free.
* ``marker``: the first item listed under each construct has loading 1 (the
  first construct under a higher-order factor has path 1; the first item has
  general-factor loading 1) and the latent variances are free.

Covariances: correlated constructs covary freely; first-order constructs
under a higher-order factor have uncorrelated disturbances; a bifactor
general factor is orthogonal to the specific factors and these to each
other (Reise 2012).  Start values come from the sample correlations
(one-step principal-axis loadings per construct), so Fisher scoring starts
close to the solution.

References
----------
Reise, S. P. (2012). The rediscovery of bifactor measurement models.
Multivariate Behavioral Research 47, 667–696.
Bollen, K. A. (1989). Structural Equations with Latent Variables. Wiley, ch. 7
(identification and scaling of latent variables).
Harman, H. H. (1976). Modern Factor Analysis (3rd ed.). University of Chicago Press.
"""

from __future__ import annotations

import math

import numpy as np

from scalewright.errors import StudyError
from scalewright.layout import (CONSTRUCT, FACTOR_COV, GENERAL, HIGHER, LOADING, PATH,
                                RESIDUAL_COV, Cells, Layout, Matrices, Param, Pattern)

UNIT_VARIANCE, MARKER = "unit-variance", "marker"


def build_layout(spec, sample_cov: np.ndarray, *, plain_start: bool = False) -> Layout:
    """Build the layout of one model for one group, with start values from
    ``sample_cov`` (the covariance of ``spec.items`` in that order).

    With ``plain_start`` the start values skip the principal-axis step and
    take one standardized loading for every item (:func:`_plain_start`):
    for a refit whose start values come from a related model's estimate
    (:meth:`~scalewright.estimate.result.Estimate.start_for`), which replaces
    every parameter the two share, the principal-axis step (a matrix
    inverse and eigendecomposition per construct) would be thrown away."""
    _check_structure(spec)
    items = tuple(spec.items)
    constructs = tuple(spec.constructs)
    highers = tuple(spec.higher_order)
    factors = constructs + highers + ((spec.general,) if spec.general else ())
    kinds = (CONSTRUCT,) * len(constructs) + (HIGHER,) * len(highers) + \
        ((GENERAL,) if spec.general else ())
    col = {f: j for j, f in enumerate(factors)}
    row = {item: i for i, item in enumerate(items)}
    p, m = len(items), len(factors)
    marker = spec.identification == MARKER

    params: list[Param] = []
    start: list[float] = []
    lam_cells, path_cells, psi_cells, theta_cells = [], [], [], []
    fixed_lam = np.zeros((p, m))
    fixed_paths = np.zeros((m, m))
    fixed_psi = np.zeros((m, m))

    std = _plain_start(spec, items) if plain_start else \
        _standardized_start(spec, items, sample_cov)
    sd = np.sqrt(np.diag(sample_cov)).tolist()     # Python floats: the loops below are per cell

    def new_param(param: Param, value: float) -> int:
        params.append(param)
        start.append(float(value))
        return len(params) - 1

    # latent variances implied by the start values under the chosen scaling
    higher_of = {c: h for h, cs in spec.higher_order.items() for c in cs}
    variance = {}
    for f in factors:
        if marker:
            ref = _marker_item(spec, f)
            if ref is not None:   # a higher-order factor is scaled below, through its first construct
                marker_loading = max(abs(std.loading[(f, ref)]), 0.2)   # keep a weak marker's scale finite
                variance[f] = (marker_loading * sd[row[ref]]) ** 2
        else:
            variance[f] = 1.0
    for h, cs in spec.higher_order.items():
        for c in cs:
            g = std.higher[(h, c)]
            if not marker:
                variance[c] = 1.0 / (1.0 - g * g)
        if marker:
            first = cs[0]
            variance[h] = (std.higher[(h, first)] ** 2) * variance[first]

    # loadings
    for (f, item), value in std.loading.items():
        i, j = row[item], col[f]
        raw = value * sd[i] / math.sqrt(variance[f])
        if marker and _marker_item(spec, f) == item:
            fixed_lam[i, j] = 1.0
            continue
        lam_cells.append((i, j, new_param(Param(LOADING, f, item), raw)))
    # higher-order paths B[c, h]
    for h, cs in spec.higher_order.items():
        for k, c in enumerate(cs):
            raw = std.higher[(h, c)] * math.sqrt(variance[c] / variance[h])
            if marker and k == 0:
                fixed_paths[col[c], col[h]] = 1.0
                continue
            path_cells.append((col[c], col[h], new_param(Param(PATH, h, c), raw)))
    # latent variances and covariances (Ψ)
    exogenous = [f for f in factors if f not in higher_of]
    for f in factors:
        j = col[f]
        if f in higher_of:
            g = std.higher[(higher_of[f], f)]
            disturbance = variance[f] * (1.0 - g * g)
            if marker:
                psi_cells.append((j, j, new_param(Param(FACTOR_COV, f, f), disturbance)))
            else:
                fixed_psi[j, j] = 1.0
        elif marker:
            psi_cells.append((j, j, new_param(Param(FACTOR_COV, f, f), variance[f])))
        else:
            fixed_psi[j, j] = 1.0
    if not spec.general:
        for x in range(len(exogenous)):
            for y in range(x):
                a, b = exogenous[x], exogenous[y]
                r = std.correlation.get((a, b), std.correlation.get((b, a), 0.0))
                cov = r * math.sqrt(variance[a] * variance[b])
                psi_cells.append((col[a], col[b], new_param(Param(FACTOR_COV, b, a), cov)))
    # residual variances and covariances (Θ)
    theta0 = (std.residual * np.square(sd)).tolist()
    for i, item in enumerate(items):
        theta_cells.append((i, i, new_param(Param(RESIDUAL_COV, item, item), theta0[i])))
    for a, b in spec.residual_covariances:
        i, k = sorted((row[a], row[b]), reverse=True)
        theta_cells.append((i, k, new_param(Param(RESIDUAL_COV, items[k], items[i]), 0.0)))

    fixed = Matrices(fixed_lam, fixed_paths, fixed_psi, np.zeros((p, p)), np.zeros(p), np.zeros(m))
    empty = Cells.from_triples([])
    pattern = Pattern(fixed, Cells.from_triples(lam_cells), Cells.from_triples(path_cells),
                      Cells.from_triples(psi_cells), Cells.from_triples(theta_cells), empty, empty)
    layout = Layout(name=spec.name, items=items, factors=factors, kinds=kinds,
                    primary={item: c for c, its in spec.constructs.items() for item in its},
                    patterns=(pattern,), params=tuple(params), start=np.array(start),
                    notes=_identification_notes(spec))
    _check_degrees_of_freedom(spec, layout)
    return layout


class _StandardizedStart:
    """Start values on the standardized scale."""

    def __init__(self):
        self.loading: dict = {}      # (factor, item) -> standardized loading
        self.higher: dict = {}       # (higher, construct) -> standardized path
        self.correlation: dict = {}  # (factor, factor) -> correlation
        self.residual = None         # standardized residual variance per item


def _standardized_start(spec, items, cov) -> _StandardizedStart:
    sd = np.sqrt(np.diag(cov))
    corr = cov / np.outer(sd, sd)
    row = {item: i for i, item in enumerate(items)}
    out = _StandardizedStart()
    communality = np.zeros(len(items))
    marker = spec.identification == MARKER
    construct_rows = [[row[i] for i in its] for its in spec.constructs.values()]
    loadings = _loadings_of_item_sets(corr, construct_rows, positive_first=marker)
    for (c, its), idx, lam in zip(spec.constructs.items(), construct_rows, loadings):
        if spec.general:
            lam = lam * 0.5
        for item, value in zip(its, lam):
            out.loading[(c, item)] = value
        communality[idx] += lam ** 2
    for c, its in spec.cross_loadings.items():
        for item in its:
            out.loading[(c, item)] = 0.0
    if spec.general:
        lam = _one_factor_loadings(corr, positive_first=marker) * 0.85
        for item, value in zip(items, lam):
            out.loading[(spec.general, item)] = value
        communality += lam ** 2
    out.residual = np.clip(1.0 - communality, 0.1, 0.95)
    # construct correlations: average of r_ij / (λ_i λ_j) over the two constructs' items,
    # for all pairs at once as Mᵀ (R ∘ (1/λλᵀ)) M / (n_a n_b), M the item-construct incidence
    names = list(spec.constructs)
    listed = [(c, row[i], out.loading[(c, i)]) for c in names for i in spec.constructs[c]]
    index = np.array([r for _, r, _ in listed])
    lam = np.array([value for _, _, value in listed])
    incidence = np.zeros((len(listed), len(names)))
    incidence[np.arange(len(listed)), [names.index(c) for c, _, _ in listed]] = 1.0
    scaled = corr[np.ix_(index, index)] / np.outer(lam, lam)
    counts = incidence.sum(axis=0)
    mean_ratio = incidence.T @ scaled @ incidence / np.outer(counts, counts)
    clipped = np.clip(mean_ratio, -0.9, 0.9).tolist()
    for x in range(len(names)):
        for y in range(x):
            out.correlation[(names[x], names[y])] = clipped[x][y]
    _shrink_to_positive_definite(out, names)
    for h, cs in spec.higher_order.items():
        # paths: one-factor loadings of the constructs' correlation matrix
        phi = np.eye(len(cs))
        for x in range(len(cs)):
            for y in range(x):
                r = out.correlation.get((cs[x], cs[y]), out.correlation.get((cs[y], cs[x]), 0.0))
                phi[x, y] = phi[y, x] = r
        gamma = _one_factor_loadings(phi, positive_first=marker)
        gamma = np.sign(gamma + 1e-12) * np.clip(np.abs(gamma), 0.3, 0.9)
        for c, g in zip(cs, gamma):
            out.higher[(h, c)] = float(g)
    return out


def _plain_start(spec, items) -> _StandardizedStart:
    """Start values that read nothing from the data: standardized loading .6
    on the item's constructs (.4 and .5 under a general factor), construct
    correlations 0 (positive definite by construction), higher-order paths
    .6.  Used when a warm start replaces them (:func:`build_layout`)."""
    out = _StandardizedStart()
    primary = 0.4 if spec.general else 0.6
    communality = np.zeros(len(items))
    row = {item: i for i, item in enumerate(items)}
    for c, its in spec.constructs.items():
        for item in its:
            out.loading[(c, item)] = primary
            communality[row[item]] += primary ** 2
    for c, its in spec.cross_loadings.items():
        for item in its:
            out.loading[(c, item)] = 0.0
    if spec.general:
        for item in items:
            out.loading[(spec.general, item)] = 0.5
        communality += 0.25
    out.residual = np.clip(1.0 - communality, 0.1, 0.95)
    for h, cs in spec.higher_order.items():
        for c in cs:
            out.higher[(h, c)] = 0.6
    return out


def _one_factor_loadings(r: np.ndarray, positive_first: bool = False) -> np.ndarray:
    """One-step principal-axis loadings: first eigenpair of ``R`` with squared
    multiple correlations on the diagonal (Harman 1976, ch. 8).

    The sign is chosen so that most loadings are positive, or, with
    ``positive_first`` (marker scaling, where the first loading is fixed at
    +1), so that the first one is."""
    k = r.shape[0]
    if k == 1:
        return np.array([0.7])
    if k == 2:
        v = np.sqrt(min(abs(r[0, 1]), 0.9))
        return np.array([v, v * np.sign(r[0, 1]) if r[0, 1] != 0 else v])
    return _principal_axis(r[None], positive_first)[0]


def _loadings_of_item_sets(corr: np.ndarray, item_sets: list[list[int]],
                           positive_first: bool) -> list[np.ndarray]:
    """:func:`_one_factor_loadings` of each item set's correlation matrix; sets
    of equal size (three items or more) go through one batched call."""
    out: list = [None] * len(item_sets)
    by_size: dict[int, list[int]] = {}
    for n, idx in enumerate(item_sets):
        by_size.setdefault(len(idx), []).append(n)
    for size, members in by_size.items():
        if size < 3:
            for n in members:
                out[n] = _one_factor_loadings(corr[np.ix_(item_sets[n], item_sets[n])],
                                              positive_first)
            continue
        idx = np.array([item_sets[n] for n in members])
        for n, lam in zip(members, _principal_axis(corr[idx[:, :, None], idx[:, None, :]],
                                                   positive_first)):
            out[n] = lam
    return out


def _principal_axis(r: np.ndarray, positive_first: bool) -> np.ndarray:
    """The principal-axis step of :func:`_one_factor_loadings` for a stack of
    correlation matrices (``g × k × k``, ``k ≥ 3``)."""
    try:
        smc = 1.0 - 1.0 / np.diagonal(np.linalg.inv(r), axis1=1, axis2=2)
    except np.linalg.LinAlgError:       # some matrix singular: each on its own
        if len(r) > 1:
            return np.stack([_principal_axis(one[None], positive_first)[0] for one in r])
        smc = np.full(r.shape[:2], 0.5)
    reduced = r.copy()
    diagonal = np.arange(r.shape[1])
    reduced[:, diagonal, diagonal] = np.clip(smc, 0.05, 0.95)
    values, vectors = np.linalg.eigh(reduced)
    lam = vectors[:, :, -1] * np.sqrt(np.maximum(values[:, -1], 1e-3))[:, None]
    sign = lam[:, 0] if positive_first else lam.sum(axis=1)
    lam[sign < 0] *= -1.0
    return np.clip(lam, -0.95, 0.95)


def _shrink_to_positive_definite(out: _StandardizedStart, names) -> None:
    k = len(names)
    if k < 2:
        return
    phi = np.eye(k)
    for x in range(k):
        for y in range(x):
            phi[x, y] = phi[y, x] = out.correlation[(names[x], names[y])]
    shrink = 1.0
    while np.linalg.eigvalsh(phi * shrink + np.eye(k) * (1 - shrink))[0] < 0.05 and shrink > 0:
        shrink -= 0.1
    for key in out.correlation:
        out.correlation[key] *= max(shrink, 0.0)


def _marker_item(spec, factor):
    if factor in spec.constructs:
        return spec.constructs[factor][0]
    if factor == spec.general:
        return spec.items[0]
    return None


def _identification_notes(spec) -> tuple[str, ...]:
    if spec.identification == MARKER:
        notes = ["Each construct is scaled by its first item (loading fixed at 1); "
                 "latent variances are estimated."]
        if spec.higher_order:
            notes.append("Each higher-order factor is scaled by its path to the first "
                         "construct it explains (fixed at 1).")
    else:
        notes = ["Each construct's variance is fixed at 1, so every loading is estimated."]
        if spec.higher_order:
            notes.append("Constructs under a higher-order factor have their disturbance "
                         "variance fixed at 1; the higher-order factor's variance is 1.")
    if spec.general:
        notes.append(f"The general factor '{spec.general}' is uncorrelated with the specific "
                     "factors, and the specific factors with each other (bifactor).")
    if spec.residual_covariances:
        n = len(spec.residual_covariances)
        notes.append(f"{n} residual covariance{' is' if n == 1 else 's are'} estimated.")
    return tuple(notes)


def _check_structure(spec) -> None:
    """Structures that cannot be identified as declared."""
    place = spec.place
    if spec.general and spec.higher_order:
        raise StudyError(
            f"{place}: model '{spec.name}' declares both a general factor "
            f"('{spec.general}') and a higher-order factor. Use one of the two: a bifactor "
            "model (general:) or a higher-order model (higher_order:).")
    for h, cs in spec.higher_order.items():
        if len(cs) < 3:
            raise StudyError(
                f"{place}: the higher-order factor '{h}' in model '{spec.name}' explains "
                f"{len(cs)} construct{'s' * (len(cs) != 1)} ({', '.join(cs)}); with fewer than three its paths "
                "cannot be identified (the constructs' one correlation cannot determine two "
                "paths). Let it explain at least three constructs, or keep the constructs "
                "correlated without a higher-order factor.")
    if spec.general:
        for c, its in spec.constructs.items():
            if len(its) < 2:
                raise StudyError(
                    f"{place}: in the bifactor model '{spec.name}' the specific factor '{c}' "
                    "has fewer than two items; give it at least two items (three are safer) "
                    "or leave its items to the general factor alone.")
        if len(spec.constructs) < 2:
            raise StudyError(
                f"{place}: the bifactor model '{spec.name}' has one specific factor; a "
                "general factor plus a single specific factor is not identified. Declare at "
                "least two (better three) specific factors.")


def _check_degrees_of_freedom(spec, layout: Layout) -> None:
    if layout.df() < 0:
        raise StudyError(
            f"{spec.place}: model '{spec.name}' has {layout.n_params} free parameters but "
            f"its {layout.p} items give only {layout.n_moments()} variances and covariances, "
            "so it cannot be estimated. Remove residual covariances or cross-loadings, or "
            "add items.")
