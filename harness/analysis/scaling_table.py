"""Scaling fits for every (solver, knob, knob value, kernel, geometry) group of a run.

A group is one solver at one value of its accuracy knob (``knob_name``, ``knob_value``:
``hodlr`` at tol 1e-6, ``vecchia`` at rho 6; ``harness.solvers.knobs``), so every family
gets its own time, memory and error fits in n; an exact solver's knob value is missing.

Each group's per-size medians of a cost column are fitted with
``harness.analysis.scaling.fit_power_law``; the bootstrap resamples the per-repeat timings of
``timings.csv`` pooled over the group's tasks at each size; compressed-solver time fits are
paired with the dense fit of the same kernel and geometry for the crossover size.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from harness.analysis.load import RunData
from harness.analysis.scaling import (
    Crossover,
    Extrapolation,
    PowerLawFit,
    ScalingError,
    crossover,
    extrapolate,
    fit_power_law,
)

TIME_METRICS: tuple[str, ...] = ("t_factor", "t_logdet", "t_solve", "t_gradient", "t_total")
MEMORY_METRICS: tuple[str, ...] = ("peak_rss_bytes", "nbytes")
#: Errors fitted against n as well: the log-likelihood error and the KL divergence (nats).
ERROR_METRICS: tuple[str, ...] = ("loglik_abs_err", "kl_nat")
GROUP_COLUMNS: tuple[str, ...] = ("solver", "knob_name", "knob_value", "kernel", "geometry")
DENSE_SOLVER = "dense"


@dataclass(frozen=True)
class ScalingRow:
    """One group's fit of one metric (``fit`` is None and ``refused`` says why).

    ``tol`` is the knob's value for a ``tol`` solver and NaN otherwise (and for an exact
    solver); ``knob_name`` and ``knob_value`` name the group's knob and value.
    """

    solver: str
    tol: float
    kernel: str
    geometry: str
    metric: str
    fit: PowerLawFit | None
    refused: str = ""
    crossover: Crossover | None = None
    extrapolation: Extrapolation | None = None
    knob_name: str = "tol"
    knob_value: float = math.nan

    @property
    def label(self) -> str:
        return solver_label(self.solver, self.tol, knob_name=self.knob_name,
                            knob_value=self.knob_value)

    def to_dict(self) -> dict[str, object]:
        out: dict[str, object] = {"solver": self.solver, "tol": self.tol,
                                  "knob_name": self.knob_name, "knob_value": self.knob_value,
                                  "kernel": self.kernel, "geometry": self.geometry,
                                  "metric": self.metric, "refused": self.refused}
        if self.fit is not None:
            out.update({f"fit_{k}": v for k, v in self.fit.to_dict().items()})
        if self.crossover is not None:
            out.update({f"crossover_{k}": v for k, v in self.crossover.to_dict().items()})
        if self.extrapolation is not None:
            out.update({f"extrap_{k}": v for k, v in self.extrapolation.to_dict().items()})
        return out


def solver_label(solver: str, tol: float, *, knob_name: str = "tol",
                 knob_value: float | None = None) -> str:
    """``dense``, ``hodlr tol=1e-06`` or ``vecchia rho=6``."""
    if knob_name not in ("tol", "") and knob_value is not None \
            and not (isinstance(knob_value, float) and math.isnan(knob_value)):
        return f"{solver} {knob_name}={knob_value:g}"
    if tol is None or (isinstance(tol, float) and math.isnan(tol)):
        return solver
    return f"{solver} tol={tol:.0e}"


def _is_exact(tol: float) -> bool:
    return isinstance(tol, float) and math.isnan(tol)


def _repeats(run: RunData, keys: pd.DataFrame, metric: str) -> dict[float, list[float]] | None:
    if not metric.startswith("t_") or run.timings.empty:
        return None
    phase = metric[2:]
    t = run.timings[run.timings["phase"] == phase]
    joined = t.merge(keys[["key", "n"]], on="key", how="inner")
    if joined.empty:
        return None
    return {float(n): g["seconds"].tolist() for n, g in joined.groupby("n")}


def scaling_rows(
    run: RunData,
    *,
    metrics: Sequence[str] = TIME_METRICS + MEMORY_METRICS + ERROR_METRICS,
    level: float = 0.95,
    n_boot: int = 500,
    rng: np.random.Generator | None = None,
    extrapolate_to: float | None = None,
) -> list[ScalingRow]:
    """Fit every group and metric of ``run`` (only ``ok`` rows with a positive value).

    Parameters
    ----------
    rng : numpy.random.Generator, optional
        Bootstrap stream; ``default_rng(rng)`` is applied once and shared in a fixed order,
        so the same run and seed give the same intervals.
    extrapolate_to : float, optional
        Size for a prediction with its interval.
    """
    gen = np.random.default_rng(rng)
    ok = run.ok
    rows: list[ScalingRow] = []
    if ok.empty:
        return rows
    groups = ok.groupby(list(GROUP_COLUMNS), dropna=False, sort=True)
    Group = tuple[str, str, float, str, str]       # solver, knob, value, kernel, geometry
    fits: dict[tuple[Group, str], PowerLawFit] = {}
    pending: list[tuple[Group, str, PowerLawFit | None, str]] = []
    for gkey, frame in groups:
        group: Group = (str(gkey[0]), str(gkey[1]) or "tol", float(gkey[2]), str(gkey[3]),
                        str(gkey[4]))
        for metric in metrics:
            sub = frame[["key", "n", metric]].dropna()
            sub = sub[sub[metric] > 0]
            if sub.empty:
                continue
            try:
                fit = fit_power_law(sub["n"].to_numpy(), sub[metric].to_numpy(),
                                    repeats=_repeats(run, sub, metric), level=level,
                                    n_boot=n_boot, rng=gen)
                refused = ""
            except ScalingError as exc:
                fit, refused = None, str(exc)
            if fit is not None:
                fits[(group, metric)] = fit
            pending.append((group, metric, fit, refused))
    dense = {}
    for ((solver, _, value, kernel, geometry), metric), fit in fits.items():
        if _is_exact(value) and (solver == DENSE_SOLVER
                                 or (kernel, geometry, metric) not in dense):
            dense[(kernel, geometry, metric)] = fit
    for (solver, knob_name, value, kernel, geometry), metric, fit, refused in pending:
        cross = None
        ref = dense.get((kernel, geometry, metric))
        if fit is not None and ref is not None and not _is_exact(value) \
                and metric.startswith("t_"):
            cross = crossover(fit, ref, level=level)
        ext = extrapolate(fit, extrapolate_to) if fit is not None and extrapolate_to else None
        rows.append(ScalingRow(solver=solver, tol=value if knob_name == "tol" else math.nan,
                               kernel=kernel, geometry=geometry, metric=metric, fit=fit,
                               refused=refused, crossover=cross, extrapolation=ext,
                               knob_name=knob_name, knob_value=value))
    return rows


def scaling_frame(rows: Sequence[ScalingRow]) -> pd.DataFrame:
    """A flat table of ``rows`` (one line per group and metric) for display and export."""
    records = []
    for r in rows:
        f = r.fit
        rec: dict[str, object] = {
            "solver": r.label, "kernel": r.kernel, "geometry": r.geometry, "metric": r.metric,
            "sizes": "" if f is None else f"{int(min(f.sizes))}-{int(max(f.sizes))} ({f.k})",
            "slope": np.nan if f is None else f.slope,
            "ci_low": np.nan if f is None else f.ci_low,
            "ci_high": np.nan if f is None else f.ci_high,
            "boot_low": np.nan if f is None else f.boot_low,
            "boot_high": np.nan if f is None else f.boot_high,
            "r_squared": np.nan if f is None else f.r_squared,
            "local_slopes": "" if f is None else " ".join(f"{s:.2f}" for s in f.local_slopes),
            "refs_in_ci": "" if f is None else ", ".join(
                f"{k:g}" for k, v in f.reference_inside.items() if v) or "none",
            "crossover_n": np.nan if r.crossover is None else r.crossover.fitted,
            "crossover_low": np.nan if r.crossover is None else r.crossover.low,
            "crossover_high": np.nan if r.crossover is None else r.crossover.high,
            "note": r.refused,
        }
        if r.extrapolation is not None:
            e = r.extrapolation
            rec.update({"predict_n": e.n, "predict": e.value, "predict_low": e.low,
                        "predict_high": e.high, "extrapolated": e.extrapolated})
        records.append(rec)
    return pd.DataFrame.from_records(records)


def display_table(rows: Sequence[ScalingRow]) -> pd.DataFrame:
    """The fitted rows as text columns (slope, intervals, crossover) for reports and
    exports."""
    frame = scaling_frame([r for r in rows if r.fit is not None])
    if frame.empty:
        return frame

    def interval(lo: float, hi: float) -> str:
        return "\u2013" if math.isnan(lo) else f"[{lo:.2f}, {hi:.2f}]"

    def cross(row: pd.Series) -> str:
        if math.isnan(row["crossover_n"]):
            return "\u2013"
        text = f"{row['crossover_n']:.3g}"
        if not math.isnan(row["crossover_low"]):
            text += f" [{row['crossover_low']:.3g}, {row['crossover_high']:.3g}]"
        return text

    return pd.DataFrame({
        "solver": frame["solver"], "kernel": frame["kernel"], "geometry": frame["geometry"],
        "metric": frame["metric"], "sizes (k)": frame["sizes"],
        "slope b": frame["slope"].map(lambda v: f"{v:.3f}"),
        "CI": [interval(lo, hi) for lo, hi in zip(frame["ci_low"], frame["ci_high"],
                                                  strict=True)],
        "bootstrap": [interval(lo, hi) for lo, hi in zip(frame["boot_low"],
                                                         frame["boot_high"], strict=True)],
        "R\u00b2": frame["r_squared"].map(lambda v: f"{v:.4f}"),
        "local slopes": frame["local_slopes"], "in CI": frame["refs_in_ci"],
        "crossover n": [cross(r) for _, r in frame.iterrows()],
    })
