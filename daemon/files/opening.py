"""Open an input for reading, safely: without following links or blocking on FIFOs, a
regular file only; errors that may pass (out of descriptors, permissions not yet set)
are raised as they are, to be retried in order, the others refuse the input."""
from __future__ import annotations

import errno
import os
import stat as stat_mod
from pathlib import Path
from typing import BinaryIO

from shoal.daemon.errors import InputRefused, InputVanished

__all__ = ["open_input"]

# Errors of opening an input that may pass: out of descriptors or memory, permissions
# not yet set by the producer, an I/O error.
_TRANSIENT_OPEN = frozenset({errno.EMFILE, errno.ENFILE, errno.ENOMEM, errno.EACCES,
                             errno.EPERM, errno.EIO, errno.EAGAIN, errno.EINTR})


def open_input(path: Path) -> BinaryIO:
    """Open a regular file for reading without following links or blocking on FIFOs."""
    flags = os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC
    try:
        fd = os.open(path, flags)
    except FileNotFoundError as exc:
        raise InputVanished(f"{path.name} no longer exists") from exc
    except OSError as exc:  # ELOOP: a symlink; ENXIO: a socket
        if exc.errno in _TRANSIENT_OPEN:
            raise   # retried in order (the service's fault path), not refused for good
        raise InputRefused(f"{path.name} cannot be opened as a regular file: "
                           f"{exc.strerror}") from exc
    st = os.fstat(fd)
    if not stat_mod.S_ISREG(st.st_mode):
        os.close(fd)
        raise InputRefused(f"{path.name} is not a regular file")
    os.set_blocking(fd, True)
    return os.fdopen(fd, "rb")
