"""Option names and help texts: check --fixed-params (old name --params), what --param
does, and a default stated in --help for every option of every verb.

Expected texts are the project's own contract (README, "Check your own data";
harness/cli/help_format.py); argparse behaviour as documented in the Python library
reference (argparse: help=SUPPRESS hides an option, dest shares a value).
"""

from __future__ import annotations

import argparse

import pytest

from harness.cli import VERBS, build_parser
from harness.cli.check_command import options_from_args
from harness.cli.help_format import DefaultsHelpFormatter
from harness.cli.params import ParamSyntaxError

FIXED = ["variance=1", "lengthscale=0.2", "nugget=0.01"]
CHECK = ["check", "data.csv", "--coords", "x,y", "--value", "z", "--mean", "zero"]


def _verb_parsers() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {verb: sub.choices[verb] for verb in VERBS}


def test_fixed_params_and_its_old_name_skip_the_fit_alike():
    new = build_parser().parse_args([*CHECK, "--fixed-params", *FIXED])
    old = build_parser().parse_args([*CHECK, "--params", *FIXED])
    assert new.fixed_params == old.fixed_params == FIXED
    expected = {"variance": 1.0, "lengthscale": 0.2, "nugget": 0.01}
    assert options_from_args(new).fixed_params == expected
    assert options_from_args(old) == options_from_args(new)
    assert options_from_args(build_parser().parse_args(CHECK)).fixed_params is None


def test_fixed_params_messages_name_the_option():
    args = build_parser().parse_args([*CHECK, "--fixed-params", "lengthscale"])
    with pytest.raises(ParamSyntaxError, match=r"^--fixed-params 'lengthscale': expected "):
        options_from_args(args)


def test_param_holds_a_shape_parameter_or_starts_the_fit():
    args = build_parser().parse_args([*CHECK, "--param", "nu=1.5", "--param",
                                      "lengthscale=0.3", "--kernel", "matern"])
    options = options_from_args(args)
    assert options.shape == {"nu": 1.5} and options.start_params == {"lengthscale": 0.3}
    assert options.fixed_params is None
    text = " ".join(_verb_parsers()["check"].format_help().split())
    assert "a shape parameter (nu, alpha) is held at VALUE during the fit" in text
    assert "is a starting value of the fit" in text
    assert "--fixed-params NAME=VALUE" in text
    assert "--params" not in text.replace("--fixed-params", "")


@pytest.mark.parametrize("verb", VERBS)
def test_help_states_every_options_default(verb):
    parser = _verb_parsers()[verb]
    formatter = DefaultsHelpFormatter(prog=parser.prog)
    shown = [a for a in parser._actions
             if a.option_strings and a.help != argparse.SUPPRESS
             and not isinstance(a, argparse._HelpAction)]
    assert shown, f"{verb} has no options to check"
    for action in shown:
        text = (formatter._get_help_string(action) or "").lower()
        assert "default" in text or "(required)" in text, \
            f"covaudit {verb} {action.option_strings[0]}: no default in its help"
    parser.format_help()                                # every help renders


def test_help_defaults_read_as_words():
    text = " ".join(_verb_parsers()["check"].format_help().split())
    assert "--json one JSON object on standard output (default: off)" in text
    assert "(default: matern32)" in text and "(default: constant)" in text
    assert "--value VALUE column of observed values (required)" in text


def test_param_alone_gives_a_whole_starting_point():
    # a lone --param lengthscale=... once built a start without the nugget (a theta one
    # entry short, "operands could not be broadcast"); the others now come from the data
    import numpy as np

    from harness.check.fit_stage import start_from_params as _start_from_params
    from harness.check.fitting import data_scale

    args = build_parser().parse_args([*CHECK, "--param", "lengthscale=250"])
    options = options_from_args(args)
    rng = np.random.default_rng(3)
    x = rng.uniform(0, 1000, (50, 2))
    y = rng.standard_normal(50)
    from harness.model.kernels import make_kernel

    template = make_kernel("matern32", {"variance": 1.0, "lengthscale": 1.0, "nugget": 0.1})
    theta = _start_from_params(template, data_scale(x, y, mean=options.mean), options)
    assert theta.shape == template.theta.shape
    assert theta[1] == pytest.approx(np.log(250.0))        # the given value, on log scale


@pytest.mark.parametrize("verb", VERBS)
def test_a_default_written_in_a_help_text_is_the_options_own(verb):
    # a help text that writes "(default X)" by hand must name the value argparse holds:
    # check --preconditioner once said "default vecchia" while its default was hodlr
    import re

    stated = 0
    for action in _verb_parsers()[verb]._actions:
        if action.default is None or action.default is argparse.SUPPRESS:
            continue
        for match in re.finditer(r"\(default ([^)]*)\)", action.help or ""):
            word = re.split(r"[;,\s]", match.group(1).strip())[0].rstrip("/")
            try:
                same = float(word) == float(action.default)
            except (TypeError, ValueError):
                same = word == str(action.default)
            assert same, (f"covaudit {verb} {action.option_strings[0]}: help says default "
                          f"{word!r}, the option's default is {action.default!r}")
            stated += 1
    if verb == "check":
        assert stated >= 4                      # the check's hand-written defaults are seen
