"""The ``pvwb`` command line: serve | invert | brief | batch | sample | bench | info.

Each sub-command delegates to the module that owns the work (its ``main(argv)``). Whatever
goes wrong because of the user's input or the machine is reported as ONE line on stderr with
exit status 2, never a traceback:

* the package's own errors (:mod:`workbench.errors`),
* argument errors (argparse usage errors go through :class:`Parser`, one line + a hint),
* operating-system errors (read-only folder, no space left, a folder given as ``-o``, a port in
  use, a scheduler that does not answer): :func:`os_error_message`.

``pvwb --debug COMMAND ...`` (or ``PVWB_DEBUG=1``) shows the traceback instead. An error that
is none of these (a bug) is also one line, exit status 1, with a pointer to ``--debug``.
``pvwb --quiet COMMAND ...`` switches off progress bars (they are also off when stderr is not
a terminal); :func:`progress` is the one way commands draw them (tqdm, shown only for steps
that last more than about two seconds).

The argument types shared by the sub-commands live here too: :func:`port_number`,
:func:`host_address`, :func:`count`, :func:`parse_region`, :func:`parse_times`.
"""
from __future__ import annotations

import argparse
import errno
import math
import os
import sys

from .errors import InputError, WorkbenchError
from .views.styles import domain_label, lat_label, lat_range, lon_label, lon_range

USAGE = """pvwb [--debug] [--quiet] <command> [options]

commands:
  info CASE                 describe a case file (times, levels, domain, variables)
  invert CASE               piecewise QG inversion and the attribution table at the storm centre
  brief CASE                a multi-page briefing PDF (maps, sections, attribution, caution)
  serve [CASE]              the interactive workbench in the browser (127.0.0.1 by default)
  batch CASE                the same pieces over every time / member, locally or on Dask
  sample [-o PATH]          rebuild the invented sample storm
  bench [--json]            inversion benchmarks (solver vs FFT, spsolve, PyAMG)
  explain CASE --time T     QG tendency attribution: which piece's wind moves which piece's PV
  whatif CASE --piece NAME  QG what-if experiment (scale/remove/shift a piece), not a forecast
  track CASE --pieces FILE  shares over time of pieces that follow their anomaly (table, plot)
  animate CASE -o loop.gif  animated map loop over the case's times (GIF; MP4 with ffmpeg)

global options (before the command):
  --debug                   show the full traceback of an error (also PVWB_DEBUG=1)
  --quiet                   no progress bars

Run `pvwb <command> --help` for a command's options. CASE defaults to the bundled
invented sample storm where a command accepts it."""

COMMANDS = {"info": "analysis", "invert": "analysis", "brief": "brief", "serve": "app", "batch": "batch",
            "sample": "sample", "bench": "bench", "explain": "tendency", "whatif": "whatif",
            "track": "track_cli", "animate": "animate"}

#: set by ``pvwb --quiet`` (or a command's own ``--quiet``): no progress bars
QUIET = False


# --------------------------------------------------------------------------- argument parsing


class Parser(argparse.ArgumentParser):
    """ArgumentParser whose usage errors are one line (plus a pointer to ``--help``), exit 2."""

    def error(self, message):
        message = " ".join(str(message).split())
        self.exit(2, f"{self.prog}: error: {message} (see `{self.prog} --help`)\n")


def build_parser(prog, description=None, **kwargs) -> Parser:
    return Parser(prog=prog, description=description, **kwargs)


def _number(text, kind):
    try:
        value = float(text)
    except (TypeError, ValueError):
        raise argparse.ArgumentTypeError(f"{text!r} is not a number; give {kind}") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"{text!r} is not a finite number; give {kind}")
    return value


def port_number(text) -> int:
    """A TCP port 1..65535, or 0 meaning "any free port"."""
    try:
        value = int(str(text).strip())
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"port {text!r} is not a whole number; give 1..65535 (or 0 for any free port)") from None
    if not 0 <= value <= 65535:
        raise argparse.ArgumentTypeError(f"port {value} is out of range; give 1..65535 (or 0 for any free port)")
    return value


