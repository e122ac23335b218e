"""infer: cosmological parameters from CMB band powers.

The data path, one subpackage per step (see DEVELOPERS.md): `config` (the run file) → `data` (band
powers) → `theory` (Boltzmann backends and the band-power surrogate) → `model` (priors, nuisance terms,
likelihood, posterior) → `parallel` (where a log-density runs: in process, worker processes, MPI ranks) →
`sampling` (the ensemble driver and the surrogate engine) and `fit` (best fit) → `store` (crash-safe chain
files) → `analysis` (diagnostics, marginals, importance weights) → `report` (tables, figures, status).
`forecast` makes mock datasets for invented experiments and Fisher matrices; `cli` is the `infer` command.
"""
__version__ = "0.4.0"
