"""Pieces shared by the sub-commands: the help formatter and deprecated option aliases."""

from __future__ import annotations

import argparse
import sys
from typing import Any


class HelpFormatter(argparse.RawDescriptionHelpFormatter):
    """Keeps the description's line breaks and adds "(default: X)" to an option's help, once:
    not when the help already states its default, nor for options without one (None, False,
    a suppressed default)."""

    def _get_help_string(self, action: argparse.Action) -> str:
        text = action.help or ""
        if "default" in text or "%(default)" in text:
            return text
        default = action.default
        if default is None or default is False or default is argparse.SUPPRESS:
            return text
        if action.option_strings and action.nargs != 0:
            return f"{text} (default: %(default)s)"
        return text


class DeprecatedAlias(argparse.Action):
    """An old option name kept working: stores into the new option's destination and prints
    one deprecation line on stderr. Hidden from --help."""

    def __init__(self, option_strings: list[str], dest: str, new: str = "", **kwargs: Any):
        self.new = new
        kwargs.setdefault("help", argparse.SUPPRESS)
        super().__init__(option_strings, dest, **kwargs)

    def __call__(
        self,
        parser: argparse.ArgumentParser,
        namespace: argparse.Namespace,
        values: Any,
        option_string: str | None = None,
    ) -> None:
        print(
            f"{parser.prog}: warning: {option_string} is deprecated; use {self.new}",
            file=sys.stderr,
        )
        setattr(namespace, self.dest, True if self.nargs == 0 else values)
