"""A surrogate (emulator) of the binned theory band powers B(θ), trained on exact Boltzmann calls.

What is emulated: the vector B(θ) = Σ_ℓ W_bℓ D_ℓ^{X_b}(θ) of `BandPowerLikelihood.model` with calibration 1 and
no foregrounds, as a function of the *cosmological* inputs only. Nuisance terms (calibration, foregrounds),
priors and the likelihood stay exact; the surrogate replaces the Boltzmann call and nothing else. Its
error is measured where it matters, in units of the data's noise: with C = L Lᵀ the data covariance,

    Δχ²(θ) = | L⁻¹ (B_surr(θ) − B_exact(θ)) |²,

and a surrogate is chosen, and reports itself, by its held-out Δχ² (k-fold cross-validation over the
training set, every fold refitting the whole pipeline below).

Method
------
1. Inputs are whitened with the Laplace (or Fisher) approximation N(μ, Σ): z = K⁻¹(θ − μ), Σ = K Kᵀ
   (Cholesky), so that one unit of z is about one posterior σ along every direction.
2. Outputs are whitened by the data covariance, y = L⁻¹ B, centred on their training mean, and reduced by
   principal component analysis (SVD; Pearson 1901, Phil. Mag. 2, 559; e.g. Heitmann et al. 2006, ApJ 646,
   L1 for emulators of cosmological spectra). Components are kept, in order of variance, until the worst
   truncation residual |y − ȳ − V Vᵀ(y − ȳ)|² over the training set is below ``pca_tol`` (Δχ² units).
   Because V is orthonormal, Δχ² = |Δc|² + truncation residual: coefficient errors are σ-units directly.
3. Each PCA coefficient c_k(z) is regressed on z by one of
   * ``poly<d>`` — a full polynomial of total degree d in z, by linear least squares;
   * ``gp-<kernel>-<d>`` — a polynomial of degree d by least squares plus a Gaussian process on its
     residuals (`infer.theory.gp`: anisotropic squared-exponential ``se`` or Matérn-5/2 ``m52`` kernel,
     hyperparameters at the maximum of the marginal likelihood; Rasmussen & Williams 2006, *Gaussian
     Processes for Machine Learning*, ch. 2 and 5).
   ``method="auto"`` tries the candidates feasible for the training-set size (`AUTO_CANDIDATES`) and
   keeps the simplest whose held-out RMS Δχ² is within 5 % of the smallest.

Held-out figures (`Surrogate.held_out_error`): per held-out point Δχ²_i; ``rms_dchi2`` = sqrt(mean Δχ²_i²),
``mean_dchi2`` = mean Δχ²_i, ``worst_dchi2`` = max Δχ²_i. A surrogate is an approximation: the engine must
correct it to the exact posterior (importance weights, `infer.analysis.weights`) and show these figures.

`sobol_design` places training points: Sobol' points (Sobol' 1967, USSR Comput. Math. Math. Phys. 7, 86),
scrambled as scipy.stats.qmc.Sobol does, mapped uniformly into a ball (or box) of a few σ in the whitened
space, then clipped into the prior support.

Serialisation is to plain arrays (`Surrogate.to_arrays` / `Surrogate.from_arrays`), storable in HDF5;
nothing is pickled.
"""
from __future__ import annotations

import itertools
import math
import time
import warnings

import numpy as np
from scipy import linalg, special
from scipy.stats import qmc

from infer.theory import gp as _gp

__all__ = ["Surrogate", "sobol_design", "poly_terms", "FORMAT_VERSION"]

FORMAT_VERSION = 1


# ---------------------------------------------------------------------------
# Design
# ---------------------------------------------------------------------------


