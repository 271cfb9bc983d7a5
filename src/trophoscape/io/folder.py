"""Writing a run's output folder: GeoPackage, CSV, NetCDF, JSON, maps and the report.

Everything is written into a staging folder beside the target and moved into place only
when every file is complete, so a failed run leaves no half-written output and an existing
folder keeps its old files until the new ones are whole. Then the old folder is replaced as
a whole: it is renamed aside, the staging folder renamed into place, and the old one deleted,
so no file of an earlier run survives beside the new ones.

An output folder can never destroy the user's files (:func:`check_out`). It is never an
input folder, the folder of an input or a folder holding one, the current folder, the home
folder, the root, a folder directly under the root, a mount point, or a folder holding the
Python installation or trophoscape itself; folders are compared by identity (``os.stat``),
not by spelling, so a differently written path to the same folder is caught too. Only a
folder that is empty or wholly trophoscape's is deleted when it is replaced: its marker file
``.trophoscape-output`` lists every path trophoscape wrote into it (subfolders included), and
anything else in it makes it the user's. A folder of the user's is never deleted: it needs
``--force``, and then it is renamed to a visible ``NAME.replaced-YYYYmmdd-HHMMSS`` beside the
new one, which a one-line notice names.

Staging folders are named ``.NAME.partial-PID-XXXXXXXX`` (the writing process's id, eight
hex digits) and carry a small file ``.trophoscape-staging`` (process id, host name, process
start time); they are removed on any error, Ctrl-C or SIGTERM. One left by a killed process
(SIGKILL, power loss) is removed by the next command writing to ``NAME`` when it carries that
file, was made on the same host, and its process is gone (POSIX systems only; elsewhere
nothing is removed). A final swap that is refused (a file appeared in the old folder during
the run) keeps the finished results in a visible ``NAME.new-YYYYmmdd-HHMMSS``.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import json
import os
import re
import secrets
import shutil
import signal
import socket
import sqlite3
import sys
import tempfile
import threading
from pathlib import Path


from ..errors import InputError, Terminated, param, raise_if_stopped
from .ledger import LEDGER_COLUMNS

__all__ = ["staged_folder", "working_folder", "check_out", "out_argument",
           "file_sha256", "written_count", "written_since", "MARKER_NAME"]

#: The marker of an output folder: JSON with ``written_by``, ``format`` (2), ``version``,
#: ``command``, ``created``, ``files`` (every path trophoscape wrote, relative, POSIX, a
#: folder with a trailing "/") and ``allow`` (patterns of paths the folder may come to hold,
#: ``*`` standing for any part of one name).
MARKER_NAME = ".trophoscape-output"
_MARKER_FORMAT = 2
#: The file that marks a staging or set-aside folder as this process's (JSON: pid, host,
#: process start time).
STAGING_NAME = ".trophoscape-staging"
#: Files an operating system drops into any folder; never counted as the user's.
_SYSTEM_FILES = frozenset({".DS_Store", "Thumbs.db", "desktop.ini"})

#: Every path an output folder of a version before the marker may hold (written by
#: write_run_files and report.html.write_figures_and_report, report.spread.write_spread,
#: report.corridors.write_corridors and write_comparison, report.sweep.sweep).
_RUN_PATHS = (r"patches\.gpkg|patches\.csv|patches\.geojson|timeseries\.nc|summary\.json"
              r"|report\.html|maps/|maps/[^/]+\.png")
_EARLIER_PATHS = re.compile("(?:" + "|".join([
    _RUN_PATHS,
    r"spread\.csv|spread\.json|origins\.csv",
    r"corridors\.csv|critical\.csv|chosen\.csv|corridors\.json|corridors\.gpkg"
    r"|evaluations\.csv|corridors\.html|corridors\.partial\.csv",
    r"comparison\.csv|comparison\.json|differences_[^/]+\.csv",
    r"runs/|runs/[A-Za-z0-9_-]+/|runs/[A-Za-z0-9_-]+/(?:" + _RUN_PATHS + ")",
    r"ledger\.sqlite|ledger\.sqlite-wal|ledger\.sqlite-shm|sweep\.csv",
    r"runs/[0-9a-f]{16}\.json|runs/\.[0-9a-f]{16}\.json-[^/]+\.tmp|plots/|plots/[^/]+\.png",
]) + ")")
_SWEEP_RECORD = re.compile(r"runs/(?P<id>[0-9a-f]{16})\.json")
#: What a sweep's ledger holds: the tables and columns of every ledger
#: (:mod:`trophoscape.io.ledger`) and the keys a sweep sets in ``meta``
#: (tests/test_outputs_safety.py checks them against a sweep's ledger).
LEDGER_TABLES = {"meta": frozenset({"key", "value"}), "runs": frozenset(LEDGER_COLUMNS)}
LEDGER_META_KEYS = frozenset({"format", "scenario_sha256", "keys"})
#: Staging (``partial``) and set-aside (``old``) folders beside an output folder.
_SIBLING = re.compile(r"\.(?P<name>.+)\.(?P<kind>partial|old)-(?P<pid>[0-9]+)-[0-9a-f]{8}")
#: Path keys of a scenario that name input files.
#: Staging folders open in this process: a folder written inside one is written directly.
_ACTIVE: list[Path] = []
#: Output folders this process has put in place (as the user named them), in order.
_WRITTEN: list[str] = []


def _bytes_sha256(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes.

    Of a folder (a folder of shapefiles, say): SHA-256 over its files (subfolders included,
    system files such as ``.DS_Store`` left out) in sorted order of their paths relative to
    the folder, each as the path (POSIX, UTF-8), a NUL byte, the SHA-256 of its bytes (hex)
    and a newline.
    """
    path = Path(path)
    if not path.is_dir():
        return _bytes_sha256(path)
    h = hashlib.sha256()
    for rel in sorted(e for e in _entries(path) if not e.endswith("/")):
        h.update(rel.encode("utf-8") + b"\0" + _bytes_sha256(path / rel).encode("ascii")
                 + b"\n")
    return h.hexdigest()




