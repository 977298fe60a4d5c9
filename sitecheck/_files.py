"""Writing files safely, in one place: atomic writes confined to one folder.

Used by the renderers (every file of a report, :mod:`sitecheck.render.safety`), by
:meth:`sitecheck.harmonise.methods.HarmonisationFit.save` and by the commands. A neutral private
module, so that a stage that must not import a renderer (the analyses, the harmoniser) can still
write a file the one way.
"""
from __future__ import annotations

import os
import tempfile
from typing import Any


def confined(out_dir: str, rel: str) -> str:
    """Absolute path of ``rel`` inside ``out_dir``; refuses anything outside (a ``ValueError``)."""
    base = os.path.realpath(out_dir)
    path = os.path.realpath(os.path.join(base, rel))
    if os.path.commonpath([base, path]) != base:
        raise ValueError(f"refusing to write outside the output directory: {rel!r}")
    return path


def atomic_write(out_dir: str, rel: str, data: Any) -> str:
    """Write text (UTF-8, newlines as given) or bytes to ``out_dir/rel`` through a temporary file in
    the same folder and a rename, so that a reader never sees half a file and an interrupted write
    leaves the old file (or none). The file is private to the user (mode 0600, as the temporary
    file is created). Returns the path.

    Examples
    --------
    >>> import os, tempfile
    >>> from sitecheck._files import atomic_write
    >>> folder = tempfile.mkdtemp()
    >>> path = atomic_write(folder, "note.txt", "written whole\\n")
    >>> open(path, encoding="utf-8").read(), sorted(os.listdir(folder))
    ('written whole\\n', ['note.txt'])
    """
    path = confined(out_dir, rel)
    os.makedirs(os.path.dirname(path), exist_ok=True)
    mode = "wb" if isinstance(data, (bytes, bytearray)) else "w"
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=os.path.dirname(path))
    try:
        with os.fdopen(fd, mode, **({} if mode == "wb" else {"encoding": "utf-8", "newline": ""})) as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def atomic_write_path(path: str, data: Any) -> str:
    """:func:`atomic_write` to a file named by its own path (its folder is the confinement)."""
    full = os.path.abspath(path)
    return atomic_write(os.path.dirname(full), os.path.basename(full), data)


def publish(path: str) -> str:
    """Give a written file the permissions the user's umask gives new files (an atomic write's
    temporary file is private, mode 0600): for tables a user writes to share within the project."""
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(path, 0o666 & ~umask)
    return path
