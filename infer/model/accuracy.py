"""Is the run's Boltzmann accuracy preset good enough for its data? Δχ² against a high-accuracy reference.

Method (common practice for validating the numerical settings of a Boltzmann code against a dataset): at
a few points θ_i the same likelihood is evaluated with the spectra of the run's preset and of a reference
preset, and

    Δχ²(θ_i) = χ²_run(θ_i) − χ²_ref(θ_i)

is compared with a threshold. The points are the run's guess plus the first points of a scrambled Sobol
sequence (Sobol 1967; Owen 1998 scrambling, through ``scipy.stats.qmc.Sobol``) in a box: by default
(``region = "ball"``) the guess ± `BALL_SPREADS` starting-ball spreads, clipped to the prior support,
which for a run file with spreads near the posterior σ (as the demos, whose spreads are Fisher σ) spans
the ≈ 1 σ neighbourhood the threshold below is argued for; since the spreads are marginal σ and the
box ignores correlations, its corners lie further out in χ² (each point's χ² excess over the guess is
printed), which only makes the check stricter: a preset error changes χ² by about 2 (d − m)ᵀC⁻¹δm,
larger where the residuals are larger. ``region = "prior"`` uses the prior box instead (uniform priors:
their range; normal priors: their central μ ± `PRIOR_NORMAL_SIGMAS` σ, clipped to any ``range``) —
only meaningful for informative priors, since a box of vague priors holds cosmologies the data exclude
at χ² ≫ N, where a Δχ² of any preset says nothing about the posterior. Beside Δχ², per spectrum the
largest relative D_ℓ deviation over the multipoles the dataset's windows reach: |ΔD_ℓ|/D_ℓ^ref for TT,
EE and BB, and |ΔD_ℓ^TE|/√(D_ℓ^TT D_ℓ^EE) for TE, whose zero crossings would make a plain ratio
meaningless (common practice).

Why `DELTA_CHI2_GOOD` = 0.1. The posterior moves only through the *variation* of Δχ² across the region it
occupies; a constant offset changes nothing. In one dimension, with χ² = (θ − θ̂)²/σ² near the peak, an
extra term of slope g per σ, Δχ² ≈ g (θ − θ̂)/σ, shifts the peak and every interval by g/2 σ. If
|Δχ²| < ε at the points ±1 σ either side of the peak, g = [Δχ²(+1 σ) − Δχ²(−1 σ)]/2 < ε, so the shift is
< ε/2: 0.05 σ for ε = 0.1 (in several dimensions the same holds along every whitened direction), well
under 0.1 σ, and below the Monte Carlo error of an interval from a few hundred effective samples
(≈ 0.05–0.1 σ). This is a bound from the checked points only: it assumes Δχ² varies smoothly
between them (it does for numerical errors of a Boltzmann code, which change slowly with the
cosmology), and it says nothing about the reference preset's own error (measured for CAMB in
`infer.theory.camb`). Cost: 2 × points Boltzmann calls; a log line per point.
"""
from __future__ import annotations

import dataclasses
import logging
import math
import time
from dataclasses import dataclass, field

import numpy as np

from infer.errors import UserError

log = logging.getLogger("infer")

#: |Δχ²| below this at every checked point: the run's preset is good enough (module docstring: ≤ 0.05 σ).
DELTA_CHI2_GOOD = 0.1
#: Half-width of the default box, in starting-ball spreads about the guess.
BALL_SPREADS = 1.0
#: Half-width of a normal prior's part of the ``region = "prior"`` box, in prior σ (its central 95 %).
PRIOR_NORMAL_SIGMAS = 2.0
#: The ``region`` choices.
REGIONS = ("ball", "prior")
#: Most points one check may ask for (each costs two Boltzmann calls).
MAX_POINTS = 64


def presets_of(code: str, where: str = "[theory]") -> tuple[str, ...]:
    """The accuracy presets declared by backend ``code`` (no backend library is loaded); `UserError` if it
    has none (the template model)."""
    from infer.theory import theory_class
    setting = theory_class(code, where).SETTINGS.get("accuracy")
    if setting is None or not getattr(setting, "choices", None):
        raise UserError(f"{where}: theory code '{code}' has no accuracy presets to check")
    return tuple(setting.choices)