def usual_mode(path, mode: int) -> None:
    """``mode`` less the umask: mkdtemp and mkstemp make their results private, and a
    result should get the permissions of any other file the user writes."""
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(path, mode & ~umask)


def write_atomic(path, content) -> Path:
    """Write one file whole or not at all: into a temporary file beside ``path``, renamed
    into place when complete (a reader sees the old file or the new one, never half of one).

    ``content`` is text (written as UTF-8, line ends as given), bytes, or a function that
    writes to the open binary handle it is given. The file gets the usual permissions
    (0o666 less the umask).
    """
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}-", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            if callable(content):
                content(handle)
            else:
                handle.write(content.encode("utf-8") if isinstance(content, str) else content)
        usual_mode(tmp, 0o666)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def written_count() -> int:
    """How many output folders this process has put in place so far."""
    return len(_WRITTEN)


def written_since(count: int) -> list[str]:
    """The output folders put in place after :func:`written_count` returned ``count``."""
    return list(_WRITTEN[count:])


# ------------------------------------------------------------------ where outputs may go




def _shown(path) -> str:
    """A path for a one-line message: as written, or quoted like a Python string when it
    holds a newline or another control character."""
    text = str(path)
    return text if text.isprintable() else repr(text)


def _out_error(out, message: str) -> InputError:
    return InputError(message, file=_shown(out), field=param("out"))


def _reason(exc: OSError) -> str:
    return (exc.strerror or str(exc)).lower()


def _cannot_create(out, why) -> InputError:
    """``why``: the OSError, or its reason in words."""
    reason = _reason(why) if isinstance(why, OSError) else why
    return _out_error(out, f"cannot create the output folder here ({reason}); give {param('out')} a "
                           "folder that can be created and written to")


def _some(names) -> str:
    names = [_shown(n) for n in names]
    shown = ", ".join(names[:3])
    return shown + (f" and {len(names) - 3} more" if len(names) > 3 else "")


def _suggestion(out: Path) -> str:
    return _shown(out / "results")


def _replaced_hint(real: Path) -> str:
    return (f"add {param('force', True)} to write there anyway (the folder is then kept, renamed to "
            f"{_shown(real.name)}.replaced-YYYYmmdd-HHMMSS)")


def _refusal(out, real: Path, state: str, extra) -> InputError:
    """The message for an existing folder that is not (wholly) trophoscape's."""
    if state == "foreign":
        return _out_error(out, f"is a folder trophoscape did not write (it holds "
                               f"{_some(extra)}); give a new or empty folder, or "
                               f"{_replaced_hint(real)}")
    return _out_error(out, f"holds {_some(extra)}, which trophoscape did not write; move that "
                           f"elsewhere or give another folder, or {_replaced_hint(real)}")


