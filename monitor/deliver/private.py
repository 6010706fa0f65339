"""Files and directories only the service's own user may read.

The event queue, the state files and the captures hold what the plant's
machines did; they are made 0600 (files) and 0700 (directories) whatever the
umask, which outside systemd is often 0022 (world-readable). A file left
wider by an older version is narrowed when it is opened. Directories that
already exist are left as they are: they may be shared (/var/lib, /tmp).
"""

import errno
import os
import stat

FILE_MODE = 0o600
DIR_MODE = 0o700


def make_dirs(path: str) -> None:
    """Create `path` and any missing parents, each one 0700; existing ones stay as they are."""
    missing = []
    here = os.path.abspath(path)
    while not os.path.isdir(here):
        missing.append(here)
        parent = os.path.dirname(here)
        if parent == here:
            break
        here = parent
    for directory in reversed(missing):
        try:
            os.mkdir(directory, DIR_MODE)
        except FileExistsError:
            if not os.path.isdir(directory):
                raise NotADirectoryError(errno.ENOTDIR, "a file is in the way, not a directory", directory) from None
            continue
        os.chmod(directory, DIR_MODE)  # the umask may have taken bits off; never adds any


def narrow(path: str) -> None:
    """Make an existing file 0600 if it is wider (missing files are skipped)."""
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        return
    if stat.S_IMODE(mode) & 0o077:
        os.chmod(path, FILE_MODE)


def open_file(path: str, flags: int) -> int:
    """os.open with O_CREAT, the file 0600 whether new or old."""
    fd = os.open(path, flags | os.O_CREAT, FILE_MODE)
    try:
        if stat.S_IMODE(os.fstat(fd).st_mode) & 0o077:
            os.fchmod(fd, FILE_MODE)
    except BaseException:
        os.close(fd)
        raise
    return fd


def touch(path: str) -> None:
    """Create `path` (or narrow it) as 0600, so what opens it next keeps that mode."""
    os.close(open_file(path, os.O_WRONLY))
