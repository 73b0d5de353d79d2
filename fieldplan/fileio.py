"""Writing files safely: atomic files, whole output folders as one transaction, plain JSON data.

Every file fieldplan writes goes through :func:`atomic_path` (or :func:`atomic_write` built on it):
the data go to a temporary file in the same folder, which is renamed over the target only when
complete, so a reader never sees a half-written file and a failed write leaves the old file as it
was. A command's output folder is written through :func:`output_folder`: a temporary folder beside
the target, renamed into place at the end (:func:`replace_folder`). An existing folder is replaced
only with ``force=True`` and only if fieldplan wrote it (it holds :data:`MARKER`); the working
folder, its parents, the home folder and a folder holding an input of the run are never replaced
(:func:`check_output_folder`). No user file is ever deleted.

:func:`plain` turns numpy values, tuples and dataclasses into plain Python data for JSON and YAML;
:func:`json_safe` also turns NaN and infinities into ``None`` (strict JSON).
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import math
import os
import re
import shutil
import socket
import tempfile
import time

import numpy as np

from .errors import FieldplanError

__all__ = ["umask_mode", "atomic_path", "atomic_open", "atomic_write", "save_figure", "MARKER", "STALE_AGE",
           "OutputFolderError", "OutputExistsError", "written_by_fieldplan", "check_output_folder",
           "clean_stale_temps", "output_folder", "replace_folder", "plain", "json_safe"]


def _version():
    # deferred import: import cycle: fieldplan/__init__ -> fieldplan.contract.schedule -> this module, before __version__ is set
    from . import __version__  # noqa: PLC0415

    return __version__


def umask_mode(mode=0o666):
    """``mode`` with the process umask applied: what ``open()`` would give a new file (0o777 for folders)."""
    mask = os.umask(0o022)   # reading the umask means setting it; put it straight back
    os.umask(mask)
    return mode & ~mask


@contextlib.contextmanager
def atomic_path(path, suffix=None):
    """Yield a temporary path beside ``path``; on success it is renamed to ``path``, on failure removed.

    For writers that want a file name rather than an open file (``Figure.savefig``, an animation
    writer, ``numpy.save``). The temporary file keeps ``path``'s suffix (or ``suffix``), so writers
    that pick a format from the name pick the right one, and gets the permissions a plain ``open()``
    would give (the user's umask), not the owner-only mode of a temporary file.

    Examples
    --------
    >>> import tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "a.txt")
    >>> with atomic_path(p) as tmp:
    ...     with open(tmp, "w") as fh:
    ...         _ = fh.write("hello")
    >>> open(p).read()
    'hello'
    """
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    if suffix is None:
        suffix = os.path.splitext(path)[1]
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=suffix, dir=folder)
    try:
        os.fchmod(fd, umask_mode())
        os.close(fd)
        yield tmp
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


@contextlib.contextmanager
def atomic_open(path, mode="w", **kw):
    """Open a temporary file beside ``path`` for writing; it replaces ``path`` when the block ends cleanly.

    Text modes default to UTF-8 and no newline translation (CSV writers handle line ends).
    """
    if "b" not in mode:
        kw.setdefault("encoding", "utf-8")
        kw.setdefault("newline", "")
    with atomic_path(path) as tmp, open(tmp, mode, **kw) as fh:
        yield fh


def atomic_write(path, text, mode="w"):
    """Write ``text`` (or bytes with ``mode="wb"``) to ``path`` atomically (see :func:`atomic_path`)."""
    with atomic_open(path, mode) as fh:
        fh.write(text)


def save_figure(fig, path, **kw):
    """Save a matplotlib figure to ``path`` atomically (format from the suffix); returns ``path``."""
    with atomic_path(path) as tmp:
        fig.savefig(tmp, **kw)
    return os.fspath(path)


#: Marker file fieldplan puts in every folder it writes; ``--force`` replaces only folders holding it.
MARKER = ".fieldplan-output"

#: A temporary folder of an earlier run (``.<out>.tmp-*``, ``.<out>.old-*``) is removed when its
#: writer is no longer running, or in any case after this many seconds.
STALE_AGE = 24 * 3600.0

# Names of the files an output folder of each command held before folders carried the marker: a
# folder written by such a version is recognised by holding nothing else. The list is history and
# never grows (every folder written now carries the marker).
_KNOWN_OUTPUTS = re.compile(
    r"^(?:schedule\.csv|schedule\.json|schedule_resampled\.csv|trajectories\.csv|summary\.json"
    r"|workspace\.png|timeline\.png|inputs\.png|animation\.gif"
    r"|comparison\.(?:md|csv|json|png)|inspect\.(?:md|json)|(?:fields|speed-map|count-curve)-[\w.\-]+\.png"
    r"|\.tmp-\w+)$")


class OutputFolderError(FieldplanError):
    """The output folder cannot or may not be written (names the folder and the reason)."""


class OutputExistsError(OutputFolderError):
    """The output folder exists and ``force`` was not given (or the path is a file)."""


def _is_within(path, folder):
    """Whether real path ``path`` is ``folder`` or inside it (both real, absolute)."""
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


def written_by_fieldplan(folder):
    """Whether ``folder`` is an output folder fieldplan wrote (holds :data:`MARKER`).

    A folder written before the marker existed counts too when it holds a fieldplan result file
    (``summary.json``, ``comparison.json``, ``inspect.json`` or a fit's ``<name>-report.json``) and
    nothing but files with the names fieldplan writes, so replacing it loses nothing of the user's.
    """
    if os.path.isfile(os.path.join(folder, MARKER)):
        return True
    try:
        entries = [e for e in os.scandir(folder)]
    except OSError:
        return False
    if not entries or not all(e.is_file(follow_symlinks=False) for e in entries):
        return False
    names = {e.name for e in entries}
    stems = [n[:-len("-report.json")] for n in names if n.endswith("-report.json")]
    fit = {f"{s}{ext}" for s in stems for ext in (".npz", ".json", "-report.json")}

    def known(n):
        return bool(_KNOWN_OUTPUTS.match(n)) or n in fit or any(
            re.match(rf"^{re.escape(s)}-(?:vectors|residuals|coverage)(?:-[\w.\-]+)?\.png$", n) for s in stems)

    return bool(names & {"summary.json", "comparison.json", "inspect.json"} or stems) and all(map(known, names))


def check_output_folder(out_dir, force=False, inputs=()):
    """Raise :class:`OutputFolderError` unless ``out_dir`` may be (re)written.

    Called by every command before any planning or fitting, so a long run does not end in a refusal.

    Parameters
    ----------
    out_dir : str or os.PathLike
        The output folder.
    force : bool
        Replace an existing folder, which must be one fieldplan wrote (:func:`written_by_fieldplan`).
    inputs : sequence of str
        Files the run reads (scenario, schedule, tracks): a folder holding any of them is never
        replaced.

    Raises
    ------
    OutputExistsError
        The folder exists and ``force`` is false, or the path is a file.
    OutputFolderError
        The folder is the working folder, one of its parents, the home folder, a folder holding an
        input of the run, a folder fieldplan did not write, or its parent cannot be written.
    """
    out = os.path.abspath(os.fspath(out_dir))
    real = os.path.realpath(out)
    if os.path.isfile(out):
        raise OutputExistsError(f"output path {out!r} is a file, not a folder; choose another --out.")
    cwd = os.path.realpath(os.getcwd())
    home = os.path.realpath(os.path.expanduser("~"))
    if os.path.exists(out):
        what = ("the working folder" if real == cwd else "a parent of the working folder" if _is_within(cwd, real)
                else "your home folder" if real == home else "a parent of your home folder" if _is_within(home, real)
                else None)
        if what is None:
            held = [p for p in inputs if p and _is_within(os.path.realpath(p), real)]
            if held:
                what = f"the folder holding {held[0]!r}, an input of this run"
        if what is not None:
            raise OutputFolderError(f"refusing to use {out!r} as the output folder: it is {what}, and an output "
                                    "folder is replaced as a whole. Choose a new folder, e.g. --out "
                                    f"{os.path.join(os.path.relpath(out) if real != cwd else '.', 'output')!r}.")
        if not force:
            raise OutputExistsError(f"output folder {out!r} already exists; pass --force to replace it or choose "
                                    "another --out.")
        if os.listdir(out) and not written_by_fieldplan(out):
            raise OutputFolderError(f"refusing to replace {out!r}: it was not written by fieldplan (no {MARKER} "
                                    "marker inside), and --force replaces only folders fieldplan wrote. Choose "
                                    "another --out, or move its files away yourself.")
    _check_writable(out)


def _check_writable(out):
    """Raise :class:`OutputFolderError` unless a temporary folder can be made beside ``out``."""
    parent = os.path.dirname(out)
    probe = parent
    while not os.path.exists(probe):
        up = os.path.dirname(probe)
        if up == probe:
            break
        probe = up
    if not os.path.isdir(probe):
        raise OutputFolderError(f"cannot create the output folder {out!r}: {probe!r} is a file, not a folder.")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise OutputFolderError(f"cannot write the output folder {out!r}: the folder {probe!r} is not writable.")
    if probe == parent:
        try:
            os.rmdir(tempfile.mkdtemp(prefix=f".{os.path.basename(out)}.probe-", dir=parent))
        except OSError as exc:
            raise OutputFolderError(f"cannot write the output folder {out!r}: {exc.strerror or exc} "
                                    f"(in {parent!r}).") from None


def clean_stale_temps(out_dir, max_age=STALE_AGE):
    """Remove temporary folders that earlier, killed runs left beside ``out_dir``.

    Only hidden ``.<name>.tmp-*`` / ``.<name>.old-*`` folders holding :data:`MARKER` are touched,
    and only when the process that wrote them is gone (same host) or the marker is older than
    ``max_age`` seconds. A ``.old-*`` folder (a previous output set aside during a swap) is kept
    while ``out_dir`` itself is missing, since it is then the only copy.

    Returns
    -------
    list of str
        Paths removed.
    """
    out = os.path.abspath(os.fspath(out_dir))
    parent, base = os.path.dirname(out), os.path.basename(out)
    removed = []
    try:
        entries = list(os.scandir(parent))
    except OSError:
        return removed
    now = time.time()
    for e in entries:
        if not (e.name.startswith(f".{base}.tmp-") or e.name.startswith(f".{base}.old-")) or not e.is_dir():
            continue
        if e.name.startswith(f".{base}.old-") and not os.path.isdir(out):
            continue
        marker = os.path.join(e.path, MARKER)
        try:
            age = now - os.stat(marker).st_mtime
            with open(marker, encoding="utf-8") as fh:
                info = json.load(fh)
        except (OSError, ValueError):
            continue
        gone = info.get("host") == socket.gethostname() and not _alive(info.get("pid"))
        if gone or age > max_age:
            shutil.rmtree(e.path, ignore_errors=True)
            if not os.path.exists(e.path):
                removed.append(e.path)
    return removed


def _alive(pid):
    if not isinstance(pid, int) or pid <= 0:
        return False
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True
    return True


def _new_temp(out, command):
    """A fresh temporary folder beside ``out`` with the marker inside, permissions as the umask gives."""
    parent = os.path.dirname(out)
    os.makedirs(parent, exist_ok=True)
    tmp = tempfile.mkdtemp(prefix=f".{os.path.basename(out)}.tmp-", dir=parent)
    os.chmod(tmp, umask_mode(0o777))
    atomic_write(os.path.join(tmp, MARKER), json.dumps(
        {"written_by": "fieldplan", "version": _version(), "command": command, "pid": os.getpid(),
         "host": socket.gethostname(), "created": time.strftime("%Y-%m-%dT%H:%M:%S%z")}) + "\n")
    return tmp


@contextlib.contextmanager
def output_folder(out_dir, force=False, inputs=(), command="run"):
    """Write an output folder atomically: yields a temporary folder that replaces ``out_dir`` on success.

    The temporary folder sits beside ``out_dir`` (same file system, so the final rename is atomic),
    carries the :data:`MARKER` file and is removed if anything fails or the run is interrupted.
    An OS error while writing is reported naming ``out_dir``, not the temporary path.

    Examples
    --------
    >>> import tempfile, os
    >>> out = os.path.join(tempfile.mkdtemp(), "res")
    >>> with output_folder(out) as tmp:
    ...     atomic_write(os.path.join(tmp, "a.txt"), "hello")
    >>> sorted(os.listdir(out))
    ['.fieldplan-output', 'a.txt']
    """
    check_output_folder(out_dir, force, inputs)
    out = os.path.abspath(os.fspath(out_dir))
    try:
        tmp = _new_temp(out, command)
    except OSError as exc:
        raise OutputFolderError(f"cannot write the output folder {out!r}: {exc.strerror or exc}.") from None
    try:
        try:
            yield tmp
            replace_folder(tmp, out, force)
        except FieldplanError:
            raise
        except OSError as exc:
            raise OutputFolderError(f"cannot write the output folder {out!r}: {exc.strerror or exc}"
                                    + (f" ({os.path.basename(exc.filename)})" if exc.filename else "")
                                    + ". Nothing was written.") from exc
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def replace_folder(tmp, out, force):
    """Move the finished temporary folder ``tmp`` to ``out`` (replacing an old one only with ``force``).

    The old folder is set aside first and removed only after the new one is in place; if the final
    rename fails the old folder is put back. A folder that is no longer one fieldplan wrote is
    never replaced.
    """
    if os.path.exists(out):
        if not force:
            raise OutputExistsError(f"output folder {out!r} appeared while writing; not replaced.")
        if os.listdir(out) and not written_by_fieldplan(out):
            raise OutputFolderError(f"output folder {out!r} was changed while writing and is no longer one "
                                    "fieldplan wrote; not replaced.")
        old = tempfile.mkdtemp(prefix=f".{os.path.basename(out)}.old-", dir=os.path.dirname(out))
        os.rmdir(old)
        os.replace(out, old)
        try:
            os.replace(tmp, out)
        except BaseException:
            os.replace(old, out)
            raise
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, out)


def plain(v, finite=False):
    """Plain Python data for JSON or YAML: numpy values and arrays, tuples and dataclasses to dicts, lists, floats.

    Parameters
    ----------
    v : object
        Nested dicts, lists, tuples, numpy arrays and scalars, dataclass instances.
    finite : bool
        Turn NaN and infinities into ``None`` (strict JSON has no NaN).

    Examples
    --------
    >>> plain({"a": np.arange(2), "b": (np.float64(1.5), float("nan"))}, finite=True)
    {'a': [0, 1], 'b': [1.5, None]}
    """
    if isinstance(v, dict):
        return {str(k): plain(x, finite) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [plain(x, finite) for x in v]
    if isinstance(v, np.ndarray):
        return plain(v.tolist(), finite)
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, (float, np.floating)):
        f = float(v)
        return None if finite and not math.isfinite(f) else f
    if dataclasses.is_dataclass(v) and not isinstance(v, type):
        return {f.name: plain(getattr(v, f.name), finite) for f in dataclasses.fields(v)}
    return v


def json_safe(v):
    """Plain, strict JSON data: :func:`plain` with NaN and infinities as ``None``."""
    return plain(v, finite=True)
