"""Kernel parameters are declared once per class and every consumer reads the declarations."""

import math

import pytest

from harness.model.kernels import KERNEL_CLASSES, KernelParameterError, make_kernel


@pytest.mark.parametrize("cls", KERNEL_CLASSES, ids=lambda c: c.family)
def test_declarations_cover_every_field_and_theta(cls):
    names = [spec.name for spec in cls.PARAMETERS]
    assert len(names) == len(set(names))
    fields = set(cls.__dataclass_fields__)
    assert set(names) <= fields
    kernel = make_kernel(cls.family, {"lengthscale": 0.3, "nugget": 0.1, "nu": 1.5}
                         if cls.family == "matern" else
                         {"lengthscale": 0.3, "nugget": 0.1})
    # theta holds exactly the non-shape parameters, on the log scale (DEVELOPERS.md,
    # How to add a kernel).
    fitted = [s.name for s in cls.PARAMETERS if not s.shape]
    assert fitted == ["variance", "lengthscale", "nugget"]
    assert kernel.param_names == ("log_variance", "log_lengthscale", "log_nugget")
    assert set(kernel.shape_params) == {s.name for s in cls.PARAMETERS if s.shape}


@pytest.mark.parametrize("name,value,phrase", [
    ("variance", 0.0, "variance must be a finite number > 0"),
    ("variance", math.inf, "variance must be a finite number > 0"),
    ("nugget", -1e-3, "nugget must be a finite number >= 0"),
    ("alpha", 0.0, "alpha must be a finite number > 0"),
])
def test_domain_errors_name_the_parameter_and_its_domain(name, value, phrase):
    family = "rational_quadratic" if name == "alpha" else "gaussian"
    with pytest.raises(KernelParameterError, match=phrase):
        make_kernel(family, {"lengthscale": 0.2, name: value})


def test_required_and_unknown_parameters_come_from_the_declarations():
    with pytest.raises(KernelParameterError, match="'nu' is required"):
        make_kernel("matern", {"lengthscale": 0.2})
    with pytest.raises(KernelParameterError, match="it takes alpha, lengthscale, nugget"):
        make_kernel("rational_quadratic", {"lengthscale": 0.2, "nu": 2.0})
    with pytest.raises(KernelParameterError, match="lengthscale\\[2\\] must be"):
        make_kernel("gaussian", {"lengthscale": [0.2, -1.0]})


def test_fit_bounds_are_multiples_of_the_data_scale():
    # covaudit's own heuristic (common practice): s2 in [1e-4 v, 1e3 v].
    spec = KERNEL_CLASSES[0].parameter("variance")
    lo, hi = spec.fit_bounds(2.0)
    assert lo == pytest.approx(math.log(2e-4)) and hi == pytest.approx(math.log(2e3))
    with pytest.raises(KernelParameterError, match="has no parameter 'alpha'"):
        KERNEL_CLASSES[0].parameter("alpha")
