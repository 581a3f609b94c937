"""All-or-nothing output files: written under temporary names beside their targets, renamed into place together.

Every file entivec hands to a person or a script (exports, the apply job's Parquet, history and report files)
goes through :class:`OutputSet`. Each file is first written to a hidden name in its target folder (same file
system, so the final ``os.replace`` is a rename, atomic for each file by POSIX ``rename(2)``); only when every
file of the set is complete are they renamed into place. A target that already existed is kept as a hard link
until the whole set is in place, so a failure part-way through the renames puts the old files back. A failure at
any point leaves the folders as they were, folders the set created included.

Files get the mode an ordinary ``open()`` would give them (``0666`` less the process's umask), never the
owner-only ``0600`` of ``tempfile.mkstemp``. A full disk, a quota, a size limit, a read-only file system or a
folder without write permission become :class:`OutputError`, which names the file and the cause; the CLI turns
it into exit code 2 like any other error the user can fix.
"""

from __future__ import annotations

import errno
import os
import re
import secrets
import shutil
from collections.abc import Callable
from pathlib import Path

PARTIAL_SUFFIX = ".partial"

_CAUSES = {
    errno.ENOSPC: "no space left on the device",
    errno.EDQUOT: "the disk quota is used up",
    errno.EFBIG: "the file would pass the size limit set for this process or file system",
    errno.EACCES: "permission denied",
    errno.EPERM: "permission denied",
    errno.EROFS: "the file system is read-only",
}


class OutputError(OSError):
    """An output could not be written (full disk, no permission, ...); nothing of it was left behind."""


