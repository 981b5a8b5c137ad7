"""The interactive workbench: one Panel layout, inline in Jupyter and served in a browser.

``Workbench(case_or_path, data_dirs=None)`` builds the page on a shared
:class:`~workbench.state.State`: controls on the left (case, time, surface, field, mouse mode,
settings of the next lassoed piece, boundary pieces), the map in the middle with the pieces
list and the attribution table beside it, the section below and a status line at the top.
Display it in a notebook cell (``wb`` or ``pn.panel(wb)``) or serve it with :func:`serve` /
``pvwb serve CASE``.

Beside the map, four tabs: the attribution table (QG preview, refined to nonlinear balance in
the background), *Annotate* (text labels placed with the
"Place a label" mouse mode, highlighted regions lassoed when "A lasso makes" is set to
"highlighted region", delete the last / all), *Why & what if* (tendency attribution and QG
what-if runs, :class:`workbench.panels.WhatIfPanel`) and *Save & export*: save and load sessions
(:mod:`workbench.session`), the map and the active section as PNG/SVG/PDF
(:func:`workbench.views.static.map_figure` / ``section_figure`` + ``save_figure``), the
briefing PDF (:func:`workbench.brief.make_briefing`) and the pieces' balanced fields as netCDF
(:func:`workbench.export.export_balanced`); each written file is also offered for download.
Long work runs in the background with a progress read-out and Cancel
(:mod:`workbench.panels.jobs`).

Security: :func:`serve` binds 127.0.0.1 unless told otherwise, and any other address needs a
token (asked for on a login page). The page's "open file" control only opens files inside the
configured data folders (:func:`resolve_data_path`); a path outside them, or one climbing out
with ``..`` or a symbolic link, raises :class:`~workbench.errors.AccessError`. Files are read
by the netCDF/GRIB/Zarr readers of :mod:`workbench.io` only. Files are written only inside
the output folder (``output_dir``, default the first data folder; :func:`resolve_output_path`
refuses anything else with AccessError), atomically, and an existing file is replaced only when
the page's "Overwrite an existing file" box is ticked. Sessions are loaded from the data folders
and the output folder, and the case a session names (and a climatology file it gives as
``reference``) must lie in the data folders too; "outside" and "not found" get one message.
A session changed after it was saved is refused until the user presses "Load it anyway".
Every user- or file-supplied string put into HTML (case name and attributes, file names,
annotation texts, messages) goes through :func:`workbench.textsafe.escape`.
"""
from __future__ import annotations

import argparse
import math
import os
import secrets
import socket
import sys
import time
from pathlib import Path

import panel as pn

from .access import folders, resolve_data_path, resolve_output_path
from .errors import AccessError, InputError, WorkbenchError
from .state import State
from .textsafe import escape
from .panels.base import notebook_bundle, offline_extension, rule
from .panels.controls import MODE_LABELS
from .panels.export import case_stem
from .panels.sessions import list_session_files
from .panels.status import DATA_SUFFIXES, list_data_files
from .views.interactive import TextMarkdown

__all__ = ["Workbench", "serve", "main", "resolve_data_path", "resolve_output_path",
           "list_data_files", "list_session_files", "LOOPBACK"]

LOOPBACK = ("127.0.0.1", "localhost", "::1")

# --------------------------------------------------------------------------- data folders


# The folder checks live in workbench.access (shared with session files); the lists of data
# and session files in workbench.panels.
_folders = folders
_case_stem = case_stem


