"""infer: cosmological parameters from CMB band powers.

The data path, one module per step: `config` → `dataset` → `theory` → `likelihood` (+ `priors`, joined in
`posterior`) → `evaluate` (where the posterior runs: in-process, worker processes, MPI ranks) →
`sampler` (the ensemble driver) → `store` (the crash-safe chain file) → `diagnostics` → `summary`/`plots`.
`mock` makes datasets for invented experiments; `cli` is the `infer` command.
"""
__version__ = "0.1.0"
