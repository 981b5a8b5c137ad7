"""The sessions panel: save the State as a session file in the output folder, load one from
the data and output folders (integrity checks of :mod:`workbench.session`; a changed file is
loaded only after "Load it anyway")."""
from __future__ import annotations

from pathlib import Path

import panel as pn

from ..access import folders as _folders
from ..access import resolve_data_path, resolve_output_path
from ..errors import AccessError, InputError, SessionError
from .base import StatePanel
from .export import FileTarget, case_stem

__all__ = ["SessionPanel", "list_session_files"]


def list_session_files(folders, limit=200):
    """Session files (``*.json``) in ``folders``, newest first, as ``{label: absolute path}``."""
    found = []
    for f in _folders(folders):
        for p in f.rglob("*.json"):
            rel = p.relative_to(f)
            if any(part.startswith(".") for part in rel.parts) or not p.is_file():
                continue
            found.append((p.stat().st_mtime, f"{f.name}/{rel}", str(p.resolve())))
    found.sort(key=lambda t: -t[0])
    out = {}
    for _, label, path in found:
        if path not in out.values():
            out[label] = path
        if len(out) >= limit:
            break
    return out


class SessionPanel(StatePanel):
    """Save / load sessions (watches nothing of the State: it writes and replaces it)."""

    def build(self):
        from ..views.interactive import TextMarkdown

        st = self.state
        if st.case is None:
            return []
        self.files = FileTarget.of(st)
        self.session_name = pn.widgets.TextInput(
            label="Session file", width=285, css_classes=["pvwb-session-name"],
            placeholder=f"blank: {case_stem(st.case)}_session.json")
        self.save_session_button = pn.widgets.Button(label="Save session", color="primary",
                                                     width=110, margin=(23, 5, 5, 5),
                                                     css_classes=["pvwb-save-session"])
        self.session_select = pn.widgets.Select(label="Saved sessions (data and output folders)",
                                                options={}, width=285,
                                                css_classes=["pvwb-session-list"])
        self.load_session_button = pn.widgets.Button(label="Load session", width=110,
                                                     margin=(23, 5, 5, 5),
                                                     css_classes=["pvwb-load-session"])
        self.load_anyway_button = pn.widgets.Button(
            label="Load it anyway (I changed it)", width=285, visible=False,
            color="warning", css_classes=["pvwb-load-anyway"])
        self.save_session_button.on_click(lambda e: self._guard(self.save_session_file))
        self.load_session_button.on_click(lambda e: self._guard(self.load_session_file))
        self.load_anyway_button.on_click(lambda e: self._guard(self.load_modified_session))
        self._pending_session = None
        self.refresh_list()
        return [TextMarkdown("**Session** (pieces, sections, annotations, settings)",
                             margin=(4, 8, 0, 8)),
                pn.FlexBox(self.session_name, self.save_session_button),
                pn.FlexBox(self.session_select, self.load_session_button),
                self.load_anyway_button]

    # ---------------------------------------------------------------- folders
    def _write_folders(self):
        out = self.state.page.output_dir
        return [out] if out else []

    def _read_folders(self):
        out = list(self.state.page.data_dirs)
        o = self.state.page.output_dir
        if o and o not in out:
            out.append(o)
        return out

    def refresh_list(self, select=None):
        files = list_session_files(self._read_folders())
        self.session_select.options = files
        if select is not None and str(select) in files.values():
            self.session_select.value = str(select)

    # ---------------------------------------------------------------- save
    def save_session_file(self, name=None):
        """Save the whole State as a session file in the output folder (refusing to replace
        an existing file unless "Overwrite" is ticked); returns the path."""
        from ..session import save_session

        st = self.state
        text = name if name is not None else (self.session_name.value_input or
                                              self.session_name.value or "").strip()
        text = text or f"{case_stem(st.case)}_session.json"
        if not Path(text).suffix:
            text += ".json"
        path = resolve_output_path(text, self._write_folders(), (".json",))
        self.files.refuse_existing(path, SessionError, "session file")
        overwrite = bool(self.files.overwrite.value)

        def job():
            save_session(st, path, overwrite=overwrite)
            self.refresh_list(select=path)

        self.work(f"Saving session {path.name}", job,
                  lambda: self.files.written(path, "Session saved to"))
        return path

    # ---------------------------------------------------------------- load
    def _session_case(self, doc, path):
        """The case a session document names: the open case when the checksum matches (or
        when it is the very file recorded), else the recorded file if it is in the data
        folders (one AccessError for "not in the data folders" and "not found")."""
        from ..io import open_case

        data_dirs = list(self.state.page.data_dirs)
        block = doc["case"]
        cur = self.state.case
        if cur is not None and block.get("sha256") and cur.checksum == block.get("sha256"):
            return cur
        cands = []
        if isinstance(block.get("relative_path"), str):
            cands.append(path.parent / block["relative_path"])
        cands.append(Path(block["path"]))
        for c in cands:
            try:
                real = resolve_data_path(c, data_dirs)
            except (AccessError, InputError):
                continue
            if cur is not None and cur.source not in (None, "<in-memory>") and \
                    Path(str(cur.source)).resolve() == real:
                return cur  # the same file: load_session names both checksums
            return open_case(real)
        raise AccessError(f"the session's case {block['path']!r} is not in the data folders "
                          f"or not found there ({', '.join(data_dirs) or 'none'}); copy "
                          "it there or start the server with --data-folder on its folder")

    def load_session_file(self, name=None, accept_modified=False):
        """Load a session file from the data or output folders into the page (the case it
        names must be in the data folders). A bad file leaves the page as it was and its
        SessionError message in the status line. A session changed after it was saved (or
        without a body checksum) is refused and "Load it anyway" appears; it loads it with
        ``accept_modified=True``."""
        from ..session import (SessionModifiedError, check_body, check_caps,
                               read_session_file, state_from_session)

        text = name if name is not None else self.session_select.value
        if not text:
            raise InputError("pick a saved session in the list first")
        path = resolve_data_path(text, self._read_folders(), what="session file")
        self.load_anyway_button.visible = False
        self._pending_session = None
        st = self.state

        def job():
            doc = read_session_file(path)
            check_caps(doc, path)  # before anything is opened or computed
            try:
                check_body(doc, path, accept_modified)
            except SessionModifiedError:
                self._pending_session = str(path)
                self.load_anyway_button.visible = True
                raise
            new = state_from_session(doc, self._session_case(doc, path), path,
                                     data_dirs=list(st.page.data_dirs),
                                     accept_modified=accept_modified)
            if new.case is not st.case:
                st.set_case(new.case)
            st.assign(new)

        def done():
            return (f"Loaded session {path.name}" + (" (changed after saving; loaded as "
                                                     "confirmed)" if accept_modified else "")
                    + f": {len(st.pieces)} piece(s), {len(st.sections)} section(s), "
                    f"{len(st.annotations)} annotation(s)")

        self.work(f"Loading session {path.name}", job, done)
        return path

    def load_modified_session(self):
        """The confirm step: load the session just refused as changed, accepting the change."""
        pending = getattr(self, "_pending_session", None)
        if not pending:
            raise InputError("there is no refused session to load; pick one and press "
                             "“Load session” first")
        return self.load_session_file(pending, accept_modified=True)
