"""The ``pairspread`` command line, generated from the manifest.

``pairspread list`` and ``pairspread describe NAME [--json]`` show the pack; every script is a
subcommand whose options come from its declared parameters. Values are passed as text to the
pack's one validator, so messages are the same as from Python. User mistakes print one line on
stderr and exit non-zero; ``--debug`` shows the traceback.
"""

from __future__ import annotations

import argparse
import json
import sys
import warnings
from collections.abc import Sequence

from . import __version__, interrupts
from .errors import PairspreadError, ParameterError, sentence
from .manifest import Param, Script, get_script, scripts
from .runner import run_script

__all__ = ["main", "build_parser"]


class UsageError(ParameterError):
    """A command line argparse cannot take (unknown option, missing value)."""


class _Parser(argparse.ArgumentParser):
    def __init__(self, *args, **kwargs):
        # no prefix matching: a shortened or mistyped option must not quietly select another
        kwargs.setdefault("allow_abbrev", False)
        super().__init__(*args, **kwargs)

    def error(self, message: str):  # one line, not a usage dump; main() prints it
        raise UsageError(f"{message} (see {self.prog} --help)")


def _add_param(parser: argparse.ArgumentParser, p: Param) -> None:
    help_text = p.help
    if p.default not in (None, False):
        help_text += f" Default: {p.default}."
    if p.kind == "dataset":
        parser.add_argument(p.name, metavar="DATASET", help=help_text)
    elif p.kind == "flag":
        parser.add_argument(p.option, dest=p.name, action="store_true", default=None, help=help_text)
    else:
        required = p.required or p.cli_required
        if required:
            help_text += " Required."
        metavar = {
            "columns": "F1,F2",
            "column": "FIELD",
            "layer-in-dataset": "LAYER",
            "name-in-file": "NAME",
            "result-table-file": "PATH",
            "result-layer-file": "PATH",
            "picture-file": "PATH.png",
            "second-dataset": "DATASET",
        }.get(p.kind)
        if p.kind == "choice":
            metavar = "{" + "|".join(p.choices) + "}"
        parser.add_argument(
            p.option, dest=p.name, metavar=metavar or p.name.upper(), required=required, help=help_text
        )


