"""Safe output folders: every folder phantometry writes goes through here.

Rules (the README's "Output folders" section says the same to users):

* A folder phantometry writes carries a marker file, :data:`MARKER_NAME`, naming the tool,
  the kind of folder (:data:`KINDS`), the marker schema and every entry the run wrote.
* An existing output path is replaced only when it is a folder holding that marker, holding
  nothing but what the marker lists, **and** ``overwrite`` is given. An empty folder is
  filled and kept (nothing can be lost; its owner, mode and access lists stay). Anything else (a file, a link, a folder of the user's, the
  current folder) is refused, with or without ``overwrite``.
* The output may not be, lie inside, or contain any input path (symbolic links resolved).
* :func:`check_output_folder` makes all these checks before any work; :func:`output_folder`
  makes them again at the moment of replacing.
* Results are written into a temporary sibling folder named
  ``.NAME.phantometry-tmp-HOST-PID-RANDOM`` and moved into place when complete; with
  ``overwrite`` the old folder is swapped out atomically (``renameat2(RENAME_EXCHANGE)`` where
  the system has it) and removed after. A later run into the same place removes temporary
  folders of exactly that pattern whose process (on this host) is no longer alive, and nothing else.
* Folders are made with ``os.mkdir`` (mode 0777 less the umask), files with the usual 0666
  less the umask: the user's umask decides, as for any other tool.
* A system error while writing (no space, file-size limit, permission, a file where a folder
  should be) becomes one :class:`~phantometry.errors.OutputError` line naming the path and
  the system's reason; the temporary folder and any parent folders this run created are removed.
"""

from __future__ import annotations

import ctypes
import errno
import json
import os
import re
import secrets
import shutil
import socket
import struct
import zlib
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Iterator

from .errors import OutputError, OutputRefused

#: Name of the marker file in every folder phantometry writes.
MARKER_NAME = ".phantometry-results.json"
#: Version of the marker's layout.
MARKER_SCHEMA = 1

KIND_MEASURE = "measure"
KIND_COMPARE = "compare"
KIND_SCAN = "synthetic-scan"
KIND_DEMO = "demo"
KIND_HARMONISE = "harmonise"
#: The kinds of folder a marker may name, with the words the terminal uses for them.
KINDS = {
    KIND_MEASURE: "measure results folder",
    KIND_COMPARE: "compare results folder",
    KIND_SCAN: "synthetic scan folder",
    KIND_DEMO: "demo folder",
    KIND_HARMONISE: "harmonise results folder",
}

#: PNG text key that marks a picture phantometry wrote beside an output folder.
PNG_KEY = "phantometry"

_TMP_WORD = "phantometry-tmp"
_OLD_WORD = "phantometry-old"


# ============================================================================== data types
@dataclass(frozen=True)
class OutputPlan:
    """The outcome of :func:`check_output_folder`: where to write and what is there now.

    Attributes
    ----------
    target : Path
        Absolute output path (the last component not resolved).
    kind : str
        One of :data:`KINDS`.
    overwrite : bool
    inputs : tuple of Path
        Absolute input paths the output must stay clear of.
    state : str
        ``"absent"``, ``"empty"`` (an empty folder) or ``"ours"`` (a marked folder).
    previous : dict or None
        The marker of the folder to be replaced.
    """

    target: Path
    kind: str
    overwrite: bool
    inputs: tuple[Path, ...]
    state: str
    previous: dict[str, Any] | None = None


@dataclass
class WrittenFolder:
    """What :func:`output_folder` did, for the terminal.

    Attributes
    ----------
    path : Path
    kind : str
    replaced : str or None
        Kind of the earlier folder that was replaced (None: the folder is new).
    dropped : list of str
        Entries the replaced folder held that this run did not write (e.g. ``report.html``).
    """

    path: Path
    kind: str
    replaced: str | None = None
    dropped: list[str] = field(default_factory=list)

    def message(self) -> str | None:
        """One line saying an earlier folder was replaced, or None."""
        if self.replaced is None:
            return None
        text = f"replaced the earlier {KINDS.get(self.replaced, self.replaced)} {self.path}"
        if self.dropped:
            shown = ", ".join(self.dropped[:8]) + (f" and {len(self.dropped) - 8} more" if len(self.dropped) > 8 else "")
            text += f"; it also held {shown}, which this run did not write (removed)"
        return text


