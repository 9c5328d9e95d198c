"""Owner-only files: everything sounding writes holds document text, queries or keys.

Folders are 0700 and files 0600 whatever the umask, and a folder or file that
already exists with looser bits (an index folder the user made, a database
written by an older sounding) is tightened when sounding opens it for writing.
``sounding check`` reports looser modes; ``--repair`` tightens them.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

FOLDER_MODE = 0o700
FILE_MODE = 0o600
_OTHERS = 0o077  # group and other bits: none may be set


def owner_only_folder(path: Path) -> None:
    """Create ``path`` (and missing parents) and make ``path`` itself owner-only.

    Only ``path`` is tightened: its parents are the user's (a home folder, /srv).
    """
    path.mkdir(parents=True, exist_ok=True, mode=FOLDER_MODE)
    tighten(path)


def create_owner_only(path: Path) -> None:
    """Create ``path`` empty if it is missing, mode 0600; tighten it if it exists.

    Done before SQLite opens a database, since SQLite creates its file with
    the umask's mode and gives the -wal and -shm files the database file's
    permissions (SQLite unix VFS: robustFchown and findCreateFileMode in
    os_unix.c); those two are tightened here too when left from before.
    """
    os.close(os.open(path, os.O_WRONLY | os.O_CREAT, FILE_MODE))
    for name in (str(path), f"{path}-wal", f"{path}-shm", f"{path}-journal"):
        tighten(Path(name))


def open_owner_only(path: Path) -> int:
    """A descriptor of ``path`` opened for writing (truncated), created or tightened 0600."""
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, FILE_MODE)
    if os.fstat(fd).st_mode & _OTHERS:
        os.fchmod(fd, FILE_MODE)
    return fd


def tighten(path: Path) -> bool:
    """Clear the group and other bits of ``path`` (not following links); whether it
    changed anything. A missing path changes nothing."""
    try:
        st = os.lstat(path)
    except FileNotFoundError:
        return False
    if stat.S_ISLNK(st.st_mode) or not st.st_mode & _OTHERS:
        return False
    os.chmod(path, stat.S_IMODE(st.st_mode) & ~_OTHERS)
    return True


def loose_modes(folder: Path) -> list[str]:
    """``folder`` and the entries in it that others may read, as ``name (mode 0644)``."""
    found: list[str] = []
    entries = [folder, *sorted(folder.iterdir())] if folder.is_dir() else []
    for path in entries:
        st = os.lstat(path)
        if not stat.S_ISLNK(st.st_mode) and st.st_mode & _OTHERS:
            name = "the index folder" if path == folder else path.name
            found.append(f"{name} (mode {stat.S_IMODE(st.st_mode):04o})")
    return found


def tighten_folder(folder: Path) -> int:
    """Tighten ``folder`` and every entry in it; how many were changed."""
    entries = [folder, *folder.iterdir()] if folder.is_dir() else []
    return sum(tighten(path) for path in entries)
