"""``--help`` that shows every option's default.

``DefaultsHelpFormatter`` appends ``(default: ...)`` to each option's help unless the
help already states its default in words (it contains the word "default", as in
``default: from n``); a required option says ``(required)``. A flag reads ``(default:
off)``, an option without a value until given ``(default: none)``, a repeatable option
``(default: none given)``. ``build_parser`` makes every verb's parser a
``DefaultsArgumentParser``.
"""

from __future__ import annotations

import argparse
from typing import Any


class DefaultsHelpFormatter(argparse.HelpFormatter):
    """``argparse.HelpFormatter`` that states each option's default."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        text = action.help
        if (text is None or text == argparse.SUPPRESS or not action.option_strings
                or action.default is argparse.SUPPRESS or "default" in text.lower()):
            return text
        if action.required:
            return f"{text} (required)"
        return f"{text} (default: {default_text(action)})"


def default_text(action: argparse.Action) -> str:
    """How ``--help`` names ``action``'s default (``%`` escaped for argparse)."""
    default = action.default
    if action.nargs == 0 and isinstance(default, bool):
        return "on" if default else "off"
    if default is None:
        return "none"
    if isinstance(default, list | tuple) and not default:
        return "none given"
    if isinstance(default, list | tuple):
        return ",".join(str(v) for v in default).replace("%", "%%")
    return str(default).replace("%", "%%")


class DefaultsArgumentParser(argparse.ArgumentParser):
    """An ``ArgumentParser`` whose ``--help`` uses ``DefaultsHelpFormatter`` unless told
    otherwise (the parser class of the verbs' subparsers)."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        kwargs.setdefault("formatter_class", DefaultsHelpFormatter)
        super().__init__(*args, **kwargs)