def box(cfg, region: str = "ball") -> tuple[np.ndarray, np.ndarray]:
    """(lo, hi) of the box the check points fill, one entry per sampled parameter (module docstring)."""
    from infer.parameters import support
    lo, hi = [], []
    for p in cfg.sampled:
        s_lo, s_hi = support(p.prior)
        if region == "ball":
            a, b = p.guess - BALL_SPREADS * p.spread, p.guess + BALL_SPREADS * p.spread
        elif p.prior.kind == "uniform":
            a, b = s_lo, s_hi
        else:
            mu, sd = p.prior.args[:2]
            a, b = mu - PRIOR_NORMAL_SIGMAS * sd, mu + PRIOR_NORMAL_SIGMAS * sd
        a, b = max(a, s_lo), min(b, s_hi)
        if not a < b:                      # a truncated normal whose central part lies outside its range
            a, b = s_lo, s_hi
        lo.append(a)
        hi.append(b)
    return np.array(lo), np.array(hi)


def check_points(cfg, points: int, region: str = "ball", seed: int = 0) -> np.ndarray:
    """(points, P): the guess, then the first ``points − 1`` points of a scrambled Sobol sequence in `box`."""
    from scipy.stats import qmc
    guess = np.array([p.guess for p in cfg.sampled], float)
    n = points - 1
    if n == 0:
        return guess[None, :]
    lo, hi = box(cfg, region)
    m = max(1, math.ceil(math.log2(n)))
    u = qmc.Sobol(d=guess.size, scramble=True, seed=seed).random_base2(m)[:n]
    return np.vstack([guess, qmc.scale(u, lo, hi)])