class Staging:
    """The temporary folder of a run (``path``); ``written`` is set once it is in place."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.written: WrittenFolder | None = None


# ============================================================================== checks
def _abs(p: str | os.PathLike) -> Path:
    return Path(os.path.abspath(os.fspath(p)))


def _forms(p: str | os.PathLike) -> set[Path]:
    """The path as given (absolute) and with every symbolic link resolved."""
    return {_abs(p), Path(os.path.realpath(os.fspath(p)))}


def _within(inner: Path, outer: Path) -> bool:
    return inner == outer or outer in inner.parents


def existing_inputs(*groups: Any) -> list[Path]:
    """Absolute paths of the given inputs that exist on disk (names of built-ins are skipped).

    Each group may be None, a path, or a list of paths; a template or band *name* that is
    not a file is ignored.
    """
    out: list[Path] = []
    for g in groups:
        if g is None or isinstance(g, dict):
            continue
        items = [g] if isinstance(g, (str, os.PathLike)) else list(g)
        for p in items:
            if p is None or isinstance(p, dict) or os.fspath(p) == "":
                continue
            if os.path.lexists(os.fspath(p)):
                out.append(_abs(p))
    return out


def _identity(p: Path) -> tuple[int, int] | None:
    try:
        st = os.stat(p)
    except (OSError, ValueError):
        return None
    return st.st_dev, st.st_ino


def _chain(p: Path) -> list[tuple[int, int]]:
    """File identities (device, inode) of ``p`` (links resolved) and of every existing folder above it."""
    r = Path(os.path.realpath(p))
    return [i for i in (_identity(q) for q in (r, *r.parents)) if i is not None]


def _relation(target: Path, p: Path) -> str | None:
    """How ``target`` relates to the input ``p``: ``"same"``, ``"inside"``, ``"contains"`` or None.

    Compared by path (as given and with links resolved) and by file identity, so that another
    spelling of the same folder (a bind mount, a case-insensitive file system) is also caught.
    """
    for pf in _forms(p):
        for tf in _forms(target):
            if tf == pf:
                return "same"
            if _within(tf, pf):
                return "inside"
            if _within(pf, tf):
                return "contains"
    t_id, p_id = _identity(target), _identity(p)
    if p_id is not None and p_id in _chain(target):
        return "same" if t_id == p_id else "inside"
    if t_id is not None and t_id in _chain(p):
        return "contains"
    return None


def _check_inputs(target: Path, inputs: Iterable[Path]) -> None:
    """Refuse an output that is, lies inside, or contains an input."""
    for p in inputs:
        rel = _relation(target, p)
        if rel == "same":
            raise OutputRefused(f"{target}: this is the input {p}; give a results folder outside the inputs")
        if rel == "inside":
            raise OutputRefused(f"{target}: lies inside the input folder {p}; give a results folder outside the inputs")
        if rel == "contains":
            raise OutputRefused(f"{target}: contains the input {p}; give a results folder outside the inputs")


def read_marker(folder: str | os.PathLike) -> dict[str, Any] | None:
    """The marker of ``folder`` if it holds a valid phantometry marker, else None."""
    path = Path(folder) / MARKER_NAME
    try:
        if path.is_symlink() or not path.is_file() or path.stat().st_size > 16 * 2**20:
            return None
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(doc, dict) or doc.get("tool") != "phantometry" or doc.get("kind") not in KINDS:
        return None
    if not isinstance(doc.get("schema"), int) or not isinstance(doc.get("entries"), list):
        return None
    return doc


def _entries(folder: Path) -> list[str]:
    """Every entry under ``folder`` (relative POSIX paths, folders with a trailing slash), sorted.

    Symbolic links are listed as entries and not followed.
    """
    out: list[str] = []
    for root, dirs, files in os.walk(folder, followlinks=False):
        rel = Path(root).relative_to(folder)
        for d in dirs:
            p = (rel / d).as_posix()
            out.append(p + ("" if os.path.islink(os.path.join(root, d)) else "/"))
        out.extend((rel / f).as_posix() for f in files)
    return sorted(out)


def _unlisted(folder: Path, marker: dict[str, Any]) -> list[str]:
    listed = set(marker["entries"]) | {MARKER_NAME}
    return [e for e in _entries(folder) if e not in listed]


def _first_existing_ancestor(target: Path) -> Path:
    p = target.parent
    while not os.path.lexists(p) and p != p.parent:
        p = p.parent
    return p


def check_output_folder(
    target: str | os.PathLike,
    kind: str,
    *,
    inputs: Iterable[str | os.PathLike] = (),
    overwrite: bool = False,
) -> OutputPlan:
    """Decide whether ``target`` may be written; refuse with one line otherwise.

    Writes nothing. Call it before any work; :func:`output_folder` calls it again before
    replacing anything.

    Parameters
    ----------
    target : path
        The output folder (``--out``).
    kind : str
        One of :data:`KINDS`.
    inputs : paths
        Every input path of the run that exists on disk (see :func:`existing_inputs`).
    overwrite : bool
        Replace an existing folder that phantometry wrote (``--overwrite``).

    Returns
    -------
    OutputPlan

    Raises
    ------
    OutputRefused
        The target is a file or a link, the current folder, a folder phantometry did not
        write, a marked folder without ``overwrite`` or with files added since, or it is,
        lies inside or contains an input; or the place cannot be written.
    """
    if kind not in KINDS:
        raise ValueError(f"unknown output kind {kind!r}")
    if os.fspath(target) == "":
        raise OutputRefused("the results folder is empty text; give a folder name, e.g. results")
    t = _abs(target)
    ins = tuple(_abs(p) for p in inputs)
    _check_inputs(t, ins)
    try:
        cwd = Path(os.getcwd())
    except OSError:
        cwd = None
    if cwd is not None and (t == cwd or Path(os.path.realpath(t)) == Path(os.path.realpath(cwd))):
        raise OutputRefused(f"{t}: this is the current folder; give a new folder name for the results, e.g. results")
    if cwd is not None and _within(Path(os.path.realpath(cwd)), Path(os.path.realpath(t))):
        raise OutputRefused(f"{t}: contains the current folder; give a new folder name for the results")
    if os.path.islink(t):
        raise OutputRefused(f"{t}: is a symbolic link; give a folder name that is not a link (the link is left alone)")
    if os.path.lexists(t):
        if not t.is_dir():
            raise OutputRefused(f"{t}: is an existing file, not a results folder; give a new folder name (the file is left alone)")
        try:
            listing = os.listdir(t)
        except OSError as exc:
            raise OutputRefused(f"{t}: cannot be read ({exc.strerror}); give a new folder name") from None
        if not listing:
            _check_writable(t.parent, t)
            return OutputPlan(t, kind, overwrite, ins, "empty")
        marker = read_marker(t)
        if marker is None:
            raise OutputRefused(
                f"{t}: already exists and was not written by phantometry (no {MARKER_NAME}); it is never replaced, "
                "even with --overwrite: give a new folder name or move it away"
            )
        what = KINDS[marker["kind"]]
        if not overwrite:
            raise OutputRefused(f"{t}: is a phantometry {what} from an earlier run; add --overwrite to replace it, or give a new folder name")
        extra = _unlisted(t, marker)
        if extra:
            shown = ", ".join(extra[:5]) + (f" and {len(extra) - 5} more" if len(extra) > 5 else "")
            raise OutputRefused(
                f"{t}: is a phantometry {what} but also holds {shown}, which phantometry did not write; move those away "
                "or give a new folder name (nothing was replaced)"
            )
        _check_writable(t.parent, t)
        return OutputPlan(t, kind, overwrite, ins, "ours", marker)
    anc = _first_existing_ancestor(t)
    if not anc.is_dir():
        raise OutputRefused(f"{t}: {anc} is a file, not a folder; give a results folder elsewhere")
    _check_writable(anc, t)
    return OutputPlan(t, kind, overwrite, ins, "absent")


def _access_errno(folder: Path) -> int:
    """0 when this process may create entries in ``folder``, else the system's error number.

    ``access(2)`` through the C library, for its error number (``os.access`` gives only a
    yes or no): EACCES (permission bits), EROFS (read-only file system), EPERM (an immutable
    folder). The super-user passes the permission bits; an error at writing time is still
    turned into one line by :func:`output_folder`.
    """
    try:
        fn = ctypes.CDLL(None, use_errno=True).access
        fn.argtypes = [ctypes.c_char_p, ctypes.c_int]
        fn.restype = ctypes.c_int
    except (AttributeError, OSError, TypeError):
        return 0 if os.access(folder, os.W_OK | os.X_OK) else errno.EACCES
    if fn(os.fsencode(folder), os.W_OK | os.X_OK) == 0:
        return 0
    return ctypes.get_errno() or errno.EACCES


def _check_writable(folder: Path, target: Path) -> None:
    """Refuse early when ``folder`` (where the results will be created) cannot be written."""
    e = _access_errno(folder)
    if e:
        raise OutputRefused(f"{target}: cannot write in {folder}: {os.strerror(e)}")


# ============================================================================== temp folders
def _host_tag() -> str:
    tag = re.sub(r"[^A-Za-z0-9]+", "-", socket.gethostname()).strip("-")[:32]
    return tag or "host"


def temp_prefix(target: str | os.PathLike, word: str = _TMP_WORD) -> str:
    """Name prefix of this host's temporary folders for ``target`` (``.NAME.phantometry-tmp-HOST-``)."""
    return f".{Path(target).name}.{word}-{_host_tag()}-"


