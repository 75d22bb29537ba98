"""Files the user names: checked before any work (so nothing is computed in vain), written atomically at the end.

The one place for both, shared by every command that writes a file (tables, plots, angle
files, transfer CSVs) and by the reference cache.
"""

from __future__ import annotations

import errno
import os
import tempfile
from pathlib import Path

from .errors import InputError

__all__ = ["check_output_file", "write_text_atomic", "os_error_text"]


def check_output_file(path: str | os.PathLike, suffix: str | None = None, option: str = "--output") -> Path:
    """Validate a file to be written later: a file name (with ``suffix``), in an existing writable folder.

    Raises InputError with one line naming what was found.
    """
    text = str(path)
    if not text.strip():
        raise InputError(f"{option} needs a file name" + (f" ending in {suffix}, e.g. result{suffix}" if suffix else ""))
    path = Path(text)
    if suffix is not None:
        if path.name.lower() == suffix:
            raise InputError(f"{option} {text!r} has no file name before {suffix}; write e.g. result{suffix}")
        if path.suffix.lower() != suffix:
            raise InputError(f"{option} {text!r} must end with {suffix}")
    if path.is_dir() or text.endswith(("/", os.sep)):
        raise InputError(f"{option} {text!r} is a folder; give a file name inside it")
    parent = path.parent if str(path.parent) else Path(".")
    if parent.exists() and not parent.is_dir():
        raise InputError(f"{option} {text!r}: {str(parent)!r} is a file, not a folder")
    if not parent.is_dir():
        raise InputError(f"{option} {text!r}: folder {str(parent)!r} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"{option} {text!r}: folder {str(parent)!r} is not writable")
    if path.exists() and not os.access(path, os.W_OK):
        raise InputError(f"{option} {text!r} exists and is not writable")
    return path


#: what a failed write most often means, by errno
_ERRNO_HINTS = {
    errno.EFBIG: "a file-size limit: see `ulimit -f`",
    errno.ENOSPC: "the disk is full",
    errno.EDQUOT: "the disk quota is used up",
    errno.EROFS: "a read-only file system",
}


def os_error_text(exc: OSError) -> str:
    """One line for an OS error: its reason, errno name and (if known) the file, e.g.
    "File too large (errno 27 EFBIG: a file-size limit: see `ulimit -f`)"."""
    name = errno.errorcode.get(exc.errno or 0, "")
    hint = _ERRNO_HINTS.get(exc.errno or 0)
    detail = f"errno {exc.errno} {name}".strip() + (f": {hint}" if hint else "") if exc.errno else ""
    text = exc.strerror or str(exc) or type(exc).__name__
    if detail:
        text += f" ({detail})"
    text = "; ".join([text, *getattr(exc, "__notes__", [])])
    return f"{exc.filename}: {text}" if exc.filename else text


def write_text_atomic(path: str | os.PathLike, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` through a temporary file beside it and a rename.

    A reader never sees a half-written file; the file gets the usual permissions of a new
    file (0666 less the umask), not the 0600 of the temporary file.
    """
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent if str(path.parent) else ".")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; give the usual permissions of a new file
        os.replace(tmp, path)
    except BaseException as exc:
        if os.path.exists(tmp):
            os.unlink(tmp)
        if isinstance(exc, OSError) and exc.errno:
            failed = OSError(exc.errno, exc.strerror, str(path))
            failed.add_note("nothing was written")
            raise failed from None
        raise
