"""Loss of prediction efficiency of an approximated kriging predictor: MLOE and MMOM.

Definitions implemented (Hong, Abdulah, Genton and Sun 2021, "Efficiency assessment of
approximated spatial predictions for large datasets", Spatial Statistics 43, 100517;
written here FROM MEMORY of the paper, not copied from it: the exact text could not be
retrieved). At a prediction location s0, with the exact covariance Sigma (the "true"
model t) and the approximated one Sigma~ (model a), let lambda_t, lambda_a be the kriging
weights of the two models and

    E_tt = MSE of the exact predictor under the exact model
         = c00 - 2 lambda_t' c + lambda_t' Sigma lambda_t (the exact kriging variance),
    E_at = MSE of the approximated predictor under the exact model
         = c00 - 2 lambda_a' c + lambda_a' Sigma lambda_a,
    E_aa = MSE of the approximated predictor as the approximated model states it
         (the approximated kriging variance).

    LOE(s0) = E_at / E_tt - 1        (>= 0: efficiency lost by the approximation),
    MOM(s0) = E_aa / E_at - 1        (misstatement of the MSE; < 0: too optimistic),

and MLOE, MMOM are their means over the prediction locations. Here c00 and c are the
latent-field covariances (no nugget), so the MSEs are those of predicting the
noise-free field; both models use the same parameters, so only the solver differs.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np


@dataclass(frozen=True)
class Efficiency:
    """MLOE, MMOM and the largest |LOE|, |MOM| over the prediction locations."""

    mloe: float
    mmom: float
    loe_max: float
    mom_max_abs: float
    points: int

    def to_dict(self) -> dict[str, float]:
        return asdict(self)


def predictor_mse_terms(weights: np.ndarray, cross: np.ndarray,
                        sigma_times_weights: np.ndarray, c00: float) -> np.ndarray:
    """E_at = c00 - 2 lambda' c + lambda' Sigma lambda per column (module docstring).

    Parameters
    ----------
    weights : ndarray (n, m)
        lambda_a, kriging weights of the approximated model.
    cross : ndarray (n, m)
        c, exact covariances between the observations and the prediction points.
    sigma_times_weights : ndarray (n, m)
        Sigma lambda_a with the exact Sigma.
    c00 : float
        Prior variance of the latent field at a prediction point.
    """
    lam = np.asarray(weights, dtype=float)
    return (c00 - 2.0 * np.einsum("ij,ij->j", lam, cross)
            + np.einsum("ij,ij->j", lam, sigma_times_weights))


def prediction_efficiency(weights_approx: np.ndarray, cross: np.ndarray,
                          sigma_times_weights: np.ndarray, c00: float,
                          var_exact: np.ndarray, var_approx: np.ndarray) -> Efficiency:
    """MLOE and MMOM (module docstring) from the weights (``predictor_mse_terms``)."""
    e_at = predictor_mse_terms(weights_approx, cross, sigma_times_weights, c00)
    return efficiency_from_mse(e_at, var_exact, var_approx)


def efficiency_from_mse(e_at: np.ndarray, var_exact: np.ndarray,
                        var_approx: np.ndarray) -> Efficiency:
    """MLOE and MMOM (module docstring) from E_at, E_tt = ``var_exact`` and E_aa =
    ``var_approx``, one entry per prediction location."""
    e_at = np.asarray(e_at, dtype=float)
    e_tt = np.asarray(var_exact, dtype=float)
    e_aa = np.asarray(var_approx, dtype=float)
    keep = (e_tt > 0) & (e_at > 0)
    if not np.any(keep):
        raise ValueError("every exact prediction variance is zero; MLOE/MMOM undefined")
    loe = e_at[keep] / e_tt[keep] - 1.0
    mom = e_aa[keep] / e_at[keep] - 1.0
    return Efficiency(mloe=float(np.mean(loe)), mmom=float(np.mean(mom)),
                      loe_max=float(np.max(np.abs(loe))),
                      mom_max_abs=float(np.max(np.abs(mom))), points=int(keep.sum()))