def _pid_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, another user's
        return True
    except OverflowError:
        return False
    return True


def remove_stale_temps(target: str | os.PathLike) -> list[Path]:
    """Remove temporary folders of ``target`` left by killed runs on this host.

    Only folders named exactly ``.NAME.phantometry-tmp-HOST-PID-RANDOM`` (this host, PID no
    longer alive, RANDOM 8 hex digits) are removed; ``.NAME.phantometry-old-...`` (an earlier
    result moved aside during a replacement) only when ``NAME`` itself exists again.

    Returns
    -------
    list of Path
        The folders removed.
    """
    t = _abs(target)
    removed: list[Path] = []
    try:
        names = os.listdir(t.parent)
    except OSError:
        return removed
    for word in (_TMP_WORD, _OLD_WORD):
        pattern = re.compile(re.escape(temp_prefix(t, word)) + r"(\d{1,10})-[0-9a-f]{8}")
        for name in names:
            m = pattern.fullmatch(name)
            if m is None or _pid_alive(int(m.group(1))):
                continue
            p = t.parent / name
            if p.is_symlink() or not p.is_dir():
                continue
            if word == _OLD_WORD and not t.is_dir():
                continue  # the earlier results may be all that is left: never guess
            shutil.rmtree(p, ignore_errors=True)
            removed.append(p)
    return removed