@dataclass
class PresetCheck:
    """The result of `preset_check` (NaN where a point could not be computed: ``reasons`` says why)."""

    code: str
    preset: str
    reference: str
    names: tuple[str, ...]
    x: np.ndarray                                   # (n, P) the points
    chi2_run: np.ndarray                            # (n,)
    chi2_ref: np.ndarray                            # (n,)
    reasons: list = field(default_factory=list)     # None or the failure reason, per point
    max_rel_dev: dict = field(default_factory=dict) # kind → largest relative D_ℓ deviation over the points
    ell_range: dict = field(default_factory=dict)   # kind → (ℓ_min, ℓ_max) compared
    seconds_run: float = math.nan                   # median time of one call, run preset
    seconds_ref: float = math.nan                   # … reference preset
    threshold: float = DELTA_CHI2_GOOD
    region: str = "ball"
    n_bands: int = 0

    @property
    def same(self) -> bool:
        """The reference is the run's own preset: nothing was computed."""
        return self.preset == self.reference

    @property
    def delta_chi2(self) -> np.ndarray:
        """χ²_run − χ²_ref per point."""
        return self.chi2_run - self.chi2_ref

    @property
    def max_abs_delta_chi2(self) -> float:
        d = np.abs(self.delta_chi2)
        d = d[np.isfinite(d)]
        return float(d.max()) if d.size else math.nan

    @property
    def shift_estimates(self) -> np.ndarray:
        """Per point after the guess: ½ |Δχ²_i − Δχ²_guess| / √(χ²_i − χ²_guess), in σ — the peak shift the
        Δχ² slope along the direction guess → point implies, if the posterior were Gaussian with its peak at
        the guess (then χ²_i − χ²_guess is the squared whitened distance). An estimate along the sampled
        directions only, not a bound; NaN where not computed or χ²_i − χ²_guess < 1."""
        if len(self.x) < 2:
            return np.zeros(0)
        dist2 = self.chi2_ref[1:] - self.chi2_ref[0]
        slope = np.abs(self.delta_chi2[1:] - self.delta_chi2[0])
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(dist2 >= 1.0, 0.5 * slope / np.sqrt(np.abs(dist2)), np.nan)

    @property
    def verdict(self) -> str:
        """'same preset', 'good enough', 'not good enough' or 'undetermined' (no point computed)."""
        if self.same:
            return "same preset"
        worst = self.max_abs_delta_chi2
        if not math.isfinite(worst):
            return "undetermined"
        return "good enough" if worst < self.threshold else "not good enough"

    def lines(self) -> list[str]:
        """Human-readable report, one string per line."""
        if self.same:
            return [f"presets    accuracy = '{self.preset}' is already the reference preset: nothing to compare"]
        box = f"guess ± {BALL_SPREADS:g} spread" if self.region == "ball" else "the prior box"
        out = [f"presets    {self.code} '{self.preset}' against '{self.reference}' at {len(self.x)} points "
               f"(the guess and Sobol points in {box}), {self.n_bands} bands"]
        for i, (x, d, r) in enumerate(zip(self.x, self.delta_chi2, self.reasons)):
            where = "guess" if i == 0 else f"point {i}"
            if r is not None:
                out.append(f"  {where:<8} not computed ({r})")
                continue
            excess = "" if i == 0 else f", {self.chi2_ref[i] - self.chi2_ref[0]:+.1f} from the guess"
            out.append(f"  {where:<8} Δχ² = {d:+.4f}   (χ²_ref = {self.chi2_ref[i]:.2f}{excess})")
            if i > 0:
                out.append("           " + ", ".join(f"{n} = {v:.6g}" for n, v in zip(self.names, x)))
        for kind, dev in self.max_rel_dev.items():
            lo, hi = self.ell_range[kind]
            norm = "/√(TT·EE)" if kind == "TE" else "/D_ℓ"
            out.append(f"  max |ΔD_ℓ|{norm} {kind}: {dev:.2e}  (ℓ {lo}–{hi})")
        out.append(f"  one call: {self.seconds_run:.2f} s ('{self.preset}'), {self.seconds_ref:.2f} s "
                   f"('{self.reference}')")
        d = self.delta_chi2[np.isfinite(self.delta_chi2)]
        if d.size > 1:
            out.append(f"  Δχ² varies by {np.ptp(d):.3f} across the points (a constant offset moves no interval)")
        est = self.shift_estimates
        if np.isfinite(est).any():
            out.append(f"  estimated peak shift along the sampled directions ≈ {np.nanmax(est):.3f} σ (Gaussian "
                       "approximation, guess as the peak: ½ |Δχ²_i − Δχ²_guess| / √(χ²_i − χ²_guess))")
        worst = self.max_abs_delta_chi2
        why = {"good enough": f"max |Δχ²| = {worst:.3f} < {self.threshold:g}: intervals move by ≲ "
                              f"{worst / 2:.3f} σ (≤ ½ max |Δχ²|, infer.model.accuracy)",
               "not good enough": f"max |Δχ²| = {worst:.3f} ≥ {self.threshold:g}: the bound (½ max |Δχ²|) "
                                  f"allows interval shifts up to {worst / 2:.2f} σ; use accuracy = "
                                  f"'{self.reference}' or judge by the estimate above",
               "undetermined": "no point could be computed with both presets"}[self.verdict]
        out.append(f"  verdict: {self.verdict} — {why}")
        return out


def _reached(data, kind) -> tuple[int, int]:
    rows = np.asarray(data.kind) == kind
    cols = np.flatnonzero((np.asarray(data.window)[rows] != 0).any(axis=0))
    ell = np.asarray(data.window_ell)
    return int(ell[cols[0]]), int(ell[cols[-1]])


def _rel_dev(run, ref, kind, span) -> float:
    sl = slice(span[0], span[1] + 1)
    diff = np.abs(run.dl[kind][sl] - ref.dl[kind][sl])
    if kind == "TE":
        norm = np.sqrt(np.abs(ref.dl["TT"][sl] * ref.dl["EE"][sl]))
    else:
        norm = np.abs(ref.dl[kind][sl])
    ok = norm > 0
    return float(np.max(diff[ok] / norm[ok])) if ok.any() else math.nan