class Workbench:
    """The workbench page for a case (or for none yet: then only "open file" shows): the
    layout of the panels of :mod:`workbench.panels`, all on one shared State.

    Parameters
    ----------
    case_or_path : a :class:`workbench.Case`, a path to a case file, or None.
    data_dirs : folders the page may open files from (default: the case file's folder).
    state : optionally an existing :class:`State` to show (e.g. a reloaded session).
    output_dir : the folder sessions and exports are written to (default: the first data
        folder; it must exist).

    The panels are attributes (``controls``, ``map_panel``, ``section_panel``, ``lasso``,
    ``pieces``, ``attribution``, ``annotate``, ``export``, ``sessions``, ``status_panel``,
    ``files``); their widgets and actions are also reachable on the Workbench itself
    (``wb.surface``, ``wb.lasso_piece(...)``, ``wb.save_session_file()``...).
    """

    def __init__(self, case_or_path=None, data_dirs=None, state=None, width=820,
                 output_dir=None):
        offline_extension()
        from .io import open_case
        from . import panels as P

        case = case_or_path if case_or_path is not None else getattr(state, "case", None)
        if case is not None and not hasattr(case, "map_field"):
            case = open_case(case)
        if data_dirs is None and case is not None and case.source not in (None, "<in-memory>"):
            data_dirs = [str(Path(case.source).resolve().parent)]
        self.data_dirs = [str(p) for p in _folders(data_dirs)]
        if output_dir is not None:
            out = _folders([output_dir])
            if not out:
                raise InputError(f"output folder {output_dir!r} does not exist; create it or "
                                 "give an existing folder")
            self.output_dir = str(out[0])
        else:
            self.output_dir = self.data_dirs[0] if self.data_dirs else None
        self.width = width
        self.state = state if state is not None else State(case)
        if self.state.case is not case:
            self.state.set_case(case)
        self.state.page.param.update(data_dirs=list(self.data_dirs), output_dir=self.output_dir)
        st = self.state
        self.status_panel = P.StatusPanel(st)
        self.files = P.FilePanel(st)
        self.controls = P.CaseControls(st)
        self.lasso = P.LassoPanel(st)
        self.map_panel = P.MapPanel(st, width=width)
        self.section_panel = P.SectionPanel(st, width=width)
        self.pieces = P.PiecesPanel(st)
        self.attribution = P.AttributionPanel(st)
        self.annotate = P.AnnotationPanel(st)
        self.sessions = P.SessionPanel(st)
        self.export = P.ExportPanel(st)
        self.whatif = P.WhatIfPanel(st)  # tendency attribution and what-if runs (a tab)
        # overlay settings (sidebar) and the compare view (a tab beside the section; it
        # follows the State only while shown)
        self.overlay_settings = P.OverlayPanel(st)
        self.compare = P.ComparePanel(st, live=False)
        self._panels = [self.status_panel, self.files, self.controls, self.lasso,
                        self.map_panel, self.section_panel, self.pieces, self.attribution,
                        self.annotate, self.sessions, self.export, self.overlay_settings,
                        self.compare, self.whatif]
        self.attr_box = self.attribution.layout
        self.annotate_box = self.annotate.layout
        self.export_box = pn.Column(self.sessions.layout, self.export.layout,
                                    name="Save & export", sizing_mode="stretch_width")
        self.tabs = pn.Tabs(("Attribution", self.attr_box), ("Annotate", self.annotate_box),
                            ("Why & what if", self.whatif.layout),
                            ("Save & export", self.export_box), css_classes=["pvwb-tabs"],
                            sizing_mode="stretch_width", max_width=600)
        self.sidebar = pn.Column(self.controls.layout, rule(),
                                 self.lasso.layout, rule(),
                                 self.overlay_settings.layout,
                                 rule(), self.files.layout, width=280, css_classes=["pvwb-side"])
        self.hint = TextMarkdown("### No case open\nPick a file in the data folders on the "
                                 "left and press **Open**.", visible=case is None)
        self.side_tables = pn.Column(self.pieces.layout, self.tabs, min_width=300,
                                     sizing_mode="stretch_width", max_width=600,
                                     css_classes=["pvwb-tables"])
        self.main = pn.FlexBox(self.hint, self.map_panel.layout, self.side_tables,
                               flex_wrap="wrap", sizing_mode="stretch_width",
                               css_classes=["pvwb-main"])
        self.lower_tabs = pn.Tabs(("Section", self.section_panel.layout),
                                  ("Compare", self.compare.layout), dynamic=True,
                                  sizing_mode="stretch_width", css_classes=["pvwb-lower-tabs"])
        self.lower_tabs.param.watch(lambda ev: self.compare.follow(ev.new == 1), "active")
        self.layout = pn.Column(
            self.status_panel.layout,
            # the sidebar (280 px) and the rest (at least 520 px) side by side from 800 px
            # on, one column below
            pn.FlexBox(self.sidebar, pn.Column(self.main, self.lower_tabs,
                                               sizing_mode="stretch_width", min_width=520,
                                               styles={"flex": "1 1 520px"}),
                       flex_wrap="wrap", sizing_mode="stretch_width"),
            sizing_mode="stretch_width", name="PV Workbench", css_classes=["pvwb-page"])
        st.param.watch(lambda *ev: self._case_changed(), ["case"])
        self._case_changed()

    def _case_changed(self):
        st = self.state
        self.hint.visible = st.case is None
        self.side_tables.visible = st.case is not None
        if st.case is None:
            st.set_status("Open a case to start.", "info")
            return
        self.later(st.warm)  # anomaly and solver ready before the first lasso
        st.set_status(f"Case {st.case.name!r}: {len(st.case.times)} time(s), "
                      f"{len(st.case.levels_hpa)} levels. Lasso an anomaly to invert it.", "info")
        if getattr(self, "_warm_watch", None) is None:
            self._warm_watch = st.param.watch(lambda *ev: self.later(st.warm),
                                              ["time_index", "member", "reference"])

    # ---------------------------------------------------------------- the panels' API
    def __getattr__(self, name):
        # widgets and actions of the panels (wb.surface, wb.lasso_piece, wb.overwrite ...)
        if name.startswith("__") or name == "_panels":
            raise AttributeError(name)
        for p in self.__dict__.get("_panels", ()):
            if name in p.__dict__:
                return p.__dict__[name]
        for p in self.__dict__.get("_panels", ()):
            fn = getattr(type(p), name, None)
            if callable(fn) and not name.startswith("_"):
                return getattr(p, name)
        files = getattr(self.__dict__.get("export"), "files", None)
        if files is not None and hasattr(files, name):
            return getattr(files, name)
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")

    @property
    def map(self):
        """The map view (figure, sources) of the map panel."""
        return self.map_panel.view

    @property
    def section(self):
        """The section view of the section panel."""
        return self.section_panel.view

    def later(self, fn):
        return self.map_panel.later(fn)

    def _guard(self, fn, *args, **kwargs):
        return self.map_panel._guard(fn, *args, **kwargs)

    def _set_state(self, name, value):
        # the State validates field and surface together (no PV on the tropopause)
        setattr(self.state, name, value)

    def _refresh_session_list(self, select=None):
        return self.sessions.refresh_list(select)

    def detach(self):
        for p in self._panels:
            p.detach()

    # ---------------------------------------------------------------- display
    def __panel__(self):
        return self.layout

    def _repr_mimebundle_(self, include=None, exclude=None):
        return notebook_bundle(self.layout, include, exclude)

    def servable(self, title="PV Workbench"):
        return self.layout.servable(title=title)

    def show(self, **kwargs):
        return self.layout.show(**kwargs)