def _make_temp(target: Path, word: str = _TMP_WORD) -> Path:
    """A new empty sibling folder of ``target`` (mode from the umask)."""
    for _ in range(100):
        p = target.parent / f"{temp_prefix(target, word)}{os.getpid()}-{secrets.token_hex(4)}"
        try:
            os.mkdir(p)
        except FileExistsError:
            continue
        return p
    raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), str(target.parent))


def _make_parents(folder: Path) -> list[Path]:
    """Create the missing folders of ``folder`` (and itself); returns those created, deepest last."""
    missing: list[Path] = []
    p = folder
    while not os.path.lexists(p) and p != p.parent:
        missing.append(p)
        p = p.parent
    created: list[Path] = []
    for p in reversed(missing):
        os.mkdir(p)
        created.append(p)
    return created


# ============================================================================== renames
_AT_FDCWD = -100
_RENAME_NOREPLACE = 1
_RENAME_EXCHANGE = 2


def _renameat2(src: Path, dst: Path, flags: int) -> bool:
    """``renameat2`` (Linux); False when the system or file system does not offer it."""
    try:
        fn = ctypes.CDLL(None, use_errno=True).renameat2
    except (AttributeError, OSError, TypeError):
        return False
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    fn.restype = ctypes.c_int
    if fn(_AT_FDCWD, os.fsencode(src), _AT_FDCWD, os.fsencode(dst), flags) == 0:
        return True
    e = ctypes.get_errno()
    if e in (errno.ENOSYS, errno.EINVAL, errno.EOPNOTSUPP):
        return False
    raise OSError(e, os.strerror(e), str(dst))


def _move_into_place(tmp: Path, target: Path) -> None:
    """Rename ``tmp`` to an absent ``target`` without replacing anything that appeared meanwhile."""
    if _renameat2(tmp, target, _RENAME_NOREPLACE):
        return
    if os.path.lexists(target):
        raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), str(target))
    os.rename(tmp, target)


def _fill_empty(tmp: Path, target: Path) -> None:
    """Move the entries of ``tmp`` into the empty folder ``target``, the marker last, then remove ``tmp``.

    The user's folder itself (its owner, mode, set-group-id bit, access lists) is kept. No
    entry replaces one that appeared meanwhile; on an error the entries moved so far are
    taken out again.
    """
    moved: list[Path] = []
    try:
        for name in sorted(os.listdir(tmp), key=lambda n: (n == MARKER_NAME, n)):
            _move_into_place(tmp / name, target / name)
            moved.append(target / name)
    except BaseException:
        for m in moved:
            if m.is_dir() and not m.is_symlink():
                shutil.rmtree(m, ignore_errors=True)
            else:
                m.unlink(missing_ok=True)
        raise
    os.rmdir(tmp)


