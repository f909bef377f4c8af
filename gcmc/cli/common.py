"""Pieces shared by the sub-commands: the help formatter, deprecated option aliases, the
reader of number files (pressures, widths) and the output of a check's report."""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

import numpy as np

from gcmc.errors import InputError


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


def read_number_file(path: str, option: str, unit: str, minimum: int = 1) -> np.ndarray:
    """Positive numbers from a text file (separated by white space, commas or new lines; '#'
    starts a comment): at least ``minimum`` of them, else an InputError naming the option,
    the file and the line. ``unit`` (e.g. " Pa") is shown in the range message."""
    p = Path(path)
    try:
        text = p.read_text()
    except OSError as exc:
        raise InputError(f"{option} {path}: cannot read ({exc.strerror or exc})") from None
    values = []
    for lineno, line in enumerate(text.splitlines(), 1):
        for tok in line.split("#", 1)[0].replace(",", " ").split():
            try:
                v = float(tok)
            except ValueError:
                raise InputError(
                    f"{option} {path}: line {lineno}: {tok!r} is not a number"
                ) from None
            if not math.isfinite(v) or v <= 0:
                raise InputError(
                    f"{option} {path}: line {lineno}: {tok} must be finite and > 0{unit}"
                )
            values.append(v)
    if len(values) < minimum:
        raise InputError(f"{option} {path}: need at least {minimum}, found {len(values)}")
    return np.array(values)


def check_report_folder(report: str | None) -> None:
    """Refuse a ``--report`` path that exists and is not a folder (InputError naming it)."""
    if report is not None and Path(report).exists() and not Path(report).is_dir():
        raise InputError(f"--report {report}: exists and is not a folder")


def emit_check_report(
    report: Any, table: str | None, written: list[Path], report_dir: str | None
) -> int:
    """Print a check's report and return its exit code.

    Parameters
    ----------
    report : CheckReport or SetReport
        Anything with ``to_dict()`` and ``exit_code``.
    table : str or None
        The text table to print; None prints the report as JSON (``to_dict()``) instead.
    written : list of Path
        The report files written (listed in the JSON, counted after the table).
    report_dir : str or None
        The report folder, named after the table.

    Returns
    -------
    int
        ``report.exit_code``.
    """
    if table is None:
        out = report.to_dict()
        if written:
            out["report_files"] = [str(p) for p in written]
        json.dump(out, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        print(table)
        if written:
            print(f"report: {len(written)} file(s) in {report_dir}")
    return report.exit_code
