"""Write what the user asked for without ever losing a file of theirs.

A tree (`emit -o OUTDIR`) is written into a temporary folder beside OUTDIR and renamed into
place at the end, so OUTDIR is always either the old tree or the new one. Each tree holds a
manifest, tinygen-tree.txt, in `sha256sum` format: every file tinygen wrote and its hash.
`--force` and `--add` replace an existing OUTDIR only while its manifest lists exactly what
is there; anything else in it (a file of the user's, a changed file, a folder, a link) is
named and refused. The inputs (model, --inputs, --float-model) are never inside what gets
replaced, nor is the current folder. OUTDIR given as a symlink to a folder: the target
folder is replaced and the link kept. Files and folders get the user's umask.

Interrupts: SIGINT and SIGTERM are blocked around the two renames of the swap, and the
temporary folders are removed whatever point an interrupt arrives at; the interrupt then
goes on as `Interrupted` (the CLI exits 130 or 143 with one line).
"""
from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import re
import shutil
import signal
import tempfile
import threading
from collections.abc import Iterable, Iterator
from pathlib import Path

from tinygen.errors import Interrupted, TinygenError

MANIFEST = "tinygen-tree.txt"
SIGNALS = (signal.SIGINT, signal.SIGTERM)
_MANIFEST_LINE = re.compile(r"^([0-9a-f]{64})  ([A-Za-z0-9_.\-]+)$")


def _reached(point: str) -> None:
    """A named point of a write: 'writing' (a first file is in the temporary folder),
    'written' (all are), 'swapping' (between the two renames), 'swapped'. Does nothing;
    tests replace it to deliver signals at exactly these points."""


# -- signals ------------------------------------------------------------------------------

class _Signals:
    """What the SIGINT/SIGTERM handler has seen (one process, one handler)."""

    installed = False
    defer = 0  # > 0: inside a write, where the handler only records the signal
    caught: int | None = None  # the first signal
    delivered = False  # whether it has been raised as Interrupted yet


def _on_signal(signum, frame):
    """The first SIGINT/SIGTERM raises Interrupted, or inside a write is kept until the
    write has cleaned up; any later one is dropped, so nothing cuts a cleanup short."""
    if _Signals.caught is not None:
        return
    _Signals.caught = signum
    if not _Signals.defer:
        _Signals.delivered = True
        raise Interrupted(signum)


def check_interrupt() -> None:
    """Raise the signal a write kept back, at a point where the write can clean up."""
    if _Signals.caught is not None and not _Signals.delivered:
        _Signals.delivered = True
        raise Interrupted(_Signals.caught)


@contextlib.contextmanager
def interrupts_raise() -> Iterator[None]:
    """SIGINT/SIGTERM become one `Interrupted` exception while inside (main thread only;
    elsewhere signals are left as they are)."""
    if _Signals.installed or threading.current_thread() is not threading.main_thread():
        yield
        return
    before = {s: signal.getsignal(s) for s in SIGNALS}
    _Signals.caught, _Signals.delivered = None, False
    for s in SIGNALS:
        signal.signal(s, _on_signal)
    _Signals.installed = True
    try:
        yield
    finally:
        _Signals.installed = False
        for s, h in before.items():
            signal.signal(s, h)
        _Signals.caught, _Signals.delivered = None, False


def stop_interrupts() -> None:
    """From now on SIGINT/SIGTERM do nothing (a process whose exit code is decided)."""
    for s in SIGNALS:
        signal.signal(s, signal.SIG_IGN)


@contextlib.contextmanager
def interrupts_deferred() -> Iterator[None]:
    """Inside, a signal is only recorded (`check_interrupt` raises it at safe points); on
    leaving, one still kept back is raised, after the body's own cleanup has run."""
    with interrupts_raise():
        _Signals.defer += 1
        try:
            yield
        finally:
            _Signals.defer -= 1
            if not _Signals.defer:
                check_interrupt()


@contextlib.contextmanager
def signals_blocked() -> Iterator[None]:
    """SIGINT/SIGTERM held back by the kernel while inside (even with no handler, when
    SIGTERM would end the process); one that arrived is delivered on leaving."""
    old = signal.pthread_sigmask(signal.SIG_BLOCK, SIGNALS)
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, old)


# -- the manifest ---------------------------------------------------------------------------

def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def manifest_text(files: dict[str, bytes]) -> str:
    """`sha256  name` per file, sorted by name (`sha256sum -c tinygen-tree.txt` checks it)."""
    return "".join(f"{hashlib.sha256(data).hexdigest()}  {name}\n"
                   for name, data in sorted(files.items()))


def read_manifest(folder: Path) -> dict[str, str] | None:
    """{name: sha256} of the folder's manifest, or None when there is none or it is not one
    tinygen wrote."""
    path = folder / MANIFEST
    if path.is_symlink() or not path.is_file() or path.stat().st_size > 1 << 20:
        return None
    listed = {}
    for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
        m = _MANIFEST_LINE.match(line)
        if not m or m.group(2) == MANIFEST:
            return None
        listed[m.group(2)] = m.group(1)
    return listed