def host_address(text) -> str:
    """An IPv4/IPv6 address or a host name this machine can resolve; brackets around IPv6 are dropped."""
    import ipaddress
    import socket

    value = str(text).strip()
    if value.startswith("[") and value.endswith("]"):
        value = value[1:-1]
    if not value:
        raise argparse.ArgumentTypeError("empty address; give e.g. 127.0.0.1, ::1 or a host name")
    try:
        return str(ipaddress.ip_address(value))
    except ValueError:
        pass
    if any(c.isspace() for c in value) or "/" in value or len(value) > 253:
        raise argparse.ArgumentTypeError(f"{value!r} is not an IP address or a host name")
    try:
        socket.getaddrinfo(value, None)
    except (OSError, UnicodeError):
        raise argparse.ArgumentTypeError(
            f"{value!r} is not an IP address and does not resolve as a host name on this machine") from None
    return value


def count(minimum=1, maximum=None, what="count"):
    """An argparse type: a whole number within [minimum, maximum]."""

    def parse(text):
        try:
            value = int(str(text).strip())
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
        if value < minimum or (maximum is not None and value > maximum):
            upper = f"..{maximum}" if maximum is not None else " or more"
            raise argparse.ArgumentTypeError(f"{value} is out of range; give {minimum}{upper}")
        return value

    parse.__name__ = what
    return parse


def positive_number(what="value"):
    def parse(text):
        value = _number(text, "a positive number")
        if value <= 0:
            raise argparse.ArgumentTypeError(f"{text!r} must be positive")
        return value

    parse.__name__ = what
    return parse


def parse_region(text):
    """``W,E,S,N`` in degrees -> (west, east, south, north) floats.

    The region runs east from W to E: W > E means across the date line (170,-170 is 20 degrees
    wide, as is 170,190); -90 <= south < north <= 90; longitudes within -360..360.
    """
    parts = [p.strip() for p in str(text).split(",")]
    if len(parts) != 4 or not all(parts):
        raise argparse.ArgumentTypeError(f"region {text!r} must be four numbers W,E,S,N (e.g. -80,20,20,75)")
    w, e, s, n = (_number(p, "W,E,S,N in degrees") for p in parts)
    if not (-90 <= s <= 90 and -90 <= n <= 90):
        raise argparse.ArgumentTypeError(f"region {text!r}: latitudes must be within -90..90")
    if s >= n:
        raise argparse.ArgumentTypeError(f"region {text!r}: south ({s:g}) must be less than north ({n:g})")
    if not (-360 <= w <= 360 and -360 <= e <= 360):
        raise argparse.ArgumentTypeError(f"region {text!r}: longitudes must be within -360..360")
    if w == e:
        raise argparse.ArgumentTypeError(f"region {text!r}: west and east are equal; give a region of "
                                         "some width (W < E, or W > E across the date line)")
    if e - w > 360:
        raise argparse.ArgumentTypeError(f"region {text!r} is wider than 360 degrees of longitude")
    return (w, e, s, n)


def _time_item(text):
    text = text.strip()
    if text.lstrip("-").isdigit():
        return int(text)
    import numpy as np

    try:
        np.datetime64(text, "ns")
    except Exception:
        raise argparse.ArgumentTypeError(
            f"time {text!r} is neither an index nor an ISO time (e.g. 2051-02-10T00)") from None
    return text