MODE_KEYS = MODE_LABELS


# --------------------------------------------------------------------------- serving


def _free_port(address):
    fam = socket.AF_INET6 if ":" in address else socket.AF_INET
    with socket.socket(fam, socket.SOCK_STREAM) as s:
        s.bind((address, 0))
        return s.getsockname()[1]


# --------------------------------------------------------------------------- token login

#: environment variable holding the served page's token (never the command line)
TOKEN_ENV = "PVWB_TOKEN"
#: shortest token accepted from the command line's sources
MIN_TOKEN_LENGTH = 8


class LoginThrottle:
    """Failed-login bookkeeping per client: after ``free`` failures in a row, each further failure
    locks the client out for ``base_s * 2**(n - free)`` seconds (at most ``max_s``); a request
    during a lockout is refused without checking the token; a success clears the record."""

    def __init__(self, free=5, base_s=1.0, max_s=300.0, clock=time.monotonic):
        self.free, self.base_s, self.max_s, self.clock = int(free), float(base_s), float(max_s), clock
        self._records = {}  # client -> [failures, locked_until, last_seen]

    def wait_s(self, client) -> float:
        """Seconds ``client`` must still wait before its next attempt (0 when it may try now)."""
        rec = self._records.get(client)
        return 0.0 if rec is None else max(0.0, rec[1] - self.clock())

    def failed(self, client) -> float:
        """Record a failure; returns the lockout now in force (s)."""
        now = self.clock()
        if len(self._records) > 10000:  # forget clients idle for an hour
            for key in [k for k, r in self._records.items() if now - r[2] > 3600]:
                del self._records[key]
        rec = self._records.setdefault(client, [0, 0.0, now])
        rec[0] += 1
        rec[2] = now
        if rec[0] >= self.free:
            rec[1] = now + min(self.max_s, self.base_s * 2.0 ** (rec[0] - self.free))
        return self.wait_s(client)

    def succeeded(self, client) -> None:
        self._records.pop(client, None)


