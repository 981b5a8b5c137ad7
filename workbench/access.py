"""Which files the workbench may read and write: the folder checks shared by the app's
"open file" control, its save/export controls and session files.

No plotting or widgets here (``workbench.session`` uses it too).

* :func:`resolve_data_path` gives the real path of an existing file (or Zarr folder) inside
  the data folders. The check is made on the fully resolved path, so ``..`` and symbolic
  links leading out are refused. A path that is outside the folders and one that does not
  exist get the SAME :class:`~workbench.errors.AccessError` message, so the check cannot be
  used to find out which files exist elsewhere on the machine.
* :func:`resolve_output_path` gives the real path a new file would have inside the output
  folder(s).
"""
from __future__ import annotations

import os
from pathlib import Path

from .errors import AccessError, InputError

__all__ = ["folders", "resolve_data_path", "resolve_output_path", "not_allowed_message"]


def folders(dirs) -> list[Path]:
    """The existing folders among ``dirs``, resolved (missing ones are dropped)."""
    out = []
    for d in dirs or []:
        p = Path(os.fspath(d)).expanduser().resolve()
        if p.is_dir() and p not in out:
            out.append(p)
    return out


def not_allowed_message(text, dirs, what="file") -> str:
    """The one message for a path that is outside the folders or not found in them."""
    where = ", ".join(str(f) for f in dirs) or "none configured"
    return (f"{what} {text!r} is outside the configured data folders or not found in them "
            f"({where}); only existing files inside those folders can be opened")


def resolve_data_path(path, data_dirs, what="file") -> Path:
    """The real path of ``path`` if it is an existing file (or folder, e.g. a Zarr store)
    inside one of ``data_dirs``; else :class:`AccessError` with one message for "outside" and
    "not found".

    A relative ``path`` is taken relative to each data folder in turn. ``what`` names the
    thing in the message (e.g. "the session's case file").
    """
    dirs = folders(data_dirs)
    if not dirs:
        raise AccessError("no data folders are configured, so no file can be opened from the "
                          "page; start the server with --data-folder FOLDER")
    text = os.fspath(path).strip() if path is not None else ""
    if not text or "\x00" in text:
        raise AccessError("give the name of a file inside the data folders")
    cand = Path(text).expanduser()
    tries = [cand] if cand.is_absolute() else [f / cand for f in dirs]
    for c in tries:
        try:
            real = c.resolve()
        except (OSError, RuntimeError):  # symlink loop, name too long
            continue
        if any(real == f or f in real.parents for f in dirs):
            try:
                ok = real != real.parent and (real.is_file() or real.is_dir()) and \
                    real not in dirs
            except OSError:
                ok = False
            if ok:
                return real
    raise AccessError(not_allowed_message(text, dirs, what))


def resolve_output_path(name, out_dirs, suffixes=None) -> Path:
    """The real path a file called ``name`` would have inside the output folders.

    A relative ``name`` is taken inside the first folder (subfolders that exist are fine);
    an absolute one must lie inside one of the folders. The check is made on the resolved
    path, so ``..`` and symbolic links leading out raise :class:`AccessError`. ``suffixes``
    (e.g. ``(".json",)``) limits the file types; a folder name is refused (InputError).
    The file need not exist (whether it may be replaced is the caller's business).
    """
    dirs = folders(out_dirs)
    if not dirs:
        raise AccessError("no output folder is configured, so nothing can be saved from the "
                          "page; start the server with --output-folder FOLDER (or --data-folder)")
    text = os.fspath(name).strip() if name is not None else ""
    if not text:
        raise InputError("give a file name to save to")
    if "\x00" in text:
        raise AccessError("file names cannot contain NUL characters")
    cand = Path(text).expanduser()
    if not cand.is_absolute():
        cand = dirs[0] / cand
    real = cand.resolve()
    if not any(f in real.parents for f in dirs):
        raise AccessError(f"{text!r} is outside the output folder "
                          f"({', '.join(str(f) for f in dirs)}); give a plain file name "
                          "(no '..' and no links leading out)")
    if real.is_dir():
        raise InputError(f"{text!r} is a folder; give a file name")
    if suffixes and real.suffix.lower() not in suffixes:
        raise InputError(f"{real.name} must end in {' or '.join(suffixes)}")
    return real
