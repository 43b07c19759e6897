"""The ``workbench`` command line.

Each command is a module of :mod:`workbench.commands` with ``NAME``, ``HELP``,
``add_arguments(parser)`` and ``run(args) -> int``; adding a command is adding
a module. Bad usage or bad data: one line on stderr, exit status 2, no
traceback.
"""

from __future__ import annotations

import argparse
import importlib
import pkgutil
import sys
import warnings

from workbench import interrupts
from workbench.errors import OptionError, WorkbenchError, WorkbenchWarning

PROG = "workbench"


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors and exit status 2."""

    def error(self, message):
        # The printed line starts with "workbench: error:"; a command's parser adds its name.
        command = self.prog.removeprefix(PROG).strip()
        raise OptionError(f"{command}: {message}" if command else message)


def commands() -> dict:
    """Every command module by name, in a stable order."""
    import workbench.commands as package

    found = {}
    for info in sorted(pkgutil.iter_modules(package.__path__), key=lambda i: i.name):
        if info.name.startswith("_"):
            continue
        module = importlib.import_module(f"{package.__name__}.{info.name}")
        found[module.NAME] = module
    return found


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog=PROG, description="Check which assumption of a generative model holds.")
    sub = parser.add_subparsers(dest="command", parser_class=_Parser, metavar="COMMAND")
    for name, module in commands().items():
        module.add_arguments(sub.add_parser(name, help=module.HELP, description=module.HELP))
    return parser


def main(argv: list[str] | None = None, last: bool = False) -> int:
    """Run one command; returns the exit status.

    ``last`` means the process exits right after (the installed command).
    """
    argv = sys.argv[1:] if argv is None else argv
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if args.command is None:
            parser.print_help()
            raise OptionError(f"expected a command ({', '.join(commands())}); found none")
        # Library warnings stay off the terminal (a check keeps them in its
        # run folder's warnings.log); the workbench's own are shown.
        with interrupts.watched(last), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            warnings.simplefilter("default", WorkbenchWarning)
            code = commands()[args.command].run(args)
            interrupts.raise_if_interrupted()
        return code
    except WorkbenchError as err:
        print(f"{PROG}: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        return _interrupted()
    except Exception:
        # Compiled code that met the interrupt may fail with an error of its own.
        if interrupts.interrupted():
            return _interrupted()
        raise


def _interrupted() -> int:
    print(f"{PROG}: interrupted; finished files are kept", file=sys.stderr)
    return 130


def run() -> None:
    """The installed ``workbench`` command."""
    sys.exit(main(last=True))


if __name__ == "__main__":  # pragma: no cover
    run()