def check_request(cfg, points: int = 3, reference: str = "high", region: str = "ball",
                  threshold: float = DELTA_CHI2_GOOD) -> str:
    """Check the arguments of `preset_check` (one-line `UserError`, no backend library loaded); returns the
    run's own preset. The CLI calls it before its first theory call."""
    code = cfg.theory["code"]
    presets = presets_of(code, f"{cfg.path}: [theory]")
    if not isinstance(reference, str) or reference not in presets:
        raise UserError(f"{cfg.path}: reference preset {reference!r} is not an accuracy preset of theory code "
                        f"'{code}' (choose one of {', '.join(presets)})")
    if isinstance(points, bool) or not isinstance(points, (int, np.integer)) or not 1 <= points <= MAX_POINTS:
        raise UserError(f"preset check: points must be an integer in 1 … {MAX_POINTS}, got {points!r}")
    if region not in REGIONS:
        raise UserError(f"preset check: region must be one of {', '.join(REGIONS)}, got {region!r}")
    if isinstance(threshold, bool) or not (isinstance(threshold, (int, float)) and math.isfinite(threshold)
                                           and threshold > 0):
        raise UserError(f"preset check: threshold must be a positive number, got {threshold!r}")
    return cfg.theory["accuracy"]                   # filled with the backend default when the file omits it


def preset_check(cfg, points: int = 3, reference: str = "high", seed: int | None = None,
                 region: str = "ball", threshold: float = DELTA_CHI2_GOOD, post=None) -> PresetCheck:
    """Δχ² between the run's accuracy preset and ``reference`` at ``points`` points (guess first), and the
    largest relative D_ℓ deviation per spectrum (module docstring). ``post``: the run's `Posterior`, if
    already built (its dataset is reused). Every argument is checked before any Boltzmann call."""
    from infer.model.posterior import Posterior
    from infer.theory import TheoryError
    code = cfg.theory["code"]
    preset = check_request(cfg, points, reference, region, threshold)
    names = tuple(p.name for p in cfg.sampled)
    empty = np.zeros(0)
    if preset == reference:
        return PresetCheck(code, preset, reference, names, np.zeros((0, len(names))), empty, empty,
                           threshold=threshold, region=region)

    seed = cfg.seed if seed is None else seed
    x = check_points(cfg, int(points), region, seed)
    run = Posterior(cfg) if post is None else post
    ref_cfg = dataclasses.replace(cfg, theory={**cfg.theory, "accuracy": reference})
    ref = Posterior(ref_cfg, data=run.data)
    kinds = tuple(k for k in run.like.kinds if k in ("TT", "TE", "EE", "BB"))
    spans = {k: _reached(run.data, k) for k in kinds}
    n = len(x)
    log.info(f"preset check: '{preset}' against '{reference}' at {n} points, {2 * n} {code} calls")
    start = time.monotonic()
    chi2_run, chi2_ref = np.full(n, np.nan), np.full(n, np.nan)
    reasons, devs, t_run, t_ref = [], {k: [] for k in kinds}, [], []
    for i, xi in enumerate(x):
        reason = None
        if run.priors.logpdf(xi) == -math.inf:
            reason = "outside-prior"
        else:
            inputs, nuis = run.theory_inputs(xi), run.nuisance_values(xi)
            try:
                t = time.perf_counter()
                s_run = run.theory.compute(inputs)
                t_run.append(time.perf_counter() - t)
                t = time.perf_counter()
                s_ref = ref.theory.compute(inputs)
                t_ref.append(time.perf_counter() - t)
            except TheoryError as err:
                reason = err.reason
        if reason is None:
            chi2_run[i] = run.like.loglike(s_run, nuis)[1]
            chi2_ref[i] = ref.like.loglike(s_ref, nuis)[1]
            for k in kinds:
                devs[k].append(_rel_dev(s_run, s_ref, k, spans[k]))
            log.info(f"preset check: point {i + 1}/{n}: Δχ² = {chi2_run[i] - chi2_ref[i]:+.4f} "
                     f"('{preset}' − '{reference}', χ² = {chi2_ref[i]:.2f}; {time.monotonic() - start:.0f} s)")
        else:
            log.info(f"preset check: point {i + 1}/{n}: not computed ({reason}; {time.monotonic() - start:.0f} s)")
        reasons.append(reason)
    return PresetCheck(code, preset, reference, names, x, chi2_run, chi2_ref, reasons,
                       {k: float(np.nanmax(v)) if v else math.nan for k, v in devs.items()}, spans,
                       float(np.median(t_run)) if t_run else math.nan,
                       float(np.median(t_ref)) if t_ref else math.nan, threshold, region, run.like.n)
