"""Write ``check_values.csv``: closed-form values for the exponential kernel on a regular 1D grid.

Points x_i = i * spacing (i = 0..n-1), k(x, x') = s2 exp(-|x - x'| / l), no nugget, zero
mean, theta = (log s2, log l). With rho = exp(-spacing / l) and c = spacing / l the
process is a stationary AR(1) with coefficient rho and innovation variance s2 (1 - rho^2)
(the Ornstein-Uhlenbeck exact discretization), whose exact Gaussian likelihood in
innovations form (Brockwell and Davis 1991, *Time Series: Theory and Methods*, 2nd ed.,
section 8.7, with the one-step predictors of section 5.2) gives:

    logdet          n log s2 + (n - 1) log(1 - rho^2)
    quadratic_ones  1' K^-1 1 = (1 + (n - 1) (1 - rho) / (1 + rho)) / s2
    loglik_ones     -1/2 (quadratic_ones + logdet + n log(2 pi)), data y = 1
    trace_dlogl     tr(K^-1 dK/dlog l) = d logdet / d log l = -2 (n - 1) rho^2 c / (1 - rho^2)
    fisher_ss       n / 2
    fisher_sl       -(n - 1) rho^2 c / (1 - rho^2)
    fisher_ll       (n - 1) rho^2 c^2 (1 + rho^2) / (1 - rho^2)^2

(the Fisher entries sum the conditional informations of y_i | y_{i-1}; derivation in
``harness/references/closed_forms.py``). Plain ``math`` only, independent of the package.
Run: ``python reference/make_check_values.py`` (rewrites the CSV next to this file).
"""

import csv
import math
from pathlib import Path

CASES = [  # n, spacing, lengthscale, variance
    (5, 0.25, 1.0, 1.0),
    (200, 0.01, 0.1, 2.0),
    (1000, 0.002, 0.5, 0.7),
    (2000, 0.001, 0.05, 0.5),
    (100000, 1e-5, 0.01, 1.0),
]

AR1 = ("AR(1) exact Gaussian likelihood, innovations form: Brockwell and Davis (1991) "
       "Time Series: Theory and Methods, sections 5.2 and 8.7; OU exact discretization")
JACOBI = AR1 + "; derivative by Jacobi's formula d log det K = tr(K^-1 dK)"
FISHER = ("sum of conditional Fisher informations of y_i | y_(i-1) ~ N(rho y_(i-1), "
          "s2 (1 - rho^2)) (martingale score decomposition), AR(1) as in " + AR1)


def rows(n: int, h: float, ls: float, s2: float) -> list[tuple[str, float, str]]:
    c = h / ls
    rho = math.exp(-c)
    q = -math.expm1(-2.0 * c)  # 1 - rho^2
    logdet = n * math.log(s2) + (n - 1) * math.log(q)
    quad = (1.0 + (n - 1) * (-math.expm1(-c)) / (1.0 + rho)) / s2
    loglik = -0.5 * (quad + logdet + n * math.log(2.0 * math.pi))
    r2 = rho * rho
    return [
        ("logdet", logdet, AR1),
        ("quadratic_ones", quad, AR1),
        ("loglik_ones", loglik, AR1),
        ("trace_dlogl", -2.0 * (n - 1) * r2 * c / q, JACOBI),
        ("fisher_ss", 0.5 * n, FISHER),
        ("fisher_sl", -(n - 1) * r2 * c / q, FISHER),
        ("fisher_ll", (n - 1) * r2 * c * c * (1.0 + r2) / (q * q), FISHER),
    ]


def main() -> None:
    out = Path(__file__).with_name("check_values.csv")
    with out.open("w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["quantity", "kernel", "n", "spacing", "lengthscale", "variance",
                         "value", "source"])
        for n, h, ls, s2 in CASES:
            for quantity, value, source in rows(n, h, ls, s2):
                writer.writerow([quantity, "exponential", n, repr(h), repr(ls), repr(s2),
                                 repr(value), source])


if __name__ == "__main__":
    main()