def _token_auth_provider(token, throttle=None):
    """A Panel login page (``/login``) that accepts ``token`` as the password (any user name),
    compares in constant time and slows repeated failures down (:class:`LoginThrottle`, per
    client address; HTTP 429 with ``Retry-After`` while locked out)."""
    import hmac

    import tornado.escape
    from panel.auth import BasicAuthProvider, BasicLoginHandler

    secret = str(token).encode("utf-8")
    throttle = throttle or LoginThrottle()

    class TokenLoginHandler(BasicLoginHandler):
        def _validate(self, username, password):
            return hmac.compare_digest(str(password).encode("utf-8"), secret)

        def post(self):
            client = self.request.remote_ip or "?"
            wait = throttle.wait_s(client)
            if wait > 0:
                self.set_status(429)
                self.set_header("Retry-After", str(int(math.ceil(wait))))
                self.write(f"Too many failed logins from this address; try again in {math.ceil(wait):.0f} s.")
                return
            if self._validate(self.get_argument("username", ""), self.get_argument("password", "")):
                throttle.succeeded(client)
                return super().post()
            wait = throttle.failed(client)
            msg = "Invalid token." + (f" Too many failures: wait {math.ceil(wait):.0f} s." if wait else "")
            self.redirect(self.request.path + "?error=" + tornado.escape.url_escape(msg))

    class TokenAuthProvider(BasicAuthProvider):
        @property
        def login_handler(self):
            TokenLoginHandler._login_endpoint = self._login_endpoint
            TokenLoginHandler._login_template = self._login_template
            return TokenLoginHandler

    provider = TokenAuthProvider()
    provider.throttle = throttle
    return provider


def read_token(token_file=None, environ=None):
    """The served page's token: from ``token_file`` (first line, surrounding spaces dropped) if
    given, else from the environment variable PVWB_TOKEN, else None. InputError for an unreadable
    or empty file or a token shorter than MIN_TOKEN_LENGTH characters."""
    environ = os.environ if environ is None else environ
    if token_file is not None:
        path = Path(token_file).expanduser()
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeError) as exc:
            raise InputError(f"--token-file {str(token_file)!r} cannot be read "
                             f"({getattr(exc, 'strerror', None) or type(exc).__name__})") from None
        lines = text.strip().splitlines()
        token, where = (lines[0].strip() if lines else ""), f"--token-file {str(token_file)!r}"
    else:
        token, where = environ.get(TOKEN_ENV), TOKEN_ENV
        if token is None:
            return None
        token = token.strip()
    if not token:
        raise InputError(f"{where} holds no token; put a secret of at least {MIN_TOKEN_LENGTH} characters in it")
    if len(token) < MIN_TOKEN_LENGTH:
        raise InputError(f"the token in {where} is too short ({len(token)} characters); "
                         f"use at least {MIN_TOKEN_LENGTH}")
    return token


def check_binding(address, token):
    """Refuse a non-loopback address without a token (AccessError)."""
    if address not in LOOPBACK and not token:
        raise AccessError(
            f"refusing to serve on {address!r} without a token: anyone who can reach that "
            f"address could use the workbench. Put a secret in the environment variable {TOKEN_ENV} "
            "or in a file given with --token-file, or bind 127.0.0.1 (the default)")


def serve(case=None, address="127.0.0.1", port=0, data_dirs=None, token=None, show=False,
          start=True, verbose=True, output_dir=None):
    """Serve the workbench page; returns the Bokeh server (its ``.port`` is the real port).

    ``case``: a Case, a path or None. Each browser session gets its own State on the same
    Case (derived fields are cached once). ``address`` other than loopback needs ``token``
    (the page then asks for it). ``output_dir``: where the page saves sessions and exports
    (default the first data folder). With ``start=True`` this blocks until stopped.
    """
    from .io import open_case

    check_binding(address, token)
    if case is not None and not hasattr(case, "map_field"):
        case = open_case(case)
    if data_dirs is None and case is not None and case.source not in (None, "<in-memory>"):
        data_dirs = [str(Path(case.source).resolve().parent)]
    if output_dir is not None and not Path(output_dir).expanduser().is_dir():
        raise InputError(f"output folder {output_dir!r} does not exist; create it first")
    port = int(port)
    if not 0 <= port <= 65535:
        raise InputError(f"port {port} is out of range; give 1..65535 (or 0 for any free port)")
    try:
        port = port or _free_port(address)
    except OSError as exc:
        from .cli import os_error_message

        raise InputError(f"cannot listen on {address}: {os_error_message(exc)}") from None
    origins = [f"{address}:{port}"] + ([f"localhost:{port}", f"127.0.0.1:{port}"]
                                       if address in LOOPBACK else [])
    kw = {}
    if token:
        kw.update(auth_provider=_token_auth_provider(token), cookie_secret=secrets.token_hex(32))

    def page():
        return Workbench(case, data_dirs=data_dirs, output_dir=output_dir).layout

    try:
        server = pn.serve({"/": page}, port=port, address=address, websocket_origin=origins,
                          show=show, start=False, title="PV Workbench", verbose=False, **kw)
    except OSError as exc:  # port in use, address not on this machine
        from .cli import os_error_message

        raise InputError(f"cannot listen on {address} port {port}: {os_error_message(exc)}") from None
    host = f"[{address}]" if ":" in address else address
    if verbose:
        from .export import CAUTION

        print(f"PV Workbench at http://{host}:{server.port}/", flush=True)
        print(CAUTION, flush=True)
        if data_dirs:
            print("data folders: " + ", ".join(str(d) for d in _folders(data_dirs)), flush=True)
        out = _folders([output_dir]) if output_dir else _folders(data_dirs)[:1]
        if out:
            print(f"output folder: {out[0]}", flush=True)
    if start:
        server.start()
        try:
            server.io_loop.start()
        except KeyboardInterrupt:
            pass
    return server