def foreign_entries(folder: Path) -> list[str]:
    """What in `folder` tinygen did not write, as it stands: entries its manifest does not
    list, files changed since, anything not a plain file. [] for a folder that is all
    tinygen's (files it listed and that are gone are not foreign)."""
    listed = read_manifest(folder)
    if listed is None:
        return sorted(p.name for p in folder.iterdir())
    foreign = []
    for p in sorted(folder.iterdir(), key=lambda p: p.name):
        if p.name == MANIFEST:
            continue
        if p.name not in listed or p.is_symlink() or not p.is_file():
            foreign.append(p.name)
        elif _sha256(p) != listed[p.name]:
            foreign.append(f"{p.name} (changed)")
    return foreign


# -- where a tree may go --------------------------------------------------------------------

def _within(path: str, folder: str) -> bool:
    """Whether `path` is `folder` or inside it (both absolute, resolved)."""
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


def _locations(path: str) -> list[str]:
    """Where a user's file is: its resolved target, and the place of the name itself (a
    symlink inside OUTDIR would go with OUTDIR even when its target is elsewhere)."""
    absolute = os.path.abspath(path)
    here = os.path.join(os.path.realpath(os.path.dirname(absolute)), os.path.basename(absolute))
    return sorted({os.path.realpath(path), here})


def target_folder(out_dir: str, mode: str, protect: Iterable[str] = ()) -> Path:
    """The folder a tree for `-o out_dir` replaces, once it is safe to: `mode` is 'new'
    (refuse a non-empty folder), 'force' or 'add' (replace a tree tinygen wrote). Refuses,
    with one line, every case that could lose a file that is not tinygen's."""
    try:
        return _target_folder(out_dir, mode, protect)
    except OSError as exc:  # a name too long, a folder that cannot be read
        raise _os_error(f"output folder '{out_dir}'", exc) from None


def _target_folder(out_dir: str, mode: str, protect: Iterable[str]) -> Path:
    shown = out_dir
    if not out_dir.strip():
        raise TinygenError("-o '': give the output folder a name")
    last = out_dir.rstrip(os.sep).rsplit(os.sep, 1)[-1]
    if last in (".", "..", ""):
        raise TinygenError(f"-o '{shown}' names a folder by '.', '..' or '/'; name the "
                           "output folder itself (e.g. -o build/model)")
    if os.path.islink(out_dir) and not os.path.exists(out_dir):
        raise TinygenError(f"output '{shown}' is a symlink to nothing "
                           f"('{os.readlink(out_dir)}')")
    real = os.path.realpath(out_dir)
    if os.path.exists(real) and not os.path.isdir(real):
        raise TinygenError(f"output '{shown}' is a file, not a folder; tinygen never "
                           "replaces a file with a folder")
    if _within(os.path.realpath(os.getcwd()), real):
        raise TinygenError(f"output folder '{shown}' is the current folder or holds it; "
                           "name a folder of its own")
    for p in protect:
        if p and any(_within(loc, real) for loc in _locations(p)):
            raise TinygenError(f"output folder '{shown}' holds the input '{p}', which "
                               "writing the tree would delete; name another folder")
    folder = Path(real)
    if folder.is_dir():
        entries = sorted(p.name for p in folder.iterdir())
        if entries and mode == "new":
            raise TinygenError(f"output folder '{shown}' exists and is not empty "
                               "(use --force to replace a tree tinygen wrote)")
        if entries:
            foreign = foreign_entries(folder)
            if foreign:
                flag = "--add" if mode == "add" else "--force"
                why = "" if read_manifest(folder) is not None else f" (no {MANIFEST})"
                raise TinygenError(
                    f"output folder '{shown}' holds what tinygen did not write{why}: "
                    f"{', '.join(foreign[:3])}{', ...' if len(foreign) > 3 else ''}; "
                    f"{flag} replaces only a tree tinygen wrote")
    name_max = _name_max(folder.parent)
    if name_max and len(folder.name.encode()) > name_max:
        raise TinygenError(f"output folder '{shown}': name longer than the file system "
                           f"allows ({len(folder.name.encode())} bytes, at most {name_max})")
    return folder


def _name_max(folder: Path) -> int:
    """NAME_MAX of the nearest existing folder (0 when the system cannot say)."""
    while not folder.is_dir() and folder != folder.parent:
        folder = folder.parent
    try:
        return os.pathconf(folder, "PC_NAME_MAX")
    except (OSError, ValueError):
        return 0


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _make_parents(parent: Path, mode: int, made: list[Path]) -> None:
    """Create the missing folders above the tree, each noted in `made` as it is made."""
    missing = []
    p = parent
    while not p.exists() and p != p.parent:
        missing.append(p)
        p = p.parent
    for p in reversed(missing):
        with signals_blocked():
            p.mkdir(mode)
            made.append(p)


def _remove(paths: list[Path]) -> None:
    """Remove temporary folders and files (and parents made for a tree that failed)."""
    for p in paths:
        if p.is_dir() and not p.is_symlink():
            shutil.rmtree(p, ignore_errors=True)
        elif p.exists() or p.is_symlink():
            with contextlib.suppress(OSError):
                p.unlink()