#: the exit statuses of every command (README "Exit status" says the same)
EXIT_STATUSES = """exit status:
  0    the script or chain ran; every output was written
  1    an unexpected failure (a bug or a library error); --debug shows the traceback
  2    a mistake in the command, a parameter, an input, an output or a chain file; nothing written
  3    --strict, and a group could not be computed as asked (see its note); nothing written
  130  interrupted (Ctrl-C); no output was written
  141  standard output was closed early (e.g. piped into head)
"""


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="pairspread",
        description="Distances between points, per group, with guaranteed bounds.",
        epilog=EXIT_STATUSES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"pairspread {__version__}")
    parser.add_argument("--debug", action="store_true", help="Show the full traceback on errors.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.add_parser("list", help="List the scripts of the pack.")
    describe = sub.add_parser("describe", help="Show a script's parameters.")
    describe.add_argument("script", metavar="SCRIPT")
    describe.add_argument("--json", action="store_true", help="Print the description as JSON.")
    chain = sub.add_parser("chain", help="Run a chain file: several scripts declared once (docs/chains.md).")
    chain.add_argument("file", metavar="FILE", help="The chain file (TOML).")
    chain.add_argument(
        "--set",
        dest="sets",
        action="append",
        default=[],
        metavar="STEP.PARAM=VALUE",
        help="Replace or add a step's parameter (repeatable); paths are relative to the current folder.",
    )
    chain.add_argument(
        "--dry-run", action="store_true", help="Check the chain and print the plan; run nothing."
    )
    chain.add_argument("--overwrite", action="store_true", help="Let every output replace an existing one.")
    chain.add_argument(
        "--strict",
        action="store_true",
        help="Stop at the first step with a group that cannot be computed, before its outputs are "
        "written (exit status 3).",
    )
    chain.add_argument("--quiet", action="store_true", help="No progress bars and no messages on success.")
    chain.add_argument("--debug", action="store_true", help="Show the full traceback on errors.")
    for script in scripts().values():
        if script.name in sub.choices:  # a pack's script named like a command: refuse that one
            warnings.warn(
                f"Skipping script {script.name!r} of pack {script.pack!r}: {script.name!r} is a "
                f"command of pairspread itself ({', '.join(sub.choices)}); the pack should rename it.",
                UserWarning,
                stacklevel=2,
            )
            continue
        sp = sub.add_parser(
            script.name,
            help=script.summary,
            description=script.summary,
            epilog=EXIT_STATUSES,
            formatter_class=argparse.RawDescriptionHelpFormatter,
        )
        for p in script.params:
            _add_param(sp, p)
        sp.add_argument("--debug", action="store_true", help="Show the full traceback on errors.")
    return parser


def _describe_text(script: Script) -> str:
    lines = [f"{script.name}: {script.summary}", ""]
    for p in script.params:
        spelling = "DATASET" if p.kind == "dataset" else p.option
        extra = []
        if p.choices:
            extra.append("one of " + ", ".join(p.choices))
        if p.min is not None or p.max is not None:
            extra.append(f"range [{p.min}, {p.max}]")
        if p.default not in (None, False):
            extra.append(f"default {p.default}")
        suffix = f" ({'; '.join(extra)})" if extra else ""
        lines.append(f"  {spelling:<16} {p.kind}{suffix}")
        lines.append(f"  {'':<16} {p.help}")
    return "\n".join(lines)


def _print_table(table) -> None:
    import pandas as pd

    from .tables import for_display

    shown = for_display(table)  # a null group and an empty-text one print differently
    if shown.empty:  # the header alone, not pandas' "Empty DataFrame" text
        print("  ".join(str(c) for c in shown.columns))
        return
    with pd.option_context("display.max_rows", 200, "display.width", 200, "display.max_columns", 50):
        print(shown.to_string(index=False, float_format=lambda v: f"{v:.6g}"))


def _run(argv: list[str]) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    if args.command == "list":
        for script in scripts().values():
            print(f"{script.name:<20} {script.summary}")
        return 0
    if args.command == "describe":
        script = get_script(args.script)
        print(json.dumps(script.describe(), indent=2) if args.json else _describe_text(script))
        return 0
    if args.command == "chain":
        from .chain import command

        return command(args, print_table=_print_table)
    script = get_script(args.command)
    values = {p.name: getattr(args, p.name) for p in script.params}
    values = {k: v for k, v in values.items() if v is not None}
    result, written = run_script(script, values, cli=True)
    interrupts.check()  # a Ctrl-C swallowed by a library during the run still stops it here
    if written is None:
        _print_table(result)
    elif written != "standard output" and not values.get("quiet"):
        print(f"pairspread: wrote {len(result)} row(s) to {written}", file=sys.stderr)
    if values.get("map") and not values.get("quiet"):
        print(f"pairspread: drew the map in {values['map']}", file=sys.stderr)
    return 0


def _committed() -> list[str]:
    """Outputs written so far (without loading the writer just to ask)."""
    writer = sys.modules.get("toolbox.layers.write")
    return list(writer.COMMITTED) if writer is not None else []


def _interrupted(before: int) -> int:
    done = _committed()[before:]
    if done:  # the interrupt came after an output was renamed into place
        print(f"pairspread: interrupted after writing {', '.join(done)}.", file=sys.stderr)
    else:
        print("pairspread: interrupted; no output was written.", file=sys.stderr)
    return 130


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the console script and of ``python -m toolbox``."""
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    before = len(_committed())
    with warnings.catch_warnings(record=True) as caught, interrupts.watching():
        warnings.simplefilter("always")
        try:
            return _run(argv)
        except PairspreadError as exc:
            if interrupts.seen() and not debug:  # a library turned the Ctrl-C into an error of its own
                return _interrupted(before)
            if debug:
                raise
            print(f"pairspread: error: {sentence(str(exc))}", file=sys.stderr)
            return exc.exit_code
        except KeyboardInterrupt:
            return _interrupted(before)
        except BrokenPipeError:
            return 141
        except Exception as exc:  # a bug or an unforeseen library failure: still one line
            if interrupts.seen() and not debug:  # e.g. pandas' start-up: "could not import module pandas"
                return _interrupted(before)
            if debug:
                raise
            print(
                f"pairspread: error: unexpected {type(exc).__name__}: {exc} (run again with --debug "
                "for the traceback and please report it)",
                file=sys.stderr,
            )
            return 1
        finally:
            shown = set()
            for w in caught:  # once each, in our own format, after the run
                text = str(w.message)
                if issubclass(w.category, UserWarning) and text not in shown:
                    shown.add(text)
                    print(f"pairspread: warning: {sentence(text)}", file=sys.stderr)