def _swap(tmp: Path, target: Path) -> Path:
    """Put ``tmp`` at ``target``; returns where the old folder now is (to be removed)."""
    if _renameat2(tmp, target, _RENAME_EXCHANGE):
        return tmp
    old = _make_temp(target, _OLD_WORD)
    os.rmdir(old)
    os.rename(target, old)
    try:
        os.rename(tmp, target)
    except OSError:
        os.rename(old, target)
        raise
    return old


# ============================================================================== writing
def write_marker(folder: Path, kind: str) -> dict[str, Any]:
    """Write the marker of a finished folder, listing every entry in it; returns the marker."""
    from . import __version__

    doc = {
        "tool": "phantometry",
        "version": __version__,
        "schema": MARKER_SCHEMA,
        "kind": kind,
        "written_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "note": "Written by phantometry. With --overwrite it may replace this folder, "
        "only while it holds nothing but the entries listed here.",
        "entries": [e for e in _entries(folder) if e != MARKER_NAME],
    }
    (folder / MARKER_NAME).write_text(json.dumps(doc, indent=1) + "\n", encoding="utf-8")
    return doc


def _output_error(exc: OSError, target: Path, tmp: Path | None) -> OutputError:
    reason = exc.strerror or os.strerror(exc.errno or 0) or type(exc).__name__
    name = exc.filename
    where = ""
    if name is not None:
        p = _abs(name)
        if tmp is not None and _within(p, tmp) and p != tmp:
            where = f" ({p.relative_to(tmp).as_posix()})"
        elif p != target and p != tmp and not p.name.startswith(f".{target.name}.phantometry-"):
            where = f" ({p})"  # e.g. a parent folder that could not be made
    return OutputError(f"{target}: cannot write the results{where}: {reason}")


@contextmanager
def output_folder(
    target: str | os.PathLike,
    kind: str,
    *,
    inputs: Iterable[str | os.PathLike] = (),
    overwrite: bool = False,
) -> Iterator[Staging]:
    """Write a folder atomically under the rules of this module.

    Usage::

        with output_folder(out, KIND_MEASURE, inputs=paths, overwrite=False) as staging:
            (staging.path / "measurements.csv").write_text(...)
        staging.written.message()   # "replaced the earlier ..." or None

    The checks of :func:`check_output_folder` run first (again); then temporary folders of
    killed runs are removed (:func:`remove_stale_temps`), a temporary sibling folder is
    made and yielded. On success the marker is written and the folder moved into place
    (replacing the earlier one when the plan allows); on any error the temporary folder,
    and any parent folders made for it, are removed. An ``OSError`` with a system reason
    becomes :class:`~phantometry.errors.OutputError`.
    """
    plan = check_output_folder(target, kind, inputs=inputs, overwrite=overwrite)
    t = plan.target
    created: list[Path] = []
    tmp: Path | None = None
    try:
        try:
            created = _make_parents(t.parent)
            remove_stale_temps(t)
            tmp = _make_temp(t)
            staging = Staging(tmp)
            yield staging
            marker = write_marker(tmp, kind)
            staging.written = _put_in_place(tmp, plan, marker)
            tmp = None
        except OSError as exc:
            if exc.errno is None:
                raise
            if exc.filename is not None and tmp is not None and not _within(_abs(exc.filename), t.parent):
                raise  # not about the output (e.g. an input vanished): not ours to reword
            raise _output_error(exc, t, tmp) from None
    except BaseException:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)
        for p in reversed(created):
            try:
                os.rmdir(p)
            except OSError:
                pass
        raise


def _put_in_place(tmp: Path, plan: OutputPlan, marker: dict[str, Any]) -> WrittenFolder:
    """Re-check the target, then move ``tmp`` there; returns what was done."""
    now = check_output_folder(plan.target, plan.kind, inputs=plan.inputs, overwrite=plan.overwrite)
    t = plan.target
    if now.state == "absent":
        _move_into_place(tmp, t)
        return WrittenFolder(t, plan.kind)
    if now.state == "empty":
        _fill_empty(tmp, t)
        return WrittenFolder(t, plan.kind)
    previous = now.previous or {}
    old = _swap(tmp, t)
    shutil.rmtree(old, ignore_errors=True)
    new_entries = set(marker["entries"])
    dropped = [e for e in previous.get("entries", []) if e not in new_entries and not e.endswith("/")]
    top = sorted({e.split("/")[0] for e in dropped})
    return WrittenFolder(t, plan.kind, replaced=previous.get("kind", plan.kind), dropped=top)