def current_umask() -> int:
    """The process's umask, read without changing it where Linux allows (``/proc/self/status``)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("Umask:"):
                return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)  # elsewhere: set and restore (not thread-safe for that instant, but brief)
    os.umask(mask)
    return mask


def file_mode() -> int:
    """The mode ``open(path, "w")`` gives a new file: 0666 less the umask."""
    return 0o666 & ~current_umask()


def error_number(exc: BaseException) -> int | None:
    """The errno of an OSError, also when a library put it only in the message (Arrow: ``errno 28``)."""
    if isinstance(exc, OSError) and exc.errno:
        return exc.errno
    found = re.search(r"errno[ :=]*(\d+)", str(exc), re.IGNORECASE)
    if found:
        return int(found.group(1))
    for code, text in ((errno.ENOSPC, "No space left"), (errno.EACCES, "Permission denied"),
                       (errno.EROFS, "Read-only file system"), (errno.EFBIG, "File too large")):
        if text.lower() in str(exc).lower():
            return code
    return None


def writing_failed(exc: BaseException) -> bool:
    """Whether an error is one of those a write meets (full disk, quota, size limit, permission, read-only)."""
    return error_number(exc) in _CAUSES


def output_error(what: str, target: str | Path, exc: BaseException) -> OutputError:
    """An :class:`OutputError` naming what was being written, where, and why it failed."""
    code = error_number(exc)
    cause = _CAUSES.get(code) if code is not None else None
    detail = cause or (os.strerror(code) if code else str(exc))
    err = OutputError(code or 0, f"cannot write {what} to {target}: {detail}; nothing was written")
    err.errno = code
    return err


class OutputSet:
    """A group of output files that appear together or not at all.

    >>> with OutputSet("export") as outputs:          # doctest: +SKIP
    ...     table.to_parquet(outputs.path(folder / "a.parquet"))
    ...     np.save(outputs.path(folder / "a.npy"), matrix)
    ... # both files are in place here, or neither is and an OutputError says why

    ``path(target)`` returns the temporary name to write ``target`` to; the caller writes it with any library.
    """

    def __init__(self, what: str):
        self.what = what
        self._pending: list[tuple[Path, Path]] = []  # (temporary, target)
        self._made_folders: list[Path] = []
        self._committed = False

    # --- writing --------------------------------------------------------------------------------------------

    def folder(self, folder: str | Path) -> Path:
        """Create ``folder`` (and parents) if missing; folders created here are removed again on failure."""
        folder = Path(folder)
        missing = []
        probe = folder
        while not probe.exists():
            missing.append(probe)
            if probe.parent == probe:
                break
            probe = probe.parent
        try:
            for made in reversed(missing):
                made.mkdir()
                self._made_folders.append(made)
        except OSError as exc:
            raise output_error(self.what, folder, exc) from exc
        if not folder.is_dir():
            raise OutputError(errno.ENOTDIR, f"cannot write {self.what} to {folder}: it is not a folder")
        return folder

    def path(self, target: str | Path) -> Path:
        """A fresh hidden name in ``target``'s folder to write ``target`` to (created empty, mode per umask)."""
        target = Path(target)
        if target.is_dir():
            raise OutputError(errno.EISDIR, f"cannot write {self.what} to {target}: a folder of that name exists")
        self.folder(target.parent)
        # the target's suffix last: writers that add a missing suffix (numpy.save adds .npy) keep the name
        temporary = target.parent / f".{target.name}.{secrets.token_hex(4)}{PARTIAL_SUFFIX}{target.suffix}"
        try:
            # O_EXCL: never write through a name someone else made; the mode follows the umask like open()'s
            os.close(os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))
        except OSError as exc:
            raise output_error(self.what, target, exc) from exc
        self._pending.append((temporary, target))
        return temporary

    def write_text(self, target: str | Path, text: str) -> Path:
        with open(self.path(target), "w", encoding="utf-8", newline="") as handle:
            handle.write(text)
        return Path(target)

    def write_with(self, target: str | Path, writer: Callable[[Path], object]) -> Path:
        writer(self.path(target))
        return Path(target)

    @property
    def targets(self) -> list[Path]:
        return [target for _, target in self._pending]

    # --- all or nothing -------------------------------------------------------------------------------------

    def commit(self) -> list[Path]:
        """Rename every written file into place; on any failure restore the targets that were there before."""
        mode = file_mode()
        kept: list[tuple[Path, Path | None]] = []  # (target, hard link to its previous file or None)
        try:
            for temporary, _ in self._pending:
                os.chmod(temporary, mode)
                with open(temporary, "rb") as handle:  # on disk before the name points at it
                    os.fsync(handle.fileno())
            for temporary, target in self._pending:
                previous = None
                if target.exists():
                    previous = target.parent / f".{target.name}.{secrets.token_hex(4)}.previous"
                    try:
                        os.link(target, previous)
                    except OSError:
                        shutil.copy2(target, previous)
                kept.append((target, previous))
                os.replace(temporary, target)
        except BaseException as exc:
            for target, previous in reversed(kept):
                try:
                    if previous is not None:
                        os.replace(previous, target)
                    elif target.exists():
                        target.unlink()
                except OSError:
                    pass
            self.discard()
            if isinstance(exc, OSError) and not isinstance(exc, OutputError):
                raise output_error(self.what, self._pending[0][1].parent, exc) from exc
            raise
        for _, previous in kept:
            if previous is not None:
                try:
                    previous.unlink()
                except OSError:
                    pass
        self._committed = True
        self._made_folders = []  # they hold the outputs now: never removed by a later discard()
        return self.targets

    def discard(self) -> None:
        """Remove every temporary file and every folder this set created; the targets are untouched."""
        for temporary, _ in self._pending:
            try:
                temporary.unlink()
            except FileNotFoundError:
                pass
            except OSError:
                pass
        for folder in reversed(self._made_folders):
            try:
                folder.rmdir()
            except OSError:
                pass
        self._made_folders = []

    def __enter__(self) -> OutputSet:
        return self

    def __exit__(self, kind, exc, tb) -> bool:
        if exc is None:
            self.commit()
            return False
        self.discard()
        if isinstance(exc, OSError) and not isinstance(exc, OutputError) and writing_failed(exc):
            where = self._pending[-1][1] if self._pending else "its folder"
            raise output_error(self.what, where, exc) from exc
        return False


def write_text_atomically(target: str | Path, text: str, what: str = "file") -> Path:
    """One text file, all or nothing, with the umask's mode."""
    with OutputSet(what) as outputs:
        outputs.write_text(target, text)
    return Path(target)