def parse_times(text):
    """Time selection: ``A..B`` (inclusive range of indices or of ISO times) or ``A,B,C`` (a list).

    Returns a ``slice`` (ISO times: ``slice("A", "B")``, label based and inclusive; indices:
    ``slice(a, b + 1)``) or a list of indices / ISO strings, as ``open_case(times=...)`` takes.
    """
    text = str(text).strip()
    if not text:
        raise argparse.ArgumentTypeError("empty time selection; give A..B or A,B,C (indices or ISO times)")
    if ".." in text:
        a, _, b = text.partition("..")
        a, b = _time_item(a), _time_item(b)
        if type(a) is not type(b):
            raise argparse.ArgumentTypeError(f"times {text!r}: both ends must be indices or both ISO times")
        if isinstance(a, int):
            if a < 0 or b < a:
                raise argparse.ArgumentTypeError(f"times {text!r}: give 0 <= first <= last")
            return slice(a, b + 1)
        import numpy as np

        if np.datetime64(b, "ns") < np.datetime64(a, "ns"):
            raise argparse.ArgumentTypeError(f"times {text!r}: the first time is after the last")
        return slice(a, b)
    items = [_time_item(x) for x in text.split(",")]
    if any(isinstance(x, int) and x < 0 for x in items):
        raise argparse.ArgumentTypeError(f"times {text!r}: indices must be >= 0")
    return items


def add_selection_options(parser):
    """``--region W,E,S,N`` and ``--times SPEC``: what ``open_case`` reads before anything is computed."""
    parser.add_argument("--region", type=parse_region, metavar="W,E,S,N", default=None,
                        help="read only this region, in degrees (e.g. -80,20,20,75)")
    parser.add_argument("--times", type=parse_times, metavar="SPEC", default=None,
                        help="read only these times: A..B (inclusive) or A,B,C; indices or ISO times")


def add_case_argument(parser, what="case"):
    """The case as one or more files (``pvwb info a.grib2 b.grib2``): a file, a folder, a glob
    pattern, or several files of one case split by time, which ``open_case`` joins."""
    parser.add_argument("case", nargs="*", metavar="CASE",
                        help=f"{what} file(s): netCDF, GRIB2 or Zarr; several files (or a folder, or a "
                             "quoted glob pattern) of one case split by time are joined (default: the "
                             "invented sample storm)")


def case_source(value):
    """What ``open_case`` takes for the files given by :func:`add_case_argument`: None (no file),
    the path itself for one file, the list for several."""
    if value is None or isinstance(value, str):
        return value or None
    value = [str(v) for v in value]
    if not value:
        return None
    return value[0] if len(value) == 1 else value


#: the one name of the option that lets a command replace an existing output file
OVERWRITE = "--overwrite"


def add_overwrite_option(parser, *aliases):
    """``--overwrite`` (the one name, in every command that writes files); older names given in
    ``aliases`` stay accepted but are hidden from ``--help``."""
    parser.add_argument(OVERWRITE, dest="overwrite", action="store_true",
                        help="replace an existing output file (without it an existing file is refused)")
    for alias in aliases:
        parser.add_argument(alias, dest="overwrite", action="store_true", help=argparse.SUPPRESS)


def selection_options(args) -> dict:
    """The ``open_case`` keywords of :func:`add_selection_options` that were given."""
    out = {}
    if getattr(args, "region", None) is not None:
        out["region"] = args.region
    if getattr(args, "times", None) is not None:
        out["times"] = args.times
    return out


def check_inversion_domain(case):
    """Refuse (DomainError) before any work a domain that reaches the equator (constant-f0 QG),
    naming the cut that fixes it (``--region W,E,S,N``)."""
    from .errors import DomainError

    d = case.domain
    if d["lat_min"] <= 0.0 <= d["lat_max"]:
        south = d["lat_max"] > -d["lat_min"]
        cut = (f"{d['lon_min']:g},{d['lon_max']:g},{5 if south else d['lat_min']:g},"
               f"{d['lat_max'] if south else -5:g}")
        raise DomainError(f"the domain spans {lat_range(d['lat_min'], d['lat_max'])} and reaches the equator, "
                          "where QG inversion with a constant f0 does not hold; cut it to one hemisphere, "
                          f"e.g. --region {cut}")