def _short(name: str) -> str:
    return name[:40]


def _os_error(what: str, exc: OSError) -> TinygenError:
    reason = exc.strerror or str(exc)
    if exc.errno == errno.ENAMETOOLONG:
        reason = "name longer than the file system allows"
    return TinygenError(f"{what}: {reason}")


def write_tree(files: dict[str, str], out_dir: str, force: bool, *, add: bool = False,
               protect: Iterable[str] = ()) -> list[str]:
    """Write `files` as the folder `out_dir`, with its manifest; returns the names written.

    An existing non-empty folder needs force (or add) and must be a tree tinygen wrote
    (`target_folder`); it is replaced whole, by a swap of two renames that no SIGINT or
    SIGTERM can split. On any failure or interrupt OUTDIR is as it was and no temporary
    folder is left."""
    mode = "add" if add else "force" if force else "new"
    folder = target_folder(out_dir, mode, protect)
    data = {name: text.encode("utf-8") for name, text in files.items()}
    data[MANIFEST] = manifest_text(data).encode()
    umask = _umask()
    debris: list[Path] = []
    with interrupts_deferred():
        try:
            try:
                _make_parents(folder.parent, 0o777 & ~umask, debris)
                with signals_blocked():
                    tmp = Path(tempfile.mkdtemp(prefix=f".{_short(folder.name)}.tinygen-",
                                                dir=folder.parent))
                    debris.insert(0, tmp)
                os.chmod(tmp, 0o777 & ~umask)
                for i, (name, blob) in enumerate(sorted(data.items())):
                    with open(tmp / name, "xb") as fh:  # 0666 & ~umask
                        fh.write(blob)
                    if i == 0:
                        _reached("writing")
                    check_interrupt()
                _reached("written")
                check_interrupt()
                _swap(tmp, folder, debris)
                _reached("swapped")
            except OSError as exc:
                raise _os_error(f"cannot write output folder '{out_dir}'", exc) from None
        finally:
            with signals_blocked():
                _remove(debris)
    return sorted(data)


def _swap(tmp: Path, folder: Path, debris: list[Path]) -> None:
    """Put `tmp` where `folder` is: one rename, or two when a folder is there already (its
    old tree moves aside into a temporary folder, removed after). No signal comes between."""
    with signals_blocked():
        if not folder.exists():
            os.rename(tmp, folder)
            debris.clear()  # the tree is in place, in the parents made for it
            return
        aside = Path(tempfile.mkdtemp(prefix=f".{_short(folder.name)}.tinygen-old-",
                                      dir=folder.parent))
        debris.append(aside)
        os.rename(folder, aside / "tree")
        _reached("swapping")
        try:
            os.rename(tmp, folder)
        except OSError:
            os.rename(aside / "tree", folder)
            raise
        debris.remove(tmp)


def write_file(path: str, text: str, *, protect: Iterable[str] = (), what: str = "output"
               ) -> None:
    """Write one file (a report, a picture) whole or not at all: a temporary file beside
    it renamed over it, with the umask's mode. A symlink is followed (the link is kept);
    a folder, or one of the inputs, is never written over."""
    if not path.strip():
        raise TinygenError(f"{what} '': give the file a name")
    try:
        _write_file(path, text, protect, what)
    except OSError as exc:  # a name too long, a folder that cannot be read
        raise _os_error(f"cannot write {what} '{path}'", exc) from None


def file_target(path: str, protect: Iterable[str] = (), what: str = "output") -> Path:
    """Where `write_file` would write `path`, refusing what it would refuse (callers check
    before a long computation, not after)."""
    if not path.strip():
        raise TinygenError(f"{what} '': give the file a name")
    try:
        real = os.path.realpath(path)
        if os.path.isdir(real):
            raise TinygenError(f"{what} '{path}' is a folder; name a file")
    except OSError as exc:
        raise _os_error(f"cannot write {what} '{path}'", exc) from None
    for p in protect:
        if p and real in _locations(p):
            raise TinygenError(f"{what} '{path}' is the input '{p}'; name another file")
    return Path(real)


def _write_file(path: str, text: str, protect: Iterable[str], what: str) -> None:
    target = file_target(path, protect, what)
    umask = _umask()
    debris: list[Path] = []
    with interrupts_deferred():
        try:
            try:
                with signals_blocked():
                    fd, tmp = tempfile.mkstemp(prefix=f".{_short(target.name)}.tinygen-",
                                               dir=target.parent)
                    debris.append(Path(tmp))
                with os.fdopen(fd, "wb") as fh:
                    fh.write(text.encode("utf-8"))
                os.chmod(tmp, 0o666 & ~umask)
                _reached("written")
                check_interrupt()
                with signals_blocked():
                    os.replace(tmp, target)
                    debris.clear()
            except OSError as exc:
                raise _os_error(f"cannot write {what} '{path}'", exc) from None
        finally:
            with signals_blocked():
                _remove(debris)