def sobol_design(n: int, mean, cov, radius_sigma: float = 4.0, lower=None, upper=None, seed: int = 0,
                 shape: str = "ball") -> np.ndarray:
    """(n, P) scrambled Sobol points within ``radius_sigma`` of ``mean`` in the metric of ``cov``.

    ``shape="ball"``: uniform in the ellipsoid (θ−μ)ᵀΣ⁻¹(θ−μ) ≤ r² — Sobol points in P+1 dimensions, the
    first P pushed through the normal quantile function and normalised to a direction, the last giving
    the radius r·u^{1/P} (the radial law of a uniform ball). ``shape="box"``: uniform in the cube
    |z_p| ≤ r of the Cholesky-whitened coordinates. Points are then clipped into the open prior support
    (lower, upper) with a margin of 1e-9 of its width. The first m points of a design are its own
    (smaller) design, so nested designs come from one call. Balance is best when n is a power of two.
    """
    if not (isinstance(n, (int, np.integer)) and n >= 1):
        raise ValueError(f"sobol_design: n must be a positive integer, got {n!r}")
    mean = np.atleast_1d(np.asarray(mean, float))
    P = mean.size
    chol = _chol(cov, P, "sobol_design")
    if not (radius_sigma > 0 and math.isfinite(radius_sigma)):
        raise ValueError(f"sobol_design: radius_sigma must be positive, got {radius_sigma!r}")
    if shape not in ("ball", "box"):
        raise ValueError(f"sobol_design: shape must be 'ball' or 'box', got {shape!r}")
    dim = P + 1 if shape == "ball" else P
    with warnings.catch_warnings():  # non-power-of-two n: scipy warns about balance; documented above
        warnings.simplefilter("ignore", UserWarning)
        u = qmc.Sobol(dim, scramble=True, seed=seed).random(int(n))
    u = np.clip(u, 1e-12, 1 - 1e-12)
    if shape == "ball":
        g = special.ndtri(u[:, :P])
        direction = g / np.linalg.norm(g, axis=1, keepdims=True)
        z = direction * (radius_sigma * u[:, P:] ** (1.0 / P))
    else:
        z = radius_sigma * (2 * u - 1)
    theta = mean + z @ chol.T
    lo = np.full(P, -np.inf) if lower is None else np.asarray(lower, float)
    hi = np.full(P, np.inf) if upper is None else np.asarray(upper, float)
    width = np.where(np.isfinite(hi - lo), hi - lo, 0.0)
    return np.clip(theta, lo + 1e-9 * width, hi - 1e-9 * width)


def _chol(cov, P, where) -> np.ndarray:
    cov = np.atleast_2d(np.asarray(cov, float))
    if cov.shape != (P, P) or not np.all(np.isfinite(cov)):
        raise ValueError(f"{where}: covariance must be a finite ({P}, {P}) matrix, got shape {cov.shape}")
    try:
        return linalg.cholesky(cov, lower=True)
    except linalg.LinAlgError:
        raise ValueError(f"{where}: covariance is not positive definite") from None


# ---------------------------------------------------------------------------
# Regression pieces
# ---------------------------------------------------------------------------


def poly_terms(P: int, degree: int) -> np.ndarray:
    """(T, degree) indices into [z_1 … z_P, 1] whose products are all monomials of total degree ≤ degree.

    T = C(P + degree, degree): every multiset of ``degree`` indices from P + 1 symbols, the last symbol
    standing for 1, is one monomial, and each monomial appears exactly once.
    """
    return np.array(list(itertools.combinations_with_replacement(range(P + 1), degree)), dtype=np.int64
                    ).reshape(math.comb(P + degree, degree), degree)


def _features(Z: np.ndarray, terms: np.ndarray) -> np.ndarray:
    """Monomials of the rows of Z (m, P): (m, T)."""
    aug = np.concatenate([Z, np.ones((Z.shape[0], 1))], axis=1)
    out = np.ones((Z.shape[0], terms.shape[0]))
    for j in range(terms.shape[1]):
        out *= aug[:, terms[:, j]]
    return out