def out_argument(text) -> Path:
    """The ``--out`` value as a path, refusing an empty name and an existing file."""
    if not str(text).strip():
        raise InputError("an empty name is not a folder; give the output folder a name, "
                         f"e.g. {param('out', 'results')}", field=param("out"))
    path = Path(text)
    if path.exists() and not path.is_dir():
        raise _out_error(path, "is an existing file, not a folder; give the name of a new "
                               f"folder for the outputs, e.g. {param('out', 'results')}")
    return path


def _resolved(out: Path) -> Path:
    try:
        return Path(out).resolve()
    except RuntimeError:  # Python < 3.13 on a symbolic link loop
        raise _out_error(out, "is a symbolic link that leads back to itself (a loop); remove "
                              f"the loop, or give another folder, e.g. {param('out', 'results')}") from None
    except OSError as exc:
        if "loop" in _reason(exc):
            raise _out_error(out, "is a symbolic link that leads back to itself (a loop); "
                                  "remove the loop, or give another folder, e.g. "
                                  f"{param('out', 'results')}") from None
        raise _cannot_create(out, exc) from None


# -------------------------------------------------- what a folder holds, and whose it is


def _entries(folder: Path) -> list[str]:
    """Every file and folder under ``folder``, as sorted paths relative to it (POSIX; a
    folder with a trailing "/"; symbolic links as they are, not followed), system files
    such as ``.DS_Store`` left out. An unreadable subfolder raises OSError."""
    found = []

    def fail(exc):
        raise exc

    for root, dirs, files in os.walk(folder, onerror=fail):
        rel = Path(root).relative_to(folder).as_posix()
        prefix = "" if rel == "." else rel + "/"
        for d in dirs:
            link = os.path.islink(os.path.join(root, d))
            found.append(prefix + d + ("" if link else "/"))
        found += [prefix + f for f in files if f not in _SYSTEM_FILES]
    return sorted(found)


def _pattern(text: str) -> re.Pattern:
    """A path pattern of the marker's ``allow``: ``*`` is any part of one name."""
    return re.compile(re.escape(str(text)).replace(r"\*", "[^/]*"))


def _topmost(extra) -> list[str]:
    """``extra`` without the paths inside a folder that is itself in ``extra``."""
    folders = [e for e in extra if e.endswith("/")]
    return [e for e in extra if not any(e != f and e.startswith(f) for f in folders)]


