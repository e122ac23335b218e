"""The statistical model of a run: priors, the band-power likelihood, its nuisance terms, the posterior.

Modules: `priors` (uniform, normal, truncated normal), `nuisance` (calibration and foreground terms —
where a new nuisance or foreground term goes), `likelihood` (Gaussian band-power likelihood, χ² and PTE,
the one home of fit quality), `posterior` (ln p of one run and its picklable `PosteriorFactory` for
`infer.parallel`), `provenance` (the record stored with a chain), `timing` (the cost check of
``infer check``).
"""