def check_target(case, target):
    """Refuse (InputError) a target (lon, lat, hPa) outside the case's domain or levels, and
    (DomainError) a domain the inversion cannot take (:func:`check_inversion_domain`)."""
    check_inversion_domain(case)
    if target is None:
        return target
    lon, lat, p = target
    d = case.domain
    if not all(math.isfinite(x) for x in target):
        raise InputError(f"--target {lon:g},{lat:g},{p:g} has a non-finite value")
    lon_in = d["lon_min"] <= lon <= d["lon_max"] or d["lon_min"] <= lon + 360 <= d["lon_max"] \
        or d["lon_min"] <= lon - 360 <= d["lon_max"]
    if not (lon_in and d["lat_min"] <= lat <= d["lat_max"]):
        raise InputError(
            f"--target {lon:g},{lat:g} ({lon_label(lon, None)}, {lat_label(lat, None)}) lies outside the "
            f"domain ({domain_label(d)}); give a point inside it")
    lev = case.levels_hpa
    if not float(lev.min()) <= p <= float(lev.max()):
        raise InputError(f"--target pressure {p:g} hPa is outside the levels of the case "
                         f"({float(lev.max()):g}..{float(lev.min()):g} hPa)")
    return target


def check_pieces(case, pieces):
    """Refuse (InputError) an interior piece whose polygon encloses no grid point of the case."""
    if not pieces:
        return pieces
    from .inversion.pieces import polygon_mask

    lon, lat = case.data["longitude"].values, case.data["latitude"].values
    d = case.domain
    for piece in pieces:
        if getattr(piece, "polygon", None) is None:
            continue
        if not polygon_mask(piece.polygon, lon, lat).any():
            xs = [x for x, _ in piece.polygon]
            ys = [y for _, y in piece.polygon]
            raise InputError(
                f"piece {piece.name!r}: its polygon ({lat_range(min(ys), max(ys))}, {lon_range(min(xs), max(xs))}) "
                f"encloses no grid point of the domain ({domain_label(d)}); draw it inside the domain")
    return pieces


def check_output(path, overwrite, suffixes=None, what="output", option="-o"):
    """Refuse (InputError) an output path that cannot be written, before any work is done;
    messages name the path as given to ``option``."""
    from pathlib import Path

    p = Path(path).expanduser()
    if p.is_dir():
        raise InputError(f"{option} {path!r} is a folder; give a file name inside it")
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"{option} {path!r}: folder {str(parent)!r} does not exist; create it first")
    from .export import temp_file_next_to

    try:  # a real probe (permissions, read-only file systems, also for root)
        with temp_file_next_to(p):
            pass
    except OSError as exc:
        raise InputError(f"{option} {path!r}: cannot write in folder {str(parent)!r}: "
                         f"{os_error_message(exc, with_path=False)}") from None
    if suffixes and p.suffix.lower() not in suffixes:
        raise InputError(f"{option} {path!r}: the {what} must end in {' or '.join(suffixes)}")
    if p.exists() and not overwrite:
        raise InputError(f"{option} {path!r} already exists; pass --overwrite to replace it, or choose another name")
    return p


# --------------------------------------------------------------------------- progress


def progress_enabled(quiet=False, stream=None) -> bool:
    """Bars only on a terminal, and not with ``--quiet``."""
    stream = sys.stderr if stream is None else stream
    if quiet or QUIET:
        return False
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False


def progress(iterable=None, total=None, desc=None, enabled=None, unit="step"):
    """A tqdm bar on stderr over ``iterable`` that appears only once the step has lasted about two
    seconds; a plain pass-through when disabled (``enabled=None``: :func:`progress_enabled`)."""
    enabled = progress_enabled() if enabled is None else bool(enabled)
    from tqdm.auto import tqdm

    return tqdm(iterable, total=total, desc=desc, unit=unit, disable=not enabled, delay=2.0,
                file=sys.stderr, leave=False, dynamic_ncols=True)


