"""The project's error types, and the guarded reading of a user's input file.

Every error a user can cause subclasses :class:`AdaptiveEngineError`, which itself
subclasses :class:`ValueError`, so callers may catch either.  Errors that concern a
place in a file carry that place in ``location`` (``"line 7"``, ``"item W-012"``,
``"[stopping] se"``) and the CLI prints them as ``LOCATION: problem``.
"""

from __future__ import annotations

import os
import stat
from typing import Iterable, NamedTuple


class Problem(NamedTuple):
    """One problem found while validating user input."""

    location: str
    message: str

    def __str__(self) -> str:
        return f"{self.location}: {self.message}" if self.location else self.message


class AdaptiveEngineError(ValueError):
    """Base class of every error caused by user input or misuse of the library.

    Parameters
    ----------
    problems : str or iterable of Problem
        A single message, or the list of problems found.
    location : str, optional
        Where a single-message error happened.
    """

    def __init__(self, problems: "str | Iterable[Problem]", location: str = ""):
        if isinstance(problems, str):
            problems = [Problem(location, problems)]
        self.problems: list[Problem] = list(problems)
        if not self.problems:
            raise TypeError("an error needs at least one problem")
        self.location = self.problems[0].location
        super().__init__("\n".join(str(p) for p in self.problems))


class BankError(AdaptiveEngineError):
    """An item bank file or array set is malformed."""


class ResponseDataError(AdaptiveEngineError):
    """Response data (answers to items) are malformed or do not match the bank."""


class DesignError(AdaptiveEngineError):
    """A test design file is malformed or does not fit the bank."""


class SessionError(AdaptiveEngineError):
    """A live-session request cannot be carried out (unknown session, wrong item, ...)."""


class CalibrationError(AdaptiveEngineError):
    """Response data cannot be calibrated as asked."""


# ----------------------------------------------------------------------------------------
# reading a user's input file whole, within a size limit


def read_input_bytes(path, *, max_bytes: int, error: type = AdaptiveEngineError,
                     missing: str | None = None, location: str | None = None) -> bytearray:
    """The content of the regular file at ``path``, refused when it cannot be read safely.

    Input files are read whole, so three things are refused before anything is read: a
    path that is not a regular file (a folder, a FIFO that would block, a device such as
    ``/dev/zero`` that never ends), a file larger than ``max_bytes``, and a path that
    cannot name a file at all (a NUL byte).  The file is opened without blocking and
    checked on the open descriptor, so a path swapped for a pipe in between is refused too.

    Parameters
    ----------
    path : str or path-like
    max_bytes : int
        Largest size read; a file that grows past it while being read is refused as well.
    error : AdaptiveEngineError subclass
        Type of the error raised.
    missing : str, optional
        Message for a file that does not exist (default ``"no such file: PATH"``).
    location : str, optional
        Location of every problem (default: the path as given).

    Raises
    ------
    error
        Located at ``location``, for a missing, unreadable, special or too large file.
    """
    text_path, where = _input_path(path, location, error)
    try:
        fd = os.open(text_path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
    except OSError as exc:
        raise _open_error(exc, text_path, where, error, missing) from None
    try:
        info = os.fstat(fd)
        _check_kind_and_size(info, where, max_bytes, error)
        # one buffer of the stated size, filled in place: no second copy of a large file
        data = bytearray(info.st_size)
        total = 0
        with memoryview(data) as view:
            while total < len(data):
                got = os.readv(fd, [view[total:]])
                if not got:
                    break
                total += got
        del data[total:]
        while True:  # a file whose size is not known beforehand (some of /proc) or that grew
            more = os.read(fd, min(1 << 20, max_bytes + 1 - len(data)))
            if not more:
                break
            data += more
            if len(data) > max_bytes:
                raise error(f"the file grew past the {max_bytes:,} bytes this kind of file may have "
                            "while it was read", location=where)
        return data
    except OSError as exc:
        raise error(f"cannot read the file: {exc.strerror or exc}", location=where) from None
    finally:
        os.close(fd)


def check_input_file(path, *, max_bytes: int, error: type = AdaptiveEngineError,
                     missing: str | None = None, location: str | None = None) -> None:
    """Refuse ``path`` as :func:`read_input_bytes` would, without reading it.

    For files opened by another library (an SQLite bank): a missing path, a folder, a
    pipe or device, a file larger than ``max_bytes`` and a NUL byte in the name raise
    ``error`` located at ``location`` (default: the path).
    """
    text_path, where = _input_path(path, location, error)
    try:
        info = os.stat(text_path)
    except OSError as exc:
        raise _open_error(exc, text_path, where, error, missing) from None
    _check_kind_and_size(info, where, max_bytes, error)


def _input_path(path, location, error) -> tuple[str, str]:
    text_path = os.fsdecode(path) if isinstance(path, (str, bytes, os.PathLike)) else str(path)
    where = text_path if location is None else location
    if "\x00" in text_path:
        raise error("the file name contains a NUL byte, which no file name can hold",
                    location=where.replace("\x00", "\\x00"))
    return text_path, where


def _open_error(exc: OSError, text_path: str, where: str, error, missing):
    if isinstance(exc, FileNotFoundError):
        return error(missing or f"no such file: {text_path}", location=where)
    if isinstance(exc, IsADirectoryError):
        return error("this is a folder, not a file", location=where)
    return error(f"cannot open the file: {exc.strerror or exc}", location=where)


def _check_kind_and_size(info: os.stat_result, where: str, max_bytes: int, error) -> None:
    if stat.S_ISDIR(info.st_mode):
        raise error("this is a folder, not a file", location=where)
    if not stat.S_ISREG(info.st_mode):
        raise error("not a regular file (a pipe, device or socket cannot be read as input); "
                    "give the path of a file", location=where)
    if info.st_size > max_bytes:
        raise error(f"the file has {info.st_size:,} bytes, more than the {max_bytes:,} bytes "
                    "this kind of file may have", location=where)


def decode_input_text(data: bytes, *, error: type = AdaptiveEngineError, location: str = "") -> str:
    """``data`` as UTF-8 text, without a leading byte order mark; else ``error`` at ``location``."""
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise error(f"not UTF-8 text ({exc.reason} at byte {exc.start})", location=location) from None