def main(argv=None):
    """``pvwb serve [CASE ...] [--page-port N] [--page-address A] [--token-file F]
    [--data-folder D ...] [--output-folder O] [--open-page] [--region W,E,S,N] [--times SPEC]``
    (``--port``, ``--address``, ``--data-dir``, ``--output-dir``, ``--show`` are hidden aliases).

    The token (needed off loopback, optional on it) comes from the environment variable
    PVWB_TOKEN or from ``--token-file``, never from the command line, where every user of the
    machine could read it in the process list; ``--token`` is refused with that explanation.
    """
    from . import cli

    argv = list(sys.argv[1:] if argv is None else argv)
    if argv and argv[0] == "serve":
        argv = argv[1:]
    ap = cli.build_parser("pvwb serve", "Serve the PV Workbench page in a browser.")
    cli.add_case_argument(ap)
    cli.add_selection_options(ap)
    # the project's own option names; the older generic names stay accepted, hidden from --help
    hidden = argparse.SUPPRESS
    ap.add_argument("--page-port", dest="port", type=cli.port_number, default=0, metavar="N",
                    help="port of the page, 1..65535 (default 0: any free port)")
    ap.add_argument("--port", dest="port", type=cli.port_number, help=hidden)
    ap.add_argument("--page-address", dest="address", type=cli.host_address, default="127.0.0.1",
                    metavar="ADDRESS",
                    help=f"address the page listens on (default 127.0.0.1; others need the access key: "
                         f"{TOKEN_ENV} or --token-file)")
    ap.add_argument("--address", dest="address", type=cli.host_address, help=hidden)
    ap.add_argument("--token-file", dest="token_file", metavar="FILE",
                    help=f"file whose first line is the access key the page asks for (default: the "
                         f"environment variable {TOKEN_ENV})")
    ap.add_argument("--token", "--password", dest="cmdline_token", metavar="SECRET", help=hidden)
    ap.add_argument("--data-folder", action="append", dest="data_dirs", metavar="FOLDER",
                    help="folder the page may open files from (repeatable; default: the "
                         "case's folder)")
    ap.add_argument("--data-dir", action="append", dest="data_dirs", help=hidden)
    ap.add_argument("--output-folder", dest="output_dir", metavar="FOLDER",
                    help="folder the page saves sessions, figures and exports to (default: "
                         "the first data folder)")
    ap.add_argument("--output-dir", dest="output_dir", help=hidden)
    ap.add_argument("--open-page", dest="show", action="store_true",
                    help="open the page in a browser tab on this machine")
    ap.add_argument("--show", dest="show", action="store_true", help=hidden)
    args = ap.parse_args(argv)
    try:
        if args.cmdline_token is not None:
            raise InputError(f"a token on the command line is visible to every user in the process list; put it "
                             f"in the environment variable {TOKEN_ENV} or in a file given with --token-file")
        token = read_token(args.token_file)
        os.environ.pop(TOKEN_ENV, None)  # not inherited by child processes
        check_binding(args.address, token)
        if args.data_dirs:
            for d in args.data_dirs:
                if not Path(d).expanduser().is_dir():
                    raise InputError(f"data folder {d!r} does not exist; give an existing folder")
        if args.output_dir is not None and not Path(args.output_dir).expanduser().is_dir():
            raise InputError(f"output folder {args.output_dir!r} does not exist; create it first")
        case = cli.case_source(args.case)
        sel = cli.selection_options(args)
        if case is not None and sel:
            from .io import open_case

            case = open_case(case, **sel)
        serve(case, address=args.address, port=args.port, data_dirs=args.data_dirs,
              token=token, show=args.show, output_dir=args.output_dir)
    except WorkbenchError as exc:
        print(f"pvwb serve: error: {cli.one_line(exc)}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