# --------------------------------------------------------------------------- errors


_ERRNO_HINTS = {
    errno.EACCES: "permission denied (is the folder read-only or owned by someone else?)",
    errno.EPERM: "operation not permitted",
    errno.EROFS: "the file system is read-only; choose another folder",
    errno.ENOSPC: "no space left on the device; free some space or choose another folder",
    errno.EDQUOT: "disk quota exceeded; free some space or choose another folder",
    errno.EISDIR: "it is a folder; give a file name",
    errno.ENOTDIR: "a part of the path is not a folder",
    errno.ENOENT: "no such file or folder",
    errno.EADDRINUSE: "the address/port is in use; choose another --page-port (or 0 for any free port)",
    errno.EADDRNOTAVAIL: "this machine has no such address; give one of its own addresses (e.g. 127.0.0.1)",
    errno.ECONNREFUSED: "connection refused (nothing listens there)",
    errno.EHOSTUNREACH: "host unreachable",
    errno.ENETUNREACH: "network unreachable",
    errno.ETIMEDOUT: "timed out",
    errno.ENAMETOOLONG: "the file name is too long",
    errno.EFBIG: "the file is too large for this file system or for the process's file-size limit",
    errno.EMFILE: "too many open files",
}


def os_error_message(exc: BaseException, with_path: bool = True) -> str:
    """One line for an OSError: what failed (on which path, unless ``with_path=False``), and what to do."""
    if isinstance(exc, TimeoutError) and not getattr(exc, "errno", None):
        return f"timed out: {exc}" if str(exc) else "timed out"
    err = getattr(exc, "errno", None)
    hint = _ERRNO_HINTS.get(err) or getattr(exc, "strerror", None) or str(exc) or type(exc).__name__
    where = [repr(str(x)) for x in (getattr(exc, "filename", None), getattr(exc, "filename2", None))
             if x and with_path]
    return f"{hint}: {' -> '.join(where)}" if where else hint


def one_line(text) -> str:
    return " ".join(str(text).split())


def _split_global(argv):
    """Pull --debug/--quiet out of the arguments (before the command, or anywhere after it)."""
    debug = os.environ.get("PVWB_DEBUG", "").strip().lower() in ("1", "yes", "true")
    quiet = False
    rest = []
    for i, a in enumerate(argv):
        if a == "--":
            rest.extend(argv[i:])
            break
        if a == "--debug":
            debug = True
        elif a == "--quiet" and not rest:
            quiet = True
        else:
            rest.append(a)
    return debug, quiet, rest


def _finish(code: int, grace_s: float = 3.0) -> int:
    """End of a ``pvwb`` process: remove temporary files; after an interrupt (exit status 130,
    or 128 + a signal) a daemon watchdog ends the process ``grace_s`` seconds later if the
    interpreter's shutdown is still waiting for a busy thread-pool worker, so Ctrl-C always
    ends the run."""
    import threading

    from .export import remove_live_temps

    remove_live_temps()
    if code >= 128:
        def watchdog():
            import time

            time.sleep(grace_s)
            remove_live_temps()
            for stream in (sys.stdout, sys.stderr):
                try:
                    stream.flush()
                except Exception:
                    pass
            os._exit(code)

        threading.Thread(target=watchdog, name="pvwb-exit-watchdog", daemon=True).start()
    return code


def main(argv=None) -> int:
    """Run ``pvwb``; returns the exit status. Called without ``argv`` (the ``pvwb`` script,
    ``python -m workbench.cli``) it owns the process and makes sure the process can end
    (:func:`_finish`); called with ``argv`` (tests, other programs) it only returns."""
    if argv is None:
        try:
            code = _main(sys.argv[1:])
        except KeyboardInterrupt:  # a second Ctrl-C during clean-up
            code = 130
        except SystemExit as exc:  # SIGTERM during clean-up; --debug re-raises
            if exc.code not in (0, None) and not isinstance(exc.code, int):
                raise
            code = exc.code or 0
        return _finish(code)
    return _main(list(argv))


