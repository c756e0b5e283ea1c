"""Writing output files: the one writer behind every file the engine writes.

The same three rules hold for every output (bank files, plots, calibration reports,
simulation and tuning studies, exposure parameter files):

* **The folder that holds an output must exist.**  A missing folder is an
  :class:`~adaptive_engine.errors.OutputError` naming that folder, raised before anything is
  written (and, where a caller checks first with :func:`check_target`, before any long
  computation).  Nothing creates a chain of folders: a mistyped path should fail, not
  quietly write somewhere new.  An output *folder* (``simulate --out``, ``tune --out``) is
  itself created when missing (:func:`prepare_folder`), but the folder it sits in must
  exist, by the same rule.
* **A file appears whole or not at all.**  It is written under a temporary name in its own
  folder and renamed over the target (:func:`os.replace`, atomic on one file system); a
  failure removes the temporary file and leaves any old file as it was.
* **A file gets the normal mode**: what a plain ``open(path, "w")`` would give under the
  user's umask (0644 under umask 022), not the private 0600 of a temporary file, so that
  another user (a delivery app, a web server) can read it.
"""

from __future__ import annotations

import contextlib
import os
import stat
import tempfile
from pathlib import Path
from typing import Callable, Iterator

from .errors import AdaptiveEngineError, OutputError


def _folder_of(path: Path) -> Path:
    return path.parent if str(path.parent) else Path(".")


def check_target(path: str | Path, *, location: str | None = None) -> Path:
    """Refuse an output file ``path`` whose folder is missing or that is itself a folder.

    Parameters
    ----------
    path : path of the file to be written
    location : str, optional
        Where the error is reported (default: ``path``).

    Returns
    -------
    Path

    Raises
    ------
    OutputError
        Naming the missing folder, before anything is written.
    """
    path = Path(path)
    location = str(path) if location is None else location
    folder = _folder_of(path)
    if not folder.is_dir():
        what = "is not a folder" if folder.exists() else "does not exist"
        raise OutputError(f"the folder {folder} {what}", location=location)
    if path.is_dir():
        raise OutputError("this is a folder, not a file name", location=location)
    return path


def prepare_folder(folder: str | Path, *, location: str | None = None) -> tuple[Path, bool]:
    """Make sure the output folder ``folder`` exists; create it (not its parents) if missing.

    Returns
    -------
    folder : Path
    created : bool
        Whether it was created here (a caller may remove it again after a failed run).

    Raises
    ------
    OutputError
        When the folder holding ``folder`` is missing, or ``folder`` is a file.
    """
    folder = Path(folder)
    location = str(folder) if location is None else location
    if folder.is_dir():
        return folder, False
    if folder.exists():
        raise OutputError("this is a file, not a folder", location=location)
    parent = _folder_of(folder)
    if not parent.is_dir():
        what = "is not a folder" if parent.exists() else "does not exist"
        raise OutputError(f"the folder {parent} {what}", location=location)
    try:
        folder.mkdir()
    except OSError as exc:
        raise OutputError(f"cannot create the folder {folder}: {exc.strerror or exc}", location=location) from None
    return folder, True


def default_file_mode() -> int:
    """The mode ``open(path, "w")`` gives a new file: 0666 less the process's umask."""
    umask = os.umask(0)
    os.umask(umask)
    return 0o666 & ~umask


class StagedFiles:
    """Several output files in one folder, written under temporary names and renamed together.

    Use as a context manager; nothing appears under its final name before :meth:`commit`,
    and leaving the block without committing (an error) removes every temporary file::

        with StagedFiles(folder) as staged:
            staged.write_text("a.csv", text_a)
            fill_big_file(staged.path("b.csv"))   # e.g. written in pieces
            staged.commit()
    """

    def __init__(self, folder: str | Path, *, location: str | None = None):
        self.folder = Path(folder)
        self.location = location
        self._temps: dict[str, Path] = {}

    def path(self, name: str) -> Path:
        """The temporary file standing in for ``name`` (created empty, in the target folder)."""
        if name not in self._temps:
            try:
                fd, temp = tempfile.mkstemp(prefix=f".{name}.", suffix=".partial", dir=self.folder)
            except OSError as exc:
                # the temporary name means nothing to the user: name the folder instead
                where = str(self.folder / name) if self.location is None else self.location
                raise OutputError(f"cannot write into the folder {self.folder}: {exc.strerror or exc}",
                                  location=where) from None
            os.close(fd)
            self._temps[name] = Path(temp)
        return self._temps[name]

    def write_text(self, name: str, text: str) -> None:
        """Stage ``text`` (UTF-8, line ends as given) as the file ``name``."""
        with open(self.path(name), "w", encoding="utf-8", newline="") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())

    def commit(self) -> list[Path]:
        """Give every staged file the normal mode and rename it into place; returns the paths."""
        mode = default_file_mode()
        done = []
        for name, temp in list(self._temps.items()):
            os.chmod(temp, mode)
            final = self.folder / name
            os.replace(temp, final)
            del self._temps[name]
            done.append(final)
        return done

    def discard(self) -> None:
        """Remove every temporary file not yet committed."""
        for temp in self._temps.values():
            with contextlib.suppress(OSError):
                temp.unlink()
        self._temps.clear()

    def __enter__(self) -> "StagedFiles":
        return self

    def __exit__(self, *exc) -> None:
        self.discard()


@contextlib.contextmanager
def _staged_one(path: Path, location: str | None) -> Iterator[tuple[StagedFiles, str]]:
    with StagedFiles(_folder_of(path), location=str(path) if location is None else location) as staged:
        yield staged, path.name


def atomic_write(path: str | Path, fill: Callable[[Path], None], *, location: str | None = None) -> Path:
    """Write one file: ``fill(temp_path)`` writes the content, then it is renamed onto ``path``.

    ``fill`` gets an empty temporary file in the target folder (it may delete it and create
    its own, as SQLite does).  The target is checked first (:func:`check_target`).

    Returns
    -------
    Path
    """
    path = check_target(path, location=location)
    with _staged_one(path, location) as (staged, name):
        fill(staged.path(name))
        staged.commit()
    return path


def write_texts(folder: str | Path, texts: dict[str, str]) -> list[Path]:
    """Write several files (name -> text) into ``folder`` together: every one complete
    before any is renamed into place (:class:`StagedFiles`); returns their paths."""
    with StagedFiles(folder) as staged:
        for name, text in texts.items():
            staged.write_text(name, text)
        return staged.commit()


def write_text(path: str | Path, text: str, *, location: str | None = None) -> Path:
    """Write ``text`` (UTF-8, line ends as given) to ``path`` atomically, with the normal mode."""
    path = check_target(path, location=location)
    with _staged_one(path, location) as (staged, name):
        staged.write_text(name, text)
        staged.commit()
    return path


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
