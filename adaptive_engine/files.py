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
import tempfile
from pathlib import Path
from typing import Callable, Iterator

from .errors import OutputError


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


def write_text(path: str | Path, text: str, *, location: str | None = None) -> Path:
    """Write ``text`` (UTF-8, line ends as given) to ``path`` atomically, with the normal mode."""
    path = check_target(path, location=location)
    with _staged_one(path, location) as (staged, name):
        staged.write_text(name, text)
        staged.commit()
    return path