# options whose value may start with a minus sign (a western or southern edge, a target)
_SIGNED_VALUE_OPTIONS = ("--region", "--target", "--centre", "--center")


def _join_negative_values(args):
    """``--region -40,10,35,70`` -> ``--region=-40,10,35,70``: argparse would take a value that
    starts with '-' and holds a comma for an option."""
    out, i = [], 0
    while i < len(args):
        a = args[i]
        if a in _SIGNED_VALUE_OPTIONS and i + 1 < len(args) and len(args[i + 1]) > 1 \
                and args[i + 1][0] == "-" and (args[i + 1][1].isdigit() or args[i + 1][1] == "."):
            out.append(f"{a}={args[i + 1]}")
            i += 2
            continue
        out.append(a)
        i += 1
    return out


def _main(argv) -> int:
    global QUIET
    argv = list(argv)
    debug, quiet, argv = _split_global(argv)
    QUIET = quiet
    if not argv or argv[0] in ("-h", "--help", "help"):
        print(USAGE)
        return 0
    if argv[0] in ("-V", "--version"):
        from . import __version__

        print(f"pvwb {__version__}")
        return 0
    cmd, rest = argv[0], _join_negative_values(argv[1:])
    if cmd not in COMMANDS:
        print(f"pvwb: error: unknown command {cmd!r}; choose from {', '.join(COMMANDS)} (see `pvwb --help`)",
              file=sys.stderr)
        return 2
    import warnings

    # the package's own warnings (e.g. a domain where |f| varies a lot) as one "note:" line each
    seen = set()

    def show(message, category, *args, **kwargs):
        if str(message) not in seen:
            seen.add(str(message))
            print(f"note: {one_line(message)}", file=sys.stderr)

    warnings.showwarning = show
    from .export import install_exit_handlers

    install_exit_handlers()
    try:
        import importlib

        mod = importlib.import_module(f"workbench.{COMMANDS[cmd]}")
        return int(mod.main(([cmd] if cmd in ("info", "invert") else []) + rest) or 0)
    except SystemExit as exc:  # argparse (usage errors: 2, --help: 0) and SIGTERM/SIGHUP (128 + n)
        if debug and exc.code not in (0, None):
            raise
        code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 2)
        if code > 128:
            print(f"pvwb {cmd}: terminated", file=sys.stderr)
        return code
    except KeyboardInterrupt:
        if debug:
            raise
        print(f"pvwb {cmd}: interrupted", file=sys.stderr)
        return 130
    except WorkbenchError as exc:
        if debug:
            raise
        print(f"pvwb {cmd}: error: {one_line(exc)}", file=sys.stderr)
        return 2
    except (OSError, MemoryError) as exc:
        if debug:
            raise
        if isinstance(exc, MemoryError):
            msg = "not enough memory; select fewer times or a smaller region (--times, --region)"
        else:
            msg = os_error_message(exc)
        print(f"pvwb {cmd}: error: {one_line(msg)}", file=sys.stderr)
        return 2
    except Exception as exc:  # a bug: still one line unless --debug
        if debug:
            raise
        print(f"pvwb {cmd}: internal error: {type(exc).__name__}: {one_line(exc)[:300]} "
              "(run `pvwb --debug ...` for the traceback and report it)", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())


def member_arg(case, text):
    """The ``--member`` value as the case's member index or label (checked, one-line error)."""
    member = text
    if member is not None and str(member).isdigit():
        member = int(member)
    case.member_index(member)
    return member


def time_arg(case, text):
    """The ``--time`` value as an index or ISO time (checked against the case, one-line error);
    None stays None."""
    if text is None:
        return None
    time = int(text) if str(text).lstrip("-").isdigit() else text
    case.time_index(time)
    return time
