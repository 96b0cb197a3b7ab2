"""The results-row contract shared by the runner (writer) and the analysis (reader).

One row per task in ``results.csv``; the task's JSON file holds the same fields plus
nested detail. Names are stable: add, never rename.

- Gradient-type metrics are computed at the data-generating parameters and at a
  perturbed point; the row holds the max over both, the JSON both (``at_truth``,
  ``at_perturbed``).
- Raw per-repeat timings go to ``timings.csv`` in long format: ``key, phase, repeat,
  seconds`` (bootstrap intervals and significance tests read it).
- ``run.json`` holds the case file text, covaudit/python/numpy/scipy versions, CPU
  model, cores, BLAS vendor and threads (threadpoolctl), git commit and dirty flag of
  the solver package when in a git checkout, start/end times and the schema version.
"""

from __future__ import annotations

SCHEMA_VERSION = 1

#: The knob's columns: a file written before them is all ``tol`` solvers, so a reader
#: derives them (``knob_name`` "tol", ``knob_value`` = ``tol``) without a note.
KNOB_COLUMNS: tuple[str, ...] = ("knob_name", "knob_value")

IDENTITY_COLUMNS: tuple[str, ...] = (
    "key",            # stable hash of the canonical task parameters + solver name/version
    # (``pair_key``, the version-free hash compare pairs on, follows ``key`` in
    # results.csv; it is read as text beside the contract, see harness.grid.tasks)
    "case",           # case name from the case file
    "solver", "solver_version",
    "kernel",         # family name
    "shape",          # nu or alpha; empty when the family has none
    "n", "d", "geometry", "mean",
    "variance", "lengthscale",  # lengthscale as a string: "0.1" or "0.1;0.3"
    "nugget",
    "tol",            # NaN for exact solvers and for a solver whose knob is not tol
    "knob_name",      # the solver's accuracy knob: tol, rho, ... (harness.solvers.knobs)
    "knob_value",     # its value (= tol for a tol solver; NaN for exact solvers)
    "seed", "repeat",
    "trace_method",   # exact | hutchinson | hutchpp
    "probes",
    "reference",      # dense | statespace | kronecker | ladder | none
    "reference_certificate",  # DPOT01 ratio of the dense reference (NaN for others)
    "status",         # ok | failed | skipped
    "error_type", "error_message", "notes",
)

ACCURACY_COLUMNS: tuple[str, ...] = (
    "logdet_abs_err", "logdet_rel_err",
    "quad_abs_err", "quad_rel_err",
    "loglik_abs_err",            # nats
    "solve_fwd_err",             # relative forward error
    "solve_residual",            # relative residual
    "factor_err",                # ||Sigma - Sigma~||_2 / ||Sigma||_2, randomized estimate
    "score_err_fisher_max",      # max_i |g~_i - g_i| / sqrt(F_ii)
    "param_shift_se_max",        # max_i |(F^-1 (g~ - g))_i| / SE_i
    "shift_nats",                # 1/2 dtheta' F dtheta
    "microergodic_shift_se",     # Matern kernels only (Zhang 2004)
    "trace_rel_err_max",
    "trace_z_max",               # max_i |estimate - exact| / reported standard error
    "kriging_mean_err_sd_max",   # max |m~ - m| / sqrt(v)
    "kriging_var_rel_err_max",
    "mle_shift_se_max",          # optional end-to-end refit
    "kl_nat",                    # KL(N(0, Sigma) || N(0, Sigma~)), nats; dense reference only
)

PHASES: tuple[str, ...] = ("assemble", "factor", "logdet", "solve", "gradient", "total")

COST_COLUMNS: tuple[str, ...] = (
    *(f"t_{p}" for p in PHASES),           # median seconds over timing repeats
    *(f"t_{p}_min" for p in PHASES),
    *(f"t_{p}_iqr" for p in PHASES),
    "timing_repeats",
    "peak_rss_bytes", "peak_traced_bytes",
    "nbytes",                              # solver's reported storage
    "rank_max", "rank_mean",
    "threads",
    "timed_concurrently",                  # bool
)

RESULT_COLUMNS: tuple[str, ...] = IDENTITY_COLUMNS + ACCURACY_COLUMNS + COST_COLUMNS

#: Contract columns older files may lack without anything being wrong (the metric is
#: optional); readers add them as missing values without a note.
OPTIONAL_COLUMNS: frozenset[str] = frozenset({"mle_shift_se_max", "kl_nat", *KNOB_COLUMNS})

TIMING_COLUMNS: tuple[str, ...] = ("key", "phase", "repeat", "seconds")