# ============================================================================== pictures beside
def _png_chunks(data: bytes) -> Iterator[tuple[bytes, bytes]]:
    if data[:8] != b"\x89PNG\r\n\x1a\n":
        return
    pos = 8
    while pos + 8 <= len(data):
        (n,) = struct.unpack(">I", data[pos:pos + 4])
        ctype = data[pos + 4:pos + 8]
        yield ctype, data[pos + 8:pos + 8 + n]
        if ctype in (b"IDAT", b"IEND"):
            return
        pos += 12 + n


def png_is_ours(path: str | os.PathLike) -> bool:
    """True when ``path`` is a PNG picture carrying phantometry's text key (:data:`PNG_KEY`)."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(64 * 1024)
    except OSError:
        return False
    for ctype, body in _png_chunks(head):
        if ctype == b"tEXt" and body.split(b"\0", 1)[0] == PNG_KEY.encode():
            return True
    return False


def _png_with_key(data: bytes, value: str) -> bytes:
    """The PNG ``data`` with a tEXt chunk ``PNG_KEY: value`` after its header chunk."""
    body = PNG_KEY.encode() + b"\0" + value.encode("latin-1", "replace")
    chunk = struct.pack(">I", len(body)) + b"tEXt" + body + struct.pack(">I", zlib.crc32(b"tEXt" + body) & 0xFFFFFFFF)
    (n,) = struct.unpack(">I", data[8:12])
    cut = 8 + 12 + n  # after IHDR
    return data[:cut] + chunk + data[cut:]


def write_picture_beside(path: str | os.PathLike, draw, value: str, *, inputs: Iterable[str | os.PathLike] = ()) -> Path | None:
    """Write a PNG next to an output folder, never over a file phantometry did not write.

    The picture is written only when ``path`` does not exist or is a PNG phantometry wrote
    (:func:`png_is_ours`), its folder exists, and it is none of the inputs. It is drawn by
    ``draw(tmp_path)`` into a temporary name (``.NAME.phantometry-tmp-HOST-PID-RANDOM.png``;
    such files of killed runs are removed), marked with a PNG text chunk and renamed into place.

    Returns
    -------
    Path or None
        The picture, or None when it was not written (the reason does not matter to the caller:
        the picture is a courtesy).
    """
    p = _abs(path)
    if any(p in _forms(i) for i in inputs):
        return None
    if os.path.lexists(p) and (p.is_symlink() or not p.is_file() or not png_is_ours(p)):
        return None
    if not p.parent.is_dir():
        return None
    prefix = temp_prefix(p)
    stale = re.compile(re.escape(prefix) + r"(\d{1,10})-[0-9a-f]{8}\.png")
    for name in os.listdir(p.parent):  # pictures of killed runs (this host, process gone)
        m = stale.fullmatch(name)
        if m is not None and not _pid_alive(int(m.group(1))) and (p.parent / name).is_file() and not (p.parent / name).is_symlink():
            (p.parent / name).unlink()
    tmp = p.with_name(f"{prefix}{os.getpid()}-{secrets.token_hex(4)}.png")
    try:
        draw(tmp)
        data = tmp.read_bytes()
        tmp.write_bytes(_png_with_key(data, value))
        if os.path.lexists(p) and not png_is_ours(p):
            return None
        os.replace(tmp, p)
        return p
    except Exception:
        return None
    finally:
        if tmp.exists():
            tmp.unlink()


__all__ = [
    "MARKER_NAME",
    "MARKER_SCHEMA",
    "KINDS",
    "KIND_MEASURE",
    "KIND_COMPARE",
    "KIND_SCAN",
    "KIND_DEMO",
    "KIND_HARMONISE",
    "OutputPlan",
    "WrittenFolder",
    "Staging",
    "check_output_folder",
    "existing_inputs",
    "output_folder",
    "read_marker",
    "remove_stale_temps",
    "temp_prefix",
    "write_marker",
    "png_is_ours",
    "write_picture_beside",
]