def _read_marker(folder: Path) -> dict | None:
    try:
        info = json.loads((folder / MARKER_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(info, dict) or info.get("written_by") != "trophoscape":
        return None
    return info


def _strings(value) -> list[str]:
    return [v for v in value if isinstance(v, str)] if isinstance(value, list) else []


def _says_trophoscape(path: Path) -> bool:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    if not isinstance(data, dict):
        return False
    if path.name == "comparison.json":
        return {"reference", "scenarios", "differences", "caution"} <= set(data)
    prov = data.get("provenance")
    return isinstance(prov, dict) and prov.get("package") == "trophoscape"


def _is_ledger(path: Path) -> bool:
    """Whether ``path`` is a sweep ledger: an SQLite file with the tables, columns and meta
    keys a sweep writes. Opened read-only and immutable, so that nothing is written beside
    it (a plain read-only open of a WAL database leaves -wal and -shm files); a ledger whose
    tables are still only in its -wal file (a sweep killed at once) is not recognised."""
    try:
        conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro&immutable=1", uri=True)
    except (sqlite3.Error, ValueError, OSError):
        return False
    try:
        for table, columns in LEDGER_TABLES.items():
            found = {row[1] for row in conn.execute(f"PRAGMA table_info({table})")}
            if not columns <= found:
                return False
        keys = {row[0] for row in conn.execute("SELECT key FROM meta")}
        return LEDGER_META_KEYS <= keys
    except sqlite3.Error:
        return False
    finally:
        conn.close()


def _is_sweep_record(path: Path, run_id: str) -> bool:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(data, dict) and data.get("run_id") == run_id and "status" in data


def _earlier_ownership(folder: Path, entries: list[str], marker) -> tuple[str, list[str]]:
    """Whose a folder without a marker of the current format is: an output folder of an
    earlier version holds only paths trophoscape writes, every JSON summary in it carries
    trophoscape's provenance, a ledger in it is a sweep's, and (without any marker) at least
    one of those is there."""
    listed = None if marker is None else {n.split("/")[0] for n in _strings(marker.get("files"))}
    extra, evidence = [], marker is not None
    for e in entries:
        if marker is not None and e == MARKER_NAME:
            continue
        if not _EARLIER_PATHS.fullmatch(e) or (listed is not None
                                               and e.split("/")[0] not in listed):
            extra.append(e)
            continue
        name = e.rsplit("/", 1)[-1]
        record = _SWEEP_RECORD.fullmatch(e)
        if name in ("summary.json", "spread.json", "corridors.json", "comparison.json"):
            genuine = _says_trophoscape(folder / e)
        elif e == "ledger.sqlite":
            genuine = _is_ledger(folder / e)
        elif record is not None:  # a run's record: checked, but no proof on its own
            if not _is_sweep_record(folder / e, record["id"]):
                extra.append(e)
            continue
        else:
            continue
        if genuine:
            evidence = True
        else:
            extra.append(e)
    if extra:
        return ("mixed" if marker is not None else "foreign"), _topmost(extra)
    if not evidence:
        return "foreign", _topmost(entries)
    return "ours", []


def _ownership(folder: Path) -> tuple[str, list[str]]:
    """``("empty" | "ours" | "mixed" | "foreign", paths trophoscape did not write)``.

    "ours": the marker lists every path in the folder, subfolders included (or allows it),
    or it is an output folder of an earlier version (:func:`_earlier_ownership`); "mixed":
    marked, with other files too; "foreign": anything else.
    """
    entries = _entries(folder)
    if not entries:
        return "empty", []
    marker = _read_marker(folder)
    if marker is None or marker.get("format") != _MARKER_FORMAT:
        return _earlier_ownership(folder, entries, marker)
    listed = set(_strings(marker.get("files"))) | {MARKER_NAME}
    allowed = [_pattern(p) for p in _strings(marker.get("allow"))]
    extra = [e for e in entries
             if e not in listed and not any(p.fullmatch(e) for p in allowed)]
    return ("mixed" if extra else "ours"), _topmost(extra)


# ---------------------------------------------------------- folders compared by identity


def _stat(path):
    try:
        return os.stat(path)
    except (OSError, ValueError):
        return None


def _level(target, path: Path) -> int | None:
    """How far up from ``path`` the folder of stat ``target`` is: 0 for ``path`` itself, 1
    for its parent, and so on; None when it is none of them."""
    if target is None:
        return None
    for k, p in enumerate([path, *path.parents]):
        st = _stat(p)
        if st is not None and os.path.samestat(st, target):
            return k
    return None


def _absolute(path) -> Path:
    return Path(os.path.abspath(path))


def _resolve_quietly(path) -> Path | None:
    try:
        return Path(path).resolve()
    except (OSError, RuntimeError):
        return None


def _find(target, path) -> tuple[int, Path] | None:
    """Where the folder of stat ``target`` is among ``path`` and its parents, as written
    (absolute) and as resolved: ``(level, the path that was searched)``."""
    for candidate in (_absolute(path), _resolve_quietly(path)):
        if candidate is None:
            continue
        k = _level(target, candidate)
        if k is not None:
            return k, candidate
    return None


def _program_folders() -> list[Path]:
    return [Path(sys.prefix), Path(sys.base_prefix), Path(__file__).resolve().parents[1]]  # the package folder


def _sibling_example(out: Path) -> str:
    """A new folder beside ``out`` (not inside it: ``out`` is an input folder)."""
    return _shown(out.with_name(f"{out.name}-results") if out.name else Path("results"))


def _check_place(out: Path, real: Path, inputs) -> None:
    """The rules that hold even with ``--force``."""
    st = _stat(real)
    root = Path(real.anchor)
    if real == root or (st is not None and os.path.samestat(st, os.stat(root))):
        raise _out_error(out, "is the root of the file system; give a new folder for the "
                              f"outputs, e.g. {param('out', 'results')}")
    parent = _stat(real.parent)
    if real.parent == root or (parent is not None and os.path.samestat(parent, os.stat(root))):
        raise _out_error(out, "is a folder directly under the root of the file system, which "
                              "is never replaced; give a new folder inside it, e.g. "
                              f"{param('out', _suggestion(out))}")
    if st is None:  # a new folder holds nothing yet
        return
    with contextlib.suppress(RuntimeError, KeyError, OSError):
        home = Path.home()
        found = _find(st, home)
        if found is not None:
            what = "is your home folder" if found[0] == 0 else "holds your home folder"
            raise _out_error(out, f"{what}; give a new folder for the outputs, e.g. "
                                  f"{param('out', _suggestion(out))}")
    for folder in _program_folders():
        found = _find(st, folder)
        if found is not None:
            what = "is" if found[0] == 0 else "holds"
            raise _out_error(out, f"{what} the Python installation or the trophoscape package "
                                  f"that is running ({_shown(folder)}); give a new folder for "
                                  f"the outputs elsewhere, e.g. {param('out', _suggestion(out))}")
    for item in inputs:
        if item is None:
            continue
        found = _find(st, item)
        if found is None:
            continue
        k, searched = found
        if k == 0:
            what = f"is the input folder {_shown(searched.name)}"
            example = _sibling_example(out)
        else:
            example = _suggestion(out)
            what = (f"is the folder of the input {_shown(searched.name)}" if k == 1 else
                    f"holds the input {_shown(Path(*searched.parts[-k:]).as_posix())}")
        raise _out_error(out, f"{what}; an output folder is replaced as a whole, so give a "
                              f"new folder for the outputs, e.g. {param('out', example)}")
    with contextlib.suppress(OSError):
        found = _find(st, Path.cwd())
        if found is not None:
            what = "is the current folder" if found[0] == 0 else "holds the current folder"
            raise _out_error(out, f"{what}; an output folder is replaced as a whole, so give "
                                  f"a new folder for the outputs, e.g. "
                                  f"{param('out', _suggestion(out))}")
    if real.is_dir() and os.path.ismount(real):
        raise _out_error(out, f"is a mount point, which cannot be replaced; give a new folder "
                              f"inside it, e.g. {param('out', _suggestion(out))}")


def check_out(out, *, inputs=(), force: bool = False) -> Path:
    """Check that ``out`` may become an output folder; return its resolved path.

    Raises
    ------
    InputError
        Naming ``--out``: an empty name; an existing file; a symbolic link loop; the root, a
        folder directly under it, a mount point; a folder that is or holds an input, the
        current folder, the home folder, the Python installation or trophoscape itself; a
        parent that cannot be written to; an existing folder that is not wholly
        trophoscape's (without ``force``). Folders are compared by identity (``os.stat``).
    """
    out = out_argument(out)
    real = _resolved(out)
    _check_place(out, real, inputs)
    # the staging folder is made beside the output: its parent must be a writable folder
    probe = real.parent
    while not os.path.lexists(probe) and probe != probe.parent:
        probe = probe.parent
    if not probe.is_dir():
        raise _cannot_create(out, "file exists")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise _cannot_create(out, "permission denied")
    if real.is_dir() and not force:
        try:
            state, extra = _ownership(real)
        except OSError as exc:
            raise _cannot_create(out, exc) from None
        if state in ("foreign", "mixed"):
            raise _refusal(out, real, state, extra)
    _clean_stale(real)
    return real


# ------------------------------------------------------------------ staging and swapping


def _process_start(pid: int) -> str | None:
    """When process ``pid`` started (clock ticks since boot, from /proc), if known."""
    try:
        text = Path(f"/proc/{int(pid)}/stat").read_text(encoding="ascii", errors="replace")
    except (OSError, ValueError):
        return None
    fields = text.rpartition(")")[2].split()
    return fields[19] if len(fields) > 19 else None  # field 22 of proc(5): starttime


def _tag(folder: Path) -> None:
    """Mark ``folder`` as this process's staging or set-aside folder."""
    info = {"pid": os.getpid(), "host": socket.gethostname(),
            "started": _process_start(os.getpid())}
    (folder / STAGING_NAME).write_text(json.dumps(info) + "\n", encoding="utf-8")


def _left_by_gone_process(folder: Path, pid: int) -> bool:
    """Whether ``folder`` is a staging or set-aside folder of process ``pid`` on this host,
    and that process is gone (or the id now belongs to a process started later). When
    unsure: no. On systems other than POSIX: always no (os.kill would end the process)."""
    if os.name != "posix" or pid <= 0:
        return False
    try:
        info = json.loads((folder / STAGING_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    if (not isinstance(info, dict) or info.get("pid") != pid
            or info.get("host") != socket.gethostname()):
        return False
    started = info.get("started")
    if pid != os.getpid():
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return True
        except (OSError, OverflowError):  # PermissionError: someone else's live process
            pass
    now = _process_start(pid)
    return started is not None and now is not None and now != started


def _clean_stale(real: Path) -> None:
    """Remove staging folders beside ``real`` left by processes that are gone; put back an
    old folder set aside by such a process when its replacement never arrived."""
    try:
        siblings = list(os.scandir(real.parent))
    except OSError:
        return
    for entry in siblings:
        m = _SIBLING.fullmatch(entry.name)
        if m is None or m["name"] != real.name:
            continue
        with contextlib.suppress(OSError):
            if not entry.is_dir(follow_symlinks=False):
                continue
            folder = Path(entry.path)
            if not _left_by_gone_process(folder, int(m["pid"])):
                continue
            if m["kind"] == "old" and not os.path.lexists(real):
                (folder / STAGING_NAME).unlink(missing_ok=True)
                os.rename(folder, real)
            else:
                shutil.rmtree(folder, ignore_errors=True)


@contextlib.contextmanager
def signals_deferred():
    """Hold Ctrl-C and SIGTERM back for the few renames that put a folder in place.

    In the main thread, the Python handlers of SIGINT and SIGTERM are swapped for ones that
    only note the signal; afterwards the old handlers come back and a noted signal is raised
    (:class:`Terminated` for SIGTERM, KeyboardInterrupt for SIGINT), unless it was ignored
    before. In other threads (which get no signals in Python) nothing changes.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught: list[int] = []

    def note(signum, frame):
        caught.append(signum)

    previous = {}
    try:
        for signum in (signal.SIGINT, signal.SIGTERM):
            previous[signum] = signal.signal(signum, note)
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
    for signum in caught:
        if previous.get(signum) is signal.SIG_IGN:
            continue
        raise Terminated() if signum == signal.SIGTERM else KeyboardInterrupt()


def _save_marker(folder: Path, command, files, allow, created=None) -> None:
    from .. import __version__

    info = {"written_by": "trophoscape", "format": _MARKER_FORMAT, "version": __version__,
            "command": command,
            "created": created
            or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "files": sorted(set(files) - {MARKER_NAME, STAGING_NAME}),
            "allow": sorted(set(allow))}
    (folder / MARKER_NAME).write_text(json.dumps(info, indent=2) + "\n", encoding="utf-8")


def _write_marker(folder: Path, command: str | None, allow=()) -> None:
    """The marker of ``folder``: every path in it now, and the patterns ``allow``."""
    _save_marker(folder, command, _entries(folder), allow)


def allow_names(folder, names) -> None:
    """Add the patterns ``names`` to those the marker of output folder ``folder`` allows (a
    command that keeps a working file in an existing output folder, such as ``corridors``
    its log). What the folder holds now and trophoscape wrote stays listed; nothing the
    user put there is added to the list."""
    folder = Path(folder)
    info = _read_marker(folder) or {}
    _, extra = _ownership(folder)
    mine = [e for e in _entries(folder)
            if not any(e == x or (x.endswith("/") and e.startswith(x)) for x in extra)]
    allow = _strings(info.get("allow")) if info.get("format") == _MARKER_FORMAT else []
    created = info.get("created") if isinstance(info.get("created"), str) else None
    _save_marker(folder, info.get("command"), mine, [*allow, *names], created=created)


def _new_sibling(real: Path, kind: str) -> Path:
    return real.parent / f".{real.name}.{kind}-{os.getpid()}-{secrets.token_hex(4)}"


def _make_staging(real: Path) -> Path:
    """A new staging folder beside ``real``, tagged as this process's."""
    for _ in range(100):
        path = _new_sibling(real, "partial")
        try:
            os.mkdir(path)  # the usual permissions: 0o777 less the umask
        except FileExistsError:
            continue
        try:
            _tag(path)
        except BaseException:
            shutil.rmtree(path, ignore_errors=True)
            raise
        return path
    raise FileExistsError(f"no free staging name beside {real}")


def _set_aside(real: Path) -> Path:
    """Rename the output folder ``real`` (trophoscape's own) to a hidden sibling."""
    aside = _new_sibling(real, "old")
    os.rename(real, aside)
    return aside


def _visible_sibling(real: Path, kind: str) -> Path:
    """A free name ``NAME.KIND-YYYYmmdd-HHMMSS`` (with ``-2``, ``-3``... when taken)."""
    stamp = _dt.datetime.now().strftime("%Y%m%d-%H%M%S")
    base = real.parent / f"{real.name}.{kind}-{stamp}"
    path, k = base, 1
    while os.path.lexists(path):
        k += 1
        path = base.with_name(f"{base.name}-{k}")
    return path


def _notice(text: str) -> None:
    with contextlib.suppress(Exception):
        print(f"note: {text}", file=sys.stderr, flush=True)


def _link_or_copy(src, dst):
    try:
        os.link(src, dst)
    except OSError:
        shutil.copy2(src, dst)
    return dst


def _carry(real: Path, staging: Path, keep) -> None:
    """Hard links (or copies) of the entries ``keep`` of the current folder in the new one."""
    for name in keep:
        src, dst = real / name, staging / name
        if not os.path.lexists(src) or os.path.lexists(dst):
            continue
        if src.is_dir():
            shutil.copytree(src, dst, copy_function=_link_or_copy)
        else:
            _link_or_copy(src, dst)


class _Refused(Exception):
    """The folder in the way holds paths trophoscape did not write (and no ``force``)."""

    def __init__(self, extra):
        super().__init__(extra)
        self.extra = extra


def _replace(staging: Path, real: Path, out, force: bool, *, final: bool = True,
             placed: list | None = None) -> None:
    """Put ``staging`` in the place of ``real``.

    An old folder that is trophoscape's is renamed to a hidden sibling and deleted once the
    new one is in place; one holding anything else is refused (:class:`_Refused`), or with
    ``force`` renamed to a visible ``NAME.replaced-...`` and kept (a notice names it). Ctrl-C
    and SIGTERM wait until the renames are done; if the new folder could not be moved in,
    the old one is put back. ``final``: ``out`` is a finished output (counted by
    :func:`written_count`); ``placed`` gets ``real`` once the new folder is in place.
    """
    aside, hidden, done = None, True, False
    try:
        with signals_deferred():
            if os.path.lexists(real):
                state, extra = _ownership(real)
                if state in ("foreign", "mixed"):  # the user's files: never deleted
                    if not force:
                        raise _Refused(extra)
                    hidden = False
                    target = _visible_sibling(real, "replaced")
                    os.rename(real, target)
                    aside = target
                else:
                    aside = _set_aside(real)
            try:
                if aside is not None and hidden:
                    _tag(aside)
                os.rename(staging, real)
                done = True
                if placed is not None:
                    placed.append(real)
                if final:
                    _WRITTEN.append(_shown(out))
            except BaseException:
                if aside is not None and not done:  # put the old folder back
                    os.rename(aside, real)
                    aside = None
                    if hidden:
                        with contextlib.suppress(OSError):
                            (real / STAGING_NAME).unlink(missing_ok=True)
                raise
    finally:
        if aside is not None and hidden and done:
            shutil.rmtree(aside, ignore_errors=True)
        elif aside is not None and not hidden and os.path.lexists(aside):
            _notice(f"{_shown(out)} held files trophoscape did not write; that folder was "
                    f"kept, renamed to {_shown(Path(out).parent / aside.name)}")


def _inside_stage(path: Path) -> bool:
    absolute = Path(os.path.abspath(path))
    return any(absolute == stage or stage in absolute.parents for stage in _ACTIVE)


def _keep_results(out, real: Path, staging: Path, what: str) -> InputError:
    """Keep a finished staging folder that could not take the place of ``out``: renamed to a
    visible ``NAME.new-...`` (left where it is if even that fails), named in the message."""
    kept = staging
    with contextlib.suppress(OSError):
        target = _visible_sibling(real, "new")
        os.rename(staging, target)
        kept = target
    shown = _shown(Path(out).parent / kept.name)
    return _out_error(out, f"{what}, so the folder was left as it was and the new results "
                           f"were kept in {shown}; move them into place yourself, or deal with "
                           f"that and run again (or add {param('force', True)})")


@contextlib.contextmanager
def staged_folder(out, *, force: bool = False, inputs=(), command: str | None = None,
                  keep=(), allow=(), checked: bool = False):
    """Yield a fresh staging folder; on success it replaces ``out`` as a whole.

    ``out`` is checked first (:func:`check_out`, with ``inputs`` and ``force``; skipped with
    ``checked``, when the caller did it before a long computation). On an exception (Ctrl-C
    and SIGTERM included) the staging folder is removed and ``out`` is left as it was. On
    success the entries ``keep`` of the current ``out`` are carried into it (hard links; a
    sweep's ledger), the marker is written (every path in it, and the patterns ``allow`` of
    paths the folder may come to hold later), and it takes the place of ``out``
    (:func:`_replace`). If that is refused, because something not trophoscape's appeared in
    ``out`` meanwhile or the folder cannot be renamed, the results are kept in a visible
    ``NAME.new-YYYYmmdd-HHMMSS`` that the InputError names.

    A folder written inside a staging folder that is open (a command's run folder within
    its own output) is written directly, without a staging folder of its own.
    """
    out = Path(out)
    if _inside_stage(out):
        out.mkdir(parents=True, exist_ok=True)
        yield out
        return
    real = _resolved(out) if checked else check_out(out, inputs=inputs, force=force)
    try:
        real.parent.mkdir(parents=True, exist_ok=True)
        staging = _make_staging(real)
    except OSError as exc:  # a file in the way, no permission, a read-only disk
        raise _cannot_create(out, exc) from None
    _ACTIVE.append(staging)
    discard = True
    try:
        yield staging
        raise_if_stopped()  # a Ctrl-C swallowed where Python ignores exceptions
        _ACTIVE.remove(staging)
        _carry(real, staging, keep)
        (staging / STAGING_NAME).unlink()
        _write_marker(staging, command, allow)
        try:
            _replace(staging, real, out, force)
        except _Refused as exc:
            discard = False
            raise _keep_results(out, real, staging,
                                f"holds {_some(exc.extra)}, which trophoscape did not write "
                                "and which appeared during the run") from None
        except OSError as exc:  # the old folder is busy, or its parent became read-only
            discard = False
            raise _keep_results(out, real, staging,
                                f"cannot be replaced ({_reason(exc)})") from None
    except BaseException:
        if discard:
            shutil.rmtree(staging, ignore_errors=True)
        raise
    finally:
        if staging in _ACTIVE:
            _ACTIVE.remove(staging)


def _discard_unused(real: Path, made: list) -> None:
    """Undo :func:`working_folder` when nothing was added: remove the folder it made, or
    only the marker it put into the user's empty folder."""
    if not made:
        return
    try:
        if _entries(real) != [MARKER_NAME] or _read_marker(real) is None:
            return
        if made[0] == "folder":
            shutil.rmtree(real, ignore_errors=True)
        else:
            (real / MARKER_NAME).unlink(missing_ok=True)
    except OSError:
        pass


@contextlib.contextmanager
def working_folder(out, *, command: str, allow, inputs=(), force: bool = False,
                   reuse: bool = False, checked: bool = False):
    """An output folder a resumable command fills as it goes (a sweep and its ledger, the
    corridor log); yields its resolved path.

    After :func:`check_out` (skipped with ``checked``), a folder that is trophoscape's is
    kept as it is when ``reuse`` is set (its marker then allows the patterns ``allow``), and
    an empty folder is kept and marked; otherwise a new folder holding only the marker takes
    the place of ``out`` as :func:`staged_folder` would put it (a folder of the user's is
    kept, renamed, with ``force``). On leaving, a folder made here that got nothing but its
    marker is removed again (from a folder the user made, only the marker).
    """
    real = _resolved(out) if checked else check_out(out, inputs=inputs, force=force)
    made: list[str] = []
    try:
        try:
            state = _ownership(real)[0] if real.is_dir() else None
            if reuse and state in ("ours", "mixed"):
                allow_names(real, allow)
            elif state == "empty":
                _write_marker(real, command, allow)
                made.append("marker")
            else:
                real.parent.mkdir(parents=True, exist_ok=True)
                staging = _make_staging(real)
                placed: list = []
                try:
                    (staging / STAGING_NAME).unlink()
                    _write_marker(staging, command, allow)
                    _replace(staging, real, out, force, final=False, placed=placed)
                except _Refused as exc:
                    raise _refusal(out, real, "mixed", exc.extra) from None
                finally:
                    if placed:
                        made.append("folder")
                    else:
                        shutil.rmtree(staging, ignore_errors=True)
        except OSError as exc:
            raise _cannot_create(out, exc) from None
        yield real
    finally:
        _discard_unused(real, made)

























