"""The ``buttress`` command: ``main(argv=None)`` with one small module per subcommand.

Each module in :mod:`topopt.commands` provides ``HELP`` (one line), ``add_arguments(parser)``
and ``run(args) -> int``. Errors caused by input (``ValueError``, ``TypeError``,
``OSError``) are printed as one line and give exit code 2.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import warnings

#: Subcommand name -> module implementing it.
COMMANDS: dict[str, str] = {
    "optimize": "topopt.commands.optimize",
    "sweep": "topopt.commands.sweep",
    "compare": "topopt.commands.compare",
    "inspect": "topopt.commands.inspect",
    "export": "topopt.commands.export",
}


def version_text() -> str:
    """Version, the solver ``auto`` would use and the BLAS libraries in use."""
    from topopt.solvers import blas_info, cholmod_available, cholmod_blas
    from topopt.version import __version__

    if cholmod_available():
        solver = f"cholmod (scikit-sparse; CHOLMOD linked to {cholmod_blas()})"
    else:
        solver = "scipy (SuperLU; CHOLMOD not installed: `make test` or `make demo` tries to install it)"
    return (
        f"buttress {__version__}\n"
        f"direct solver: {solver}\n"
        f"numpy BLAS: {blas_info()}\n"
        f"python: {sys.version.split()[0]}"
    )


class _VersionAction(argparse.Action):
    def __init__(self, option_strings, dest, **kwargs):
        super().__init__(option_strings, dest, nargs=0, help="show version, solver and BLAS, then exit")

    def __call__(self, parser, namespace, values, option_string=None):
        print(version_text())
        parser.exit(0)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every registered subcommand."""
    parser = argparse.ArgumentParser(
        prog="buttress",
        description="Support-aware topology optimisation for laser powder-bed fusion.",
        epilog="Results are a design aid; verify the final part with a full analysis and "
        "physical tests.",
    )
    parser.add_argument("--version", action=_VersionAction)
    parser.add_argument("--max-memory", default=None, metavar="GB",
                        help="refuse runs whose memory estimate exceeds GB gigabytes "
                             "(default: the machine's memory; also BUTTRESS_MAX_MEMORY)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, module_name in COMMANDS.items():
        module = importlib.import_module(module_name)
        p = sub.add_parser(name, help=module.HELP, description=module.__doc__)
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser


def _attach_direction_lists(argv: list[str]) -> list[str]:
    """Write ``--directions -x,+y`` as ``--directions=-x,+y``.

    argparse reads a value that starts with '-' as an option of its own, so a direction
    list that starts with a minus direction would be rejected unless joined with '='.
    The next word is attached whenever it is not an option (``--...``) or ``-h``; the
    command then judges it, so a misspelt list gets the command's own message.
    """
    out: list[str] = []
    i = 0
    while i < len(argv):
        word = argv[i]
        takes_list = len(word) >= 4 and "--directions".startswith(word)  # argparse allows prefixes
        if takes_list and i + 1 < len(argv):
            value = argv[i + 1]
            if value.startswith("-") and not value.startswith("--") and value != "-h":
                out.append(f"--directions={value}")
                i += 2
                continue
        out.append(word)
        i += 1
    return out


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = build_parser()
    argv = _attach_direction_lists(list(sys.argv[1:] if argv is None else argv))
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    from topopt.memory import ENV

    saved_cap = os.environ.get(ENV)
    with warnings.catch_warnings():
        # a warning from the library is one line on stderr, like an error (the filters
        # are left alone: the test run still turns warnings into errors)
        warnings.showwarning = _show_warning
        return _run(args, saved_cap)


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    print(f"buttress: warning: {_one_line(Exception(str(message)))}", file=sys.stderr)


def _run(args: argparse.Namespace, saved_cap: str | None) -> int:
    from topopt import interrupt
    from topopt.memory import ENV, parse_gigabytes

    try:
        # Ctrl-C and SIGTERM are recorded from here on, so none is lost (topopt.interrupt)
        with interrupt.handlers():
            if args.max_memory is not None:
                # the environment carries the cap to worker processes too
                os.environ[ENV] = str(parse_gigabytes(args.max_memory))
            return int(args._run(args) or 0)
    except KeyboardInterrupt:
        print("buttress: interrupted", file=sys.stderr)
        return 130
    except (ValueError, TypeError, OSError) as exc:
        if os.environ.get("BUTTRESS_DEBUG"):
            raise
        print(f"buttress: error: {_one_line(exc)}", file=sys.stderr)
        return 2
    except (MemoryError, RecursionError) as exc:
        # a last guard: the checks before work should have refused the input already
        if os.environ.get("BUTTRESS_DEBUG"):
            raise
        what = "out of memory" if isinstance(exc, MemoryError) else "input nested too deeply"
        print(f"buttress: error: {what} ({type(exc).__name__}); see --max-memory", file=sys.stderr)
        return 2
    finally:
        if args.max_memory is not None:
            if saved_cap is None:
                os.environ.pop(ENV, None)
            else:
                os.environ[ENV] = saved_cap


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    if isinstance(exc, OSError) and exc.filename and str(exc.filename) not in text:
        text = f"{exc.filename}: {text}"
    return " ".join(text.split())


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