def _parse(method: str) -> tuple[str, str, int]:
    """'poly<d>' -> ('poly', '', d); 'gp-<kernel>-<d>' -> ('gp', kernel, d)."""
    try:
        if method.startswith("poly"):
            d = int(method[4:])
            if 1 <= d <= 4:
                return "poly", "", d
        elif method.startswith("gp-"):
            _, kernel, d = method.split("-")
            if kernel in _gp.KERNELS and 0 <= int(d) <= 3:
                return "gp", kernel, int(d)
    except (ValueError, AttributeError):
        pass
    raise ValueError(f"surrogate method {method!r} is not 'auto', 'poly1'…'poly4' or 'gp-<se|m52>-<0…3>' "
                     "(kernel, degree of the polynomial mean)")


def _min_points(method: str, P: int) -> int:
    """Fewest training points with which ``method`` is determined (poly: T; GP: T + 2)."""
    kind, _, d = _parse(method)
    return math.comb(P + d, d) + (2 if kind == "gp" else 0)


def _fit_core(Z: np.ndarray, Yw: np.ndarray, method: str, pca_tol: float) -> dict:
    """PCA + regression in whitened coordinates; returns the plain arrays of a fitted model."""
    kind, kernel, d = _parse(method)
    n, P = Z.shape
    ybar = Yw.mean(axis=0)
    R = Yw - ybar
    vt = linalg.svd(R, full_matrices=False)[2]
    C = R @ vt.T
    residual = np.sum(R * R, axis=1)[:, None] - np.cumsum(C * C, axis=1)   # (n, rank) after k+1 comps
    ok = np.flatnonzero(residual.max(axis=0) <= pca_tol)
    K = int(ok[0]) + 1 if ok.size else C.shape[1]
    V, C = vt[:K].T, C[:, :K]
    terms = poly_terms(P, d)
    F = _features(Z, terms)
    coef = linalg.lstsq(F, C, cond=None, check_finite=False)[0]            # (T, K)
    arrays = {"ybar": ybar, "V": V, "terms": terms, "coef": coef}
    if kind == "gp":
        E = C - F @ coef
        # A component whose polynomial residual is negligible against the truncation tolerance gets no GP.
        skip = np.max(E * E, axis=0) < 1e-4 * pca_tol
        flat = {"log_amp": 0.0, "log_len": np.zeros(P), "alpha": np.zeros(n)}
        fits = [flat if skip[k] else _gp.fit(Z, E[:, k], kernel) for k in range(K)]
        arrays.update(gp_X=Z.copy(), gp_log_amp=np.array([f["log_amp"] for f in fits]),
                      gp_log_len=np.array([f["log_len"] for f in fits]).reshape(K, P),
                      gp_alpha=np.array([f["alpha"] for f in fits]).reshape(K, n))
    return arrays


def _predict_core(arrays: dict, Z: np.ndarray, kernel: str) -> np.ndarray:
    """Whitened band powers (m, N) of a `_fit_core` model at whitened inputs Z (m, P)."""
    c = _features(Z, arrays["terms"]) @ arrays["coef"]
    if "gp_X" in arrays:
        c = c + _gp.predict_stack(Z, arrays["gp_X"], arrays["gp_log_amp"], arrays["gp_log_len"],
                                  arrays["gp_alpha"], kernel)
    return arrays["ybar"] + c @ arrays["V"].T


def _folds(n: int, k: int, seed: int) -> list[np.ndarray]:
    order = np.random.default_rng(seed).permutation(n)
    return [np.sort(f) for f in np.array_split(order, k)]


def _cross_validate(Z, Yw, method, pca_tol, folds) -> np.ndarray:
    """Held-out Δχ² of every training point, each predicted by a model fitted without its fold."""
    dchi2 = np.empty(len(Z))
    kernel = _parse(method)[1]
    for test in folds:
        train = np.setdiff1d(np.arange(len(Z)), test)
        arrays = _fit_core(Z[train], Yw[train], method, pca_tol)
        diff = _predict_core(arrays, Z[test], kernel) - Yw[test]
        dchi2[test] = np.sum(diff * diff, axis=1)
    return dchi2


