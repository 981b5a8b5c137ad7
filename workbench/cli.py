"""The ``pvwb`` command line: serve | invert | brief | batch | sample | bench | info.

Each sub-command delegates to the module that owns the work; errors from
:mod:`workbench.errors` are printed as one clear line (exit status 2), never a traceback.
"""
from __future__ import annotations

import argparse
import sys

from .errors import WorkbenchError

USAGE = """pvwb <command> [options]

commands:
  info CASE                 describe a case file (times, levels, domain, variables)
  invert CASE               piecewise QG inversion and the attribution table at the storm centre
  brief CASE                a multi-page briefing PDF (maps, sections, attribution, caution)
  serve [CASE]              the interactive workbench in the browser (127.0.0.1 by default)
  batch CASE                the same pieces over every time / member, locally or on Dask
  sample [-o PATH]          rebuild the invented sample storm
  bench [--json]            inversion benchmarks (solver vs FFT, spsolve, PyAMG)

Run `pvwb <command> --help` for a command's options. CASE defaults to the bundled
invented sample storm where a command accepts it."""


def _delegate(module, argv):
    import importlib

    mod = importlib.import_module(f"workbench.{module}")
    return mod.main(argv)


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv or argv[0] in ("-h", "--help", "help"):
        print(USAGE)
        return 0
    if argv[0] in ("-V", "--version"):
        from . import __version__

        print(f"pvwb {__version__}")
        return 0
    cmd, rest = argv[0], argv[1:]
    import warnings

    # the package's own warnings (e.g. a domain where |f| varies a lot) as one "note:" line each
    seen = set()

    def show(message, category, *args, **kwargs):
        if str(message) not in seen:
            seen.add(str(message))
            print(f"note: {message}", file=sys.stderr)

    warnings.showwarning = show
    table = {"info": "analysis", "invert": "analysis", "brief": "brief", "serve": "app", "batch": "batch",
             "sample": "sample", "bench": "bench"}
    if cmd not in table:
        print(f"pvwb: unknown command {cmd!r}.\n\n{USAGE}", file=sys.stderr)
        return 2
    try:
        if cmd in ("info", "invert"):
            from . import analysis

            return int(analysis.main([cmd] + rest) or 0)
        return int(_delegate(table[cmd], rest) or 0)
    except WorkbenchError as exc:
        print(f"pvwb {cmd}: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


def build_parser(prog, description):
    return argparse.ArgumentParser(prog=prog, description=description)


if __name__ == "__main__":
    sys.exit(main())
