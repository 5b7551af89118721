"""Reading an input file at the edge: regular files only, with a size limit, never blocking.

Every input the tool reads (protocol, runs file, decision log) comes in
through :func:`read_input`. A path that names a FIFO, a device, a socket or
a folder is refused at once (``os.stat`` before opening, and the open
itself is non-blocking, so a FIFO swapped in between cannot hang the
read); a file larger than its limit is refused before it is read; a
missing or unreadable file is refused. Every refusal is raised as the
caller's error class, so each kind of input keeps one exit code whatever
went wrong with it (protocol 3, runs 4, log 5; see the README).
"""

from __future__ import annotations

import os
import stat

from guardband.planner.errors import GuardbandError

__all__ = ["read_input", "read_toml", "read_regular_bytes", "InputFileError", "file_kind"]

_CHUNK = 1 << 20


def file_kind(mode: int) -> str:
    """A plain name for what a non-regular path is ("a folder", "a FIFO (named pipe)", ...)."""
    if stat.S_ISDIR(mode):
        return "a folder"
    if stat.S_ISFIFO(mode):
        return "a FIFO (named pipe)"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a regular file"


class InputFileError(OSError):
    """A path that is not a regular file, or a file larger than the limit (``strerror`` says which)."""

    def __init__(self, message: str):
        super().__init__(message)
        self.strerror = message


def _refuse_kind(mode: int) -> None:
    if not stat.S_ISREG(mode):
        raise InputFileError(f"it is {file_kind(mode)}, not a regular file; give the path of a regular file")


def _refuse_size(size: int, max_bytes: int) -> None:
    if size > max_bytes:
        raise InputFileError(f"it holds more than {max_bytes:,} bytes, the most the tool reads for "
                             "this kind of file; is it the right file?")


def read_regular_bytes(path: str | os.PathLike, max_bytes: int) -> bytes:
    """The bytes of a regular file of at most ``max_bytes``; OSError otherwise (never blocks).

    Raises
    ------
    FileNotFoundError, PermissionError, ...
        As the operating system reports them.
    InputFileError
        The path is a folder, FIFO, device or socket, or the file is too large.
    """
    path = os.fspath(path)
    info = os.stat(path)
    _refuse_kind(info.st_mode)
    _refuse_size(info.st_size, max_bytes)
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0))
    try:
        _refuse_kind(os.fstat(fd).st_mode)  # swapped after the stat?
        chunks, total = [], 0
        while True:
            chunk = os.read(fd, _CHUNK)
            if not chunk:
                break
            total += len(chunk)
            _refuse_size(total, max_bytes)  # grew while read
            chunks.append(chunk)
    finally:
        os.close(fd)
    return b"".join(chunks)


def read_input(path: str | os.PathLike, *, what: str, error: type[GuardbandError], max_bytes: int) -> bytes:
    """The bytes of an input file, or ``error`` naming the file and what is wrong.

    Parameters
    ----------
    path : str or path-like
    what : str
        The kind of input, as messages name it ("protocol", "runs", "decision log").
    error : GuardbandError subclass
        Raised for every refusal (missing, unreadable, not a regular file, too large).
    max_bytes : int
        Largest size read (see :mod:`planner.settings`).
    """
    try:
        return read_regular_bytes(path, max_bytes)
    except OSError as exc:
        raise error(f"{os.fspath(path)}: cannot read the {what} file ({exc.strerror or exc})") from None


def read_toml(path: str | os.PathLike, *, what: str, error: type[GuardbandError], max_bytes: int,
              max_nesting: int) -> dict:
    """A TOML input file (a protocol, a scenario file) read as :func:`read_input` reads any input,
    decoded as UTF-8 and parsed; every failure is ``error`` naming the file."""
    import tomllib

    raw = read_input(path, what=what, error=error, max_bytes=max_bytes)
    name = os.fspath(path)
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise error(f"{name}: the {what} is not UTF-8 text (byte {exc.start})") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise error(f"{name}: not valid TOML: {exc}") from None
    except RecursionError:
        raise error(f"{name}: tables or arrays nest too deeply to read (more than "
                    f"{max_nesting} levels are refused)") from None