def _figures(dchi2: np.ndarray) -> dict:
    return {"rms_dchi2": float(np.sqrt(np.mean(dchi2 ** 2))), "mean_dchi2": float(np.mean(dchi2)),
            "worst_dchi2": float(np.max(dchi2)), "n_held_out": int(dchi2.size)}


# ---------------------------------------------------------------------------
# The surrogate
# ---------------------------------------------------------------------------

#: Candidates of ``method="auto"``, simplest first: the first within 5 % of the best held-out RMS Δχ² wins.
AUTO_CANDIDATES = ("poly1", "poly2", "poly3", "gp-se-1", "gp-se-2", "gp-m52-2")
#: Tried by ``method="auto"`` only when the design is too small for every candidate above.
AUTO_FALLBACK = ("gp-m52-0", "gp-se-0")
_CHUNK = 1 << 20  # elements of the (K, m, n) kernel block evaluated at once by predict_many


class Surrogate:
    """Fitted emulator of binned theory band powers; build with `Surrogate.fit` or `Surrogate.from_arrays`."""

    def __init__(self, arrays: dict):
        a = {k: np.asarray(v) for k, v in arrays.items()}
        version = int(a["format_version"])
        if version != FORMAT_VERSION:
            raise ValueError(f"surrogate arrays have format_version {version}, this code reads {FORMAT_VERSION}")
        self._a = a
        self.method = _text(a["method"])
        self._kind, self._kernel, _ = _parse(self.method)
        self.mean = a["mean"].astype(float)
        self._tinv = linalg.solve_triangular(a["theta_chol"], np.eye(self.mean.size), lower=True)
        L = a["data_chol"]
        core = {k: a[k] for k in ("ybar", "V", "terms", "coef")}
        if self._kind == "gp":
            core.update({k: a[k] for k in ("gp_X", "gp_log_amp", "gp_log_len", "gp_alpha")})
        self._core = core
        # Back to data units once: B = L ȳ + (L V) c(z); for the polynomial part, (coef (L V)ᵀ) directly.
        self._offset = L @ a["ybar"]
        self._basis = L @ a["V"]
        self._poly = a["coef"] @ self._basis.T                                  # (T, N)

    # -- construction -----------------------------------------------------------------------------------

    @classmethod
    def fit(cls, X, Y, data_chol, mean, cov, *, method: str = "auto", pca_tol: float = 1e-4,
            k_folds: int = 5, seed: int = 0, candidates=AUTO_CANDIDATES, names=None) -> "Surrogate":
        """Fit to design points X (n, P) and exact band powers Y (n, N).

        ``data_chol``: lower Cholesky factor L (N, N) of the data covariance; ``mean`` (P,), ``cov`` (P, P):
        the Laplace/Fisher approximation defining the whitened inputs. ``method``: ``"auto"`` (choose among
        ``candidates`` by held-out RMS Δχ²) or one method name (module docstring). ``k_folds``: folds of
        the cross-validation (leave-one-out when n < 2·k_folds). ``seed`` fixes the fold assignment.
        ``pca_tol``: worst training truncation residual allowed (Δχ²); the default 1e-4 halves the held-out
        error on the CAMB demo against 1e-2 (benchmarks/bench_surrogate.py) at no measurable cost.
        """
        X, Y = np.asarray(X, float), np.asarray(Y, float)
        if X.ndim != 2 or Y.ndim != 2 or len(X) != len(Y) or len(X) < 2:
            raise ValueError(f"Surrogate.fit: X must be (n, P) and Y (n, N) with n ≥ 2, got {X.shape}, {Y.shape}")
        if not (np.all(np.isfinite(X)) and np.all(np.isfinite(Y))):
            raise ValueError("Surrogate.fit: X and Y must be finite (drop failed theory points first)")
        n, P = X.shape
        N = Y.shape[1]
        L = np.asarray(data_chol, float)
        if L.shape != (N, N) or not np.all(np.diag(L) > 0) or np.any(np.triu(L, 1)):
            raise ValueError(f"Surrogate.fit: data_chol must be the lower Cholesky factor ({N}, {N}) "
                             "with a positive diagonal")
        mean = np.asarray(mean, float).reshape(-1)
        if mean.size != P:
            raise ValueError(f"Surrogate.fit: mean has {mean.size} entries for {P} parameters")
        tchol = _chol(cov, P, "Surrogate.fit")
        if not (pca_tol > 0 and math.isfinite(pca_tol)):
            raise ValueError(f"Surrogate.fit: pca_tol must be positive, got {pca_tol!r}")
        if not (isinstance(k_folds, (int, np.integer)) and k_folds >= 2):
            raise ValueError(f"Surrogate.fit: k_folds must be an integer ≥ 2, got {k_folds!r}")
        Z = linalg.solve_triangular(tchol, (X - mean).T, lower=True).T
        Yw = linalg.solve_triangular(L, Y.T, lower=True).T
        folds = _folds(n, n if n < 2 * k_folds else int(k_folds), seed)
        n_train_min = n - max(len(f) for f in folds)
        wanted = tuple(candidates) if method == "auto" else (method,)
        for m in wanted:
            _parse(m)
        feasible = [m for m in wanted if n_train_min >= _min_points(m, P)]
        if not feasible and method == "auto":
            feasible = [m for m in AUTO_FALLBACK if n_train_min >= _min_points(m, P)]
            wanted = wanted + AUTO_FALLBACK
        if not feasible:
            need = min(_min_points(m, P) for m in wanted)
            raise ValueError(f"Surrogate.fit: {n} design points are too few for {', '.join(wanted)} with "
                             f"{P} parameters and {len(folds)}-fold cross-validation (training folds of "
                             f"{n_train_min} points, need ≥ {need})")
        selection, held_out = {}, {}
        for m in feasible:
            t0 = time.perf_counter()
            held_out[m] = _cross_validate(Z, Yw, m, pca_tol, folds)
            selection[m] = dict(_figures(held_out[m]), seconds=time.perf_counter() - t0)
        # The first (simplest) candidate within 5 % of the smallest held-out RMS Δχ² wins.
        smallest = min(v["rms_dchi2"] for v in selection.values())
        chosen = next(m for m in feasible if selection[m]["rms_dchi2"] <= 1.05 * smallest)
        dchi2 = held_out[chosen]
        core = _fit_core(Z, Yw, chosen, pca_tol)
        arrays = dict(core, format_version=np.array(FORMAT_VERSION), method=np.array(chosen, dtype="S"),
                      mean=mean, theta_chol=tchol, data_chol=L, pca_tol=np.array(float(pca_tol)),
                      n_train=np.array(n), cv_dchi2=dchi2, cv_folds=np.array(len(folds)),
                      candidates=np.array(list(selection), dtype="S"),
                      candidate_rms=np.array([s["rms_dchi2"] for s in selection.values()]),
                      candidate_worst=np.array([s["worst_dchi2"] for s in selection.values()]))
        if names is not None:
            if len(names) != P:
                raise ValueError(f"Surrogate.fit: {len(names)} names for {P} parameters")
            arrays["names"] = np.array(list(names), dtype="S")
        return cls(arrays)

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Everything needed to rebuild this surrogate, as plain NumPy arrays (numbers and byte strings)."""
        return {k: v.copy() for k, v in self._a.items()}

    @classmethod
    def from_arrays(cls, arrays) -> "Surrogate":
        """Rebuild from `to_arrays` output (a dict, an HDF5 group or an .npz mapping of arrays)."""
        return cls({k: np.asarray(arrays[k]) for k in arrays.keys()})

    # -- use --------------------------------------------------------------------------------------------

    @property
    def n_params(self) -> int:
        return self.mean.size

    @property
    def n_bands(self) -> int:
        return self._offset.size

    @property
    def n_components(self) -> int:
        return self._basis.shape[1]

    @property
    def n_train(self) -> int:
        return int(self._a["n_train"])

    @property
    def names(self) -> tuple[str, ...] | None:
        return tuple(_text(v) for v in self._a["names"]) if "names" in self._a else None

    def predict(self, theta) -> np.ndarray:
        """Band powers B (N,) at one point θ (P,), in the units of the training band powers."""
        theta = np.asarray(theta, float)
        if theta.shape != (self.n_params,):
            raise ValueError(f"Surrogate.predict: θ must have shape ({self.n_params},), got {theta.shape}")
        z = self._tinv @ (theta - self.mean)
        t = self._core["terms"]
        aug = np.append(z, 1.0)
        phi = np.prod(aug[t], axis=1) if t.shape[1] else np.ones(1)
        out = self._offset + phi @ self._poly
        if self._kind == "gp":
            c = _gp.predict_stack(z[None, :], self._core["gp_X"], self._core["gp_log_amp"],
                                  self._core["gp_log_len"], self._core["gp_alpha"], self._kernel)[0]
            out = out + self._basis @ c
        return out

    def predict_many(self, thetas) -> np.ndarray:
        """Band powers (m, N) at points θ (m, P), vectorised (and chunked to bound memory)."""
        thetas = np.asarray(thetas, float)
        if thetas.ndim != 2 or thetas.shape[1] != self.n_params:
            raise ValueError(f"Surrogate.predict_many: θ must have shape (m, {self.n_params}), got {thetas.shape}")
        Z = (thetas - self.mean) @ self._tinv.T
        out = self._offset + _features(Z, self._core["terms"]) @ self._poly
        if self._kind == "gp":
            step = max(1, _CHUNK // max(1, self.n_components * len(self._core["gp_X"])))
            for s in range(0, len(Z), step):
                c = _gp.predict_stack(Z[s:s + step], self._core["gp_X"], self._core["gp_log_amp"],
                                      self._core["gp_log_len"], self._core["gp_alpha"], self._kernel)
                out[s:s + step] += c @ self._basis.T
        return out

    def dchi2(self, theta, bands) -> float:
        """Δχ² = |L⁻¹(B_surr(θ) − B)|² against exact band powers ``bands`` (N,) at θ."""
        diff = linalg.solve_triangular(self._a["data_chol"], self.predict(theta) - np.asarray(bands, float),
                                       lower=True)
        return float(diff @ diff)

    def held_out_error(self) -> dict:
        """k-fold held-out Δχ² of the chosen method: rms_dchi2, mean_dchi2, worst_dchi2, n_held_out, and
        ``candidates``: the same figures (rms, worst) of every method tried."""
        out = _figures(self._a["cv_dchi2"])
        out["folds"] = int(self._a["cv_folds"])
        out["candidates"] = {_text(m): {"rms_dchi2": float(r), "worst_dchi2": float(w)} for m, r, w in
                             zip(self._a["candidates"], self._a["candidate_rms"], self._a["candidate_worst"])}
        return out

    def describe(self) -> dict:
        """JSON-able summary (method, sizes, held-out figures) for logs and reports."""
        return {"method": self.method, "n_train": self.n_train, "n_params": self.n_params,
                "n_bands": self.n_bands, "n_components": self.n_components,
                "pca_tol": float(self._a["pca_tol"]), "held_out": self.held_out_error(), "names": self.names}


def _text(value) -> str:
    value = np.asarray(value).item()
    return value.decode() if isinstance(value, bytes) else str(value)
