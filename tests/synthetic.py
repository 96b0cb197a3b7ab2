"""Synthetic run directories with known scaling laws, for tests and report previews.

The generated run mimics what the runner writes: a dense solver with
t_factor = c n^3, a compressed solver with t_factor = c n^1.3 at several tolerances,
errors shrinking with the tolerance, per-repeat timings with lognormal noise, a task
that failed and dense tasks skipped beyond a size limit. Nothing here is measured.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from harness.grid.store.columns import PHASES, RESULT_COLUMNS, SCHEMA_VERSION, TIMING_COLUMNS

#: Share of the total time per phase (assemble, factor, logdet, solve, gradient).
_PHASE_SHARE = {"assemble": 0.10, "factor": 0.55, "logdet": 0.02, "solve": 0.08,
                "gradient": 0.25}


def _key(parts: Sequence[object]) -> str:
    return hashlib.sha256(repr(tuple(parts)).encode()).hexdigest()[:16]


def _row(**values: object) -> dict[str, object]:
    row: dict[str, object] = {c: np.nan for c in RESULT_COLUMNS}
    row.update(values)
    return row


def write_synthetic_run(
    run_dir: str | Path,
    *,
    rng: np.random.Generator,
    case: str = "synthetic",
    sizes: Sequence[int] = (500, 1000, 2000, 4000, 8000),
    tolerances: Sequence[float] = (1e-2, 1e-4, 1e-6, 1e-8),
    seeds: Sequence[int] = (0, 1, 2),
    repeats: int = 5,
    dense_max_n: int = 4000,
    dense_exponent: float = 3.0,
    hodlr_exponent: float = 1.3,
    noise: float = 0.05,
    slowdown: float = 1.0,
    error_scale: float = 1.0,
    include_failure: bool = True,
    probes: Sequence[int] = (16, 64, 256),
) -> Path:
    """Write ``results.csv``, ``timings.csv`` and ``run.json`` of a synthetic run.

    Parameters
    ----------
    run_dir : path
        Created when absent.
    rng : numpy.random.Generator
        The only source of randomness (timing noise, trace z-scores).
    slowdown, error_scale : float
        Multiply every compressed-solver time / error (to plant regressions).

    Returns
    -------
    Path
        The run directory.
    """
    path = Path(run_dir)
    path.mkdir(parents=True, exist_ok=True)
    rows: list[dict[str, object]] = []
    timing_rows: list[tuple[str, str, int, float]] = []
    common = {"case": case, "kernel": "matern32", "shape": "", "d": 2,
              "geometry": "uniform", "mean": "constant", "variance": 1.0,
              "lengthscale": "0.1", "nugget": 1e-4, "repeat": 0, "threads": 1,
              "timed_concurrently": False, "timing_repeats": repeats}

    def timed(key: str, total: float) -> dict[str, float]:
        out: dict[str, float] = {}
        for phase in PHASES:
            share = 1.0 if phase == "total" else _PHASE_SHARE[phase]
            draws = share * total * rng.lognormal(0.0, noise, size=repeats)
            for r, sec in enumerate(draws):
                timing_rows.append((key, phase, r, float(sec)))
            out[f"t_{phase}"] = float(np.median(draws))
            out[f"t_{phase}_min"] = float(draws.min())
            q75, q25 = np.percentile(draws, [75, 25])
            out[f"t_{phase}_iqr"] = float(q75 - q25)
        return out

    for n in sizes:
        for seed in seeds:
            params = ("dense", n, seed)
            key = _key(params)
            if n > dense_max_n:
                rows.append(_row(key=key, solver="dense", solver_version="1", n=n, seed=seed,
                                 tol=np.nan, trace_method="exact", reference="dense",
                                 status="skipped", error_type="",
                                 error_message=f"n={n} beyond dense limit {dense_max_n}",
                                 **common))
            else:
                total = 4e-10 * n ** dense_exponent
                rows.append(_row(key=key, solver="dense", solver_version="1", n=n,
                                 seed=seed, tol=np.nan, trace_method="exact",
                                 reference="dense", status="ok", reference_certificate=0.4,
                                 probes=0, loglik_abs_err=0.0, logdet_abs_err=0.0,
                                 param_shift_se_max=0.0, kriging_mean_err_sd_max=0.0,
                                 nbytes=8.0 * n * n, peak_rss_bytes=1.2e8 + 8.0 * n * n,
                                 **timed(key, total), **common))
            for tol in tolerances:
                for p_index, p in enumerate(probes):
                    key = _key(("hodlr", n, seed, tol, p))
                    if include_failure and n == sizes[0] and seed == seeds[0] \
                            and tol == tolerances[0] and p_index == 0:
                        rows.append(_row(key=key, solver="hodlr", solver_version="0.1", n=n,
                                         seed=seed, tol=tol, trace_method="hutchpp",
                                         probes=p, reference="dense", status="failed",
                                         error_type="LinAlgError",
                                         error_message="leading minor 17 not positive "
                                                       "definite", **common))
                        continue
                    rank = max(4.0, -3.0 * np.log10(tol) * np.log2(n) / 2)
                    total = slowdown * 2e-6 * n ** hodlr_exponent * (rank / 10)
                    err = error_scale * tol * n * 0.05 * rng.lognormal(0.0, 0.2)
                    z = rng.standard_normal(3)
                    rows.append(_row(
                        key=key, solver="hodlr", solver_version="0.1", n=n, seed=seed,
                        tol=tol, trace_method="hutchpp", probes=p, reference="dense"
                        if n <= dense_max_n else "ladder", status="ok",
                        reference_certificate=0.4 if n <= dense_max_n else np.nan,
                        logdet_abs_err=err, logdet_rel_err=err / n,
                        quad_abs_err=err / 3, quad_rel_err=err / (3 * n),
                        loglik_abs_err=err / 2, solve_fwd_err=tol * 10,
                        solve_residual=tol, factor_err=tol,
                        score_err_fisher_max=err / 5, param_shift_se_max=err / 4,
                        shift_nats=(err / 4) ** 2 / 2, trace_rel_err_max=1.5 / p,
                        trace_z_max=float(np.abs(z).max()),
                        kriging_mean_err_sd_max=err / 20, kriging_var_rel_err_max=tol,
                        nbytes=16.0 * n * rank * np.log2(n),
                        peak_rss_bytes=1.2e8 + 24.0 * n * rank * np.log2(n),
                        rank_max=rank, rank_mean=rank / 2, **timed(key, total), **common))
    frame = pd.DataFrame(rows)
    frame.to_csv(path / "results.csv", index=False)
    pd.DataFrame(timing_rows, columns=list(TIMING_COLUMNS)).to_csv(path / "timings.csv",
                                                                  index=False)
    meta = {"schema_version": SCHEMA_VERSION, "case_file": f'name = "{case}"\n',
            "versions": {"covaudit": "0.1.0", "python": "3.11", "numpy": "1.26",
                         "scipy": "1.11"},
            "cpu": {"model": "Synthetic CPU", "cores": 2}, "blas": {"vendor": "openblas",
                                                                   "threads": 1},
            "git": {"commit": "0" * 40, "dirty": False},
            "started": "2024-01-01T00:00:00Z", "finished": "2024-01-01T01:00:00Z"}
    (path / "run.json").write_text(json.dumps(meta, indent=2, sort_keys=True), encoding="utf-8")
    return path
