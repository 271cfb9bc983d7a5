"""Writing a run's output folder: GeoPackage, CSV, NetCDF, JSON, maps and the report.

Everything is written into a staging folder beside the target and moved into place only
when every file is complete, so a failed run leaves no half-written output and an existing
folder keeps its old files until the new ones are whole. Then the old folder is replaced as
a whole: it is renamed aside, the staging folder renamed into place, and the old one deleted,
so no file of an earlier run survives beside the new ones.

An output folder can never destroy the user's files (:func:`check_out`): it is never the
folder of an input or a folder holding one, never the current folder, the home folder or
the root, and an existing folder is replaced only when it is empty or recognisably an
output folder of trophoscape (its marker file ``.trophoscape-output``, written into every
output folder, lists the names trophoscape put there), unless the user asks with ``--force``.

Staging folders are named ``.NAME.partial-PID-XXXXXXXX`` (the writing process's id) and are
removed on any error, Ctrl-C or SIGTERM; one left by a killed process (SIGKILL, power loss) is
removed by the next command writing to ``NAME`` once that process is gone.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import json
import math
import os
import re
import secrets
import shutil
import signal
import tempfile
import threading
from pathlib import Path

import numpy as np

from .errors import InputError
from .system import SPECIES

__all__ = ["staged_folder", "write_run", "write_run_files", "provenance", "file_sha256",
           "SeriesWriter", "SERIES_BLOCK_ROWS", "MARKER_NAME", "out_argument", "check_out",
           "input_files", "working_folder", "allow_names"]

#: The marker file of an output folder: JSON with ``written_by``, ``version``, ``command``,
#: ``created`` and ``files`` (the names trophoscape may keep in the folder).
MARKER_NAME = ".trophoscape-output"
#: Files an operating system drops into any folder; never counted as the user's.
_SYSTEM_FILES = frozenset({".DS_Store", "Thumbs.db", "desktop.ini"})
#: Names in output folders of versions before the marker (recognised by their provenance).
_EARLIER_NAMES = frozenset({
    "patches.gpkg", "patches.csv", "patches.geojson", "timeseries.nc", "summary.json",
    "report.html", "maps", "spread.csv", "spread.json", "origins.csv", "corridors.csv",
    "critical.csv", "chosen.csv", "corridors.json", "corridors.gpkg", "evaluations.csv",
    "corridors.html", "corridors.partial.csv", "comparison.csv", "comparison.json", "runs",
    "ledger.sqlite", "ledger.sqlite-wal", "ledger.sqlite-shm", "sweep.csv", "plots"})
_EARLIER_PATTERN = re.compile(r"differences_.+\.csv")
#: Staging (``partial``) and set-aside (``old``) folders beside an output folder.
_SIBLING = re.compile(r"\.(?P<name>.+)\.(?P<kind>partial|old)-(?P<pid>[0-9]+)-[a-z0-9_]+")
#: Path keys of a scenario that name input files.
_INPUT_KEYS = ("patches.path", "dispersal.corridors", "dispersal.links")
#: Staging folders open in this process: a folder written inside one is written directly.
_ACTIVE: list[Path] = []


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def provenance(study) -> dict:
    """Where a result came from: package version, input hashes, seed and time."""
    from . import __version__

    sc = study.scenario
    inputs = {"patches": study.landscape.path}
    for key in ("dispersal.corridors", "dispersal.links"):
        if sc[key]:
            inputs[key.split(".")[1]] = sc.resolve(sc[key])
    return {
        "package": "trophoscape",
        "version": __version__,
        "scenario_file": None if sc.path is None else str(Path(sc.path).resolve()),
        "scenario_sha256": sc.sha256,
        "input_sha256": {k: file_sha256(v) for k, v in inputs.items() if v is not None},
        "seed": sc["run.seed"],
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }


def _usual_mode(path, mode: int) -> None:
    """``mode`` less the umask: mkdtemp and mkstemp make their results private, and a
    result should get the permissions of any other file the user writes."""
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(path, mode & ~umask)


# ------------------------------------------------------------------ where outputs may go


def input_files(scenario, variants=()) -> list[Path]:
    """The files a scenario reads: the patch file, corridors, links, the scenario file.

    ``variants`` are mappings of scenario keys to values (a sweep's points): a path key
    among them names another input, resolved against the scenario's folder.
    """
    files = [Path(scenario.resolve(scenario[key])) for key in _INPUT_KEYS if scenario[key]]
    for variant in variants:
        for key in _INPUT_KEYS:
            value = dict(variant).get(key)
            if isinstance(value, str) and value:
                files.append(Path(scenario.resolve(value)))
    if scenario.path is not None:
        files.append(Path(scenario.path))
    return files


def _out_error(out, message: str) -> InputError:
    return InputError(message, file=out, field="--out")


def _cannot_create(out, reason: str) -> InputError:
    return _out_error(out, f"cannot create the output folder here ({reason}); give --out a "
                           "folder that can be created and written to")


def out_argument(text) -> Path:
    """The ``--out`` value as a path, refusing an empty name and an existing file."""
    if not str(text).strip():
        raise InputError("an empty name is not a folder; give the output folder a name, "
                         "e.g. --out results", field="--out")
    path = Path(text)
    if path.exists() and not path.is_dir():
        raise _out_error(path, "is an existing file, not a folder; give the name of a new "
                               "folder for the outputs, e.g. --out results")
    return path


def _names(folder: Path) -> list[str]:
    return sorted(n for n in os.listdir(folder) if n not in _SYSTEM_FILES)


def _read_marker(folder: Path) -> dict | None:
    try:
        info = json.loads((folder / MARKER_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(info, dict) or info.get("written_by") != "trophoscape":
        return None
    return info


def _says_trophoscape(path: Path) -> bool:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    if not isinstance(data, dict):
        return False
    if path.name == "comparison.json":
        return {"reference", "scenarios", "caution"} <= set(data)
    prov = data.get("provenance")
    return isinstance(prov, dict) and prov.get("package") == "trophoscape"


def _ownership(folder: Path) -> tuple[str, list[str]]:
    """``("empty" | "ours" | "mixed" | "foreign", names trophoscape did not write)``.

    "ours": the marker lists every name in the folder, or (a folder of an earlier version,
    without the marker) the folder holds only names trophoscape writes and a JSON file with
    trophoscape's provenance or a sweep ledger; "mixed": marked, with other files too.
    """
    names = _names(folder)
    if not names:
        return "empty", []
    marker = _read_marker(folder)
    if marker is not None:
        allowed = set(marker.get("files") or ()) | {MARKER_NAME}
        extra = [n for n in names if n not in allowed]
        return ("mixed" if extra else "ours"), extra
    known = all(n in _EARLIER_NAMES or _EARLIER_PATTERN.fullmatch(n) for n in names)
    evidence = (any(_says_trophoscape(folder / n) for n in
                    ("summary.json", "spread.json", "corridors.json", "comparison.json"))
                or (folder / "ledger.sqlite").is_file())
    if known and evidence:
        return "ours", []
    return "foreign", names


def _some(names: list[str]) -> str:
    shown = ", ".join(names[:3])
    return shown + (f" and {len(names) - 3} more" if len(names) > 3 else "")


def _suggestion(out: Path) -> str:
    return str(out / "results")


def _is_within(inner: Path, outer: Path) -> bool:
    return inner == outer or outer in inner.parents


def check_out(out, *, inputs=(), force: bool = False) -> Path:
    """Check that ``out`` may become an output folder; return its resolved path.

    Raises
    ------
    InputError
        Naming ``--out``: an empty name; an existing file; a folder that is or holds an
        input file, the current folder, the home folder or the root; a parent that cannot
        be written to; an existing folder trophoscape did not write (without ``force``).
    """
    out = out_argument(out)
    real = out.resolve()
    if real == Path(real.anchor):
        raise _out_error(out, "is the root of the file system; give a new folder for the "
                              "outputs, e.g. --out results")
    with contextlib.suppress(RuntimeError, KeyError, OSError):
        home = Path.home().resolve()
        if _is_within(home, real):
            what = "is your home folder" if home == real else "holds your home folder"
            raise _out_error(out, f"{what}; give a new folder for the outputs, e.g. --out "
                                  f"{_suggestion(out)}")
    for item in inputs:
        if item is None:
            continue
        item = Path(item).resolve()
        if item != real and _is_within(item, real):
            what = (f"is the folder of the input {item.name}" if item.parent == real else
                    f"holds the input {item.relative_to(real)}")
            raise _out_error(out, f"{what}; an output folder is replaced as a whole, so give "
                                  f"a new folder for the outputs, e.g. --out "
                                  f"{_suggestion(out)}")
    with contextlib.suppress(OSError):
        cwd = Path.cwd().resolve()
        if _is_within(cwd, real):
            what = "is the current folder" if cwd == real else "holds the current folder"
            raise _out_error(out, f"{what}; an output folder is replaced as a whole, so give "
                                  f"a new folder for the outputs, e.g. --out "
                                  f"{_suggestion(out)}")
    if real.is_dir() and os.path.ismount(real):
        raise _out_error(out, f"is a mount point, which cannot be replaced; give a new folder "
                              f"inside it, e.g. --out {_suggestion(out)}")
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
            raise _cannot_create(out, (exc.strerror or str(exc)).lower()) from None
        if state == "foreign":
            raise _out_error(out, f"is a folder trophoscape did not write (it holds "
                                  f"{_some(extra)}); give a new or empty folder, or add "
                                  "--force to replace it and everything in it")
        if state == "mixed":
            raise _out_error(out, f"holds {_some(extra)}, which trophoscape did not write; "
                                  "move that elsewhere or give another folder, or add --force "
                                  "to replace the folder and everything in it")
    _clean_stale(real)
    return real


# ------------------------------------------------------------------ staging and swapping


def _alive(pid: int) -> bool:
    """Whether process ``pid`` may still be running (when unsure: yes)."""
    if pid == os.getpid():
        return True
    if os.name != "posix":  # os.kill would end the process there; never guess
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # PermissionError: someone else's live process
        return True
    return True


def _clean_stale(real: Path) -> None:
    """Remove staging folders beside ``real`` left by processes that are gone; put back an
    old folder set aside by such a process when its replacement never arrived."""
    try:
        siblings = list(os.scandir(real.parent))
    except OSError:
        return
    for entry in siblings:
        m = _SIBLING.fullmatch(entry.name)
        if m is None or m["name"] != real.name or _alive(int(m["pid"])):
            continue
        with contextlib.suppress(OSError):
            if not entry.is_dir(follow_symlinks=False):
                continue
            if m["kind"] == "old" and not os.path.lexists(real):
                os.rename(entry.path, real)
            else:
                shutil.rmtree(entry.path, ignore_errors=True)


@contextlib.contextmanager
def _signals_held():
    """Hold Ctrl-C and SIGTERM back for the few renames that put a folder in place."""
    if (hasattr(signal, "pthread_sigmask")
            and threading.current_thread() is threading.main_thread()):
        before = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT, signal.SIGTERM})
        try:
            yield
        finally:
            signal.pthread_sigmask(signal.SIG_SETMASK, before)
    else:
        yield


def _write_marker(folder: Path, command: str | None, names) -> None:
    from . import __version__

    info = {"written_by": "trophoscape", "version": __version__, "command": command,
            "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "files": sorted(set(names) - {MARKER_NAME})}
    path = folder / MARKER_NAME
    path.write_text(json.dumps(info, indent=2) + "\n", encoding="utf-8")


def allow_names(folder, names) -> None:
    """Add ``names`` to those the marker of output folder ``folder`` allows (a command that
    keeps a working file in an existing output folder, such as ``corridors`` its log)."""
    folder = Path(folder)
    info = _read_marker(folder)
    if info is None:  # a folder of an earlier version: what it holds now is trophoscape's
        info = {"files": _names(folder)}
    _write_marker(folder, info.get("command"), [*(info.get("files") or ()), *names])


def _set_aside(real: Path) -> Path:
    aside = real.parent / f".{real.name}.old-{os.getpid()}-{secrets.token_hex(4)}"
    os.rename(real, aside)
    return aside


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


def _replace(staging: Path, real: Path, out, force: bool) -> None:
    """Put ``staging`` in the place of ``real``: the old folder renamed aside, the new one
    renamed in, the old one deleted."""
    aside = None
    with _signals_held():
        if os.path.lexists(real):
            state, extra = _ownership(real)
            if state in ("foreign", "mixed") and not force:  # the user added files meanwhile
                raise _out_error(out, f"holds {_some(extra)}, which trophoscape did not "
                                      "write; move that elsewhere or give another folder, or "
                                      "add --force to replace the folder and everything in it")
            aside = _set_aside(real)
        try:
            os.rename(staging, real)
        except BaseException:
            if aside is not None:
                os.rename(aside, real)
            raise
    if aside is not None:
        shutil.rmtree(aside, ignore_errors=True)


def _inside_stage(path: Path) -> bool:
    absolute = Path(os.path.abspath(path))
    return any(_is_within(absolute, stage) for stage in _ACTIVE)


@contextlib.contextmanager
def staged_folder(out, *, force: bool = False, inputs=(), command: str | None = None,
                  keep=(), allow=()):
    """Yield a fresh staging folder; on success it replaces ``out`` as a whole.

    ``out`` is checked first (:func:`check_out`, with ``inputs`` and ``force``). On an
    exception (Ctrl-C and SIGTERM included) the staging folder is removed and ``out`` is
    left as it was. On success the marker is written into the staging folder, the entries
    ``keep`` of the current ``out`` are carried into it (hard links; a sweep's ledger), and
    it takes the place of ``out``. ``allow`` are names the folder may come to hold later.

    A folder written inside a staging folder that is open (a command's run folder within
    its own output) is written directly, without a staging folder of its own.
    """
    out = Path(out)
    if _inside_stage(out):
        out.mkdir(parents=True, exist_ok=True)
        yield out
        return
    real = check_out(out, inputs=inputs, force=force)
    try:
        real.parent.mkdir(parents=True, exist_ok=True)
        staging = Path(tempfile.mkdtemp(prefix=f".{real.name}.partial-{os.getpid()}-",
                                        dir=real.parent))
    except OSError as exc:  # a file in the way, no permission, a read-only disk
        raise _cannot_create(out, (exc.strerror or str(exc)).lower()) from None
    _ACTIVE.append(staging)
    try:
        _usual_mode(staging, 0o777)
        yield staging
        _ACTIVE.remove(staging)
        _carry(real, staging, keep)
        _write_marker(staging, command, [*os.listdir(staging), *allow])
        try:
            _replace(staging, real, out, force)
        except OSError as exc:  # the old folder is busy, or its parent became read-only
            reason = (exc.strerror or str(exc)).lower()
            raise _out_error(out, f"cannot replace the folder ({reason}); close what uses "
                                  "it, or give --out a new folder") from None
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    finally:
        if staging in _ACTIVE:
            _ACTIVE.remove(staging)


def working_folder(out, *, command: str, names, inputs=(), force: bool = False,
                   reuse: bool = False) -> Path:
    """An output folder a resumable command fills as it goes (a sweep and its ledger).

    After :func:`check_out`, the folder is kept as it is when ``reuse`` is set and it is
    trophoscape's; otherwise an existing folder is replaced as a whole by a new one holding
    only the marker (allowing ``names``). Returns the resolved path.
    """
    real = check_out(out, inputs=inputs, force=force)
    try:
        if reuse and real.is_dir() and _ownership(real)[0] in ("ours", "mixed"):
            allow_names(real, names)
            return real
        aside = None
        with _signals_held():  # the new folder exists before the old one is deleted
            if os.path.lexists(real):
                aside = _set_aside(real)
            made = False
            try:
                real.mkdir(parents=True)
                made = True
                _write_marker(real, command, names)
            except BaseException:
                if made:
                    shutil.rmtree(real, ignore_errors=True)
                if aside is not None:
                    os.rename(aside, real)
                raise
        if aside is not None:
            shutil.rmtree(aside, ignore_errors=True)
    except OSError as exc:
        raise _cannot_create(out, (exc.strerror or str(exc)).lower()) from None
    return real


def _json_ready(obj):
    if isinstance(obj, dict):
        return {str(k): _json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_ready(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def write_json(path, obj):
    Path(path).write_text(json.dumps(_json_ready(obj), indent=2) + "\n", encoding="utf-8")


def patches_frame(result):
    """The patch polygons with the user's attributes and every per-patch result column."""
    frame = result.study.landscape.frame
    table = result.patches
    keep = [c for c in frame.columns if c not in table.columns and c != "patch_id"]
    gdf = frame[["patch_id"]].join(frame[keep])
    for col in table.columns:
        gdf[col] = table[col].to_numpy()
    return gdf.set_geometry("geometry")


#: Time rows of a NetCDF chunk, and the census rows a run hands the writer at a time.
SERIES_BLOCK_ROWS = 64
#: Chunk sizes along (time, patch, replicate): about 1 MB, so that one time slice or one
#: patch's whole series reads few chunks.
_CHUNK_LIMITS = (SERIES_BLOCK_ROWS, 4096, 16)


class SeriesWriter:
    """``timeseries.nc`` (NetCDF4, CF attributes, abundances as float32) written as a run goes.

    The coordinates, patch areas and attributes are written first (by xarray); the two
    abundance variables are then filled block by block, as census rows arrive from
    :func:`trophoscape.simulate.simulate` (its ``sink``), in chunks of
    ``SERIES_BLOCK_ROWS`` time rows, compressed. The file is written under a temporary name
    beside ``path`` and renamed by :meth:`finish` once every row is in; :meth:`abort`
    (or an exception inside a ``with`` block) deletes it, so ``path`` is whole or absent.

    Parameters
    ----------
    path : path
        The file to write.
    study : Study
        Patch ids, areas, the scenario (attributes).
    times : ndarray, shape (n_times,)
        Census times.
    seeds : sequence of int, optional
        One per replicate: dims ``(time, patch, replicate)`` and a ``seed`` coordinate.
    """

    def __init__(self, path, *, study, times, seeds=None):
        import h5netcdf
        import xarray as xr

        from . import __version__

        self.path = Path(path)
        sc = study.scenario
        n = study.landscape.n_patches
        dims = ("time", "patch") if seeds is None else ("time", "patch", "replicate")
        self.shape = (len(times), n) + (() if seeds is None else (len(seeds),))
        coords = {
            "time": ("time", np.asarray(times, dtype=float),
                     {"units": sc["time_unit"], "long_name": "time", "standard_name": "time",
                      "axis": "T"}),
            "patch": ("patch", np.asarray(study.ids).astype(str), {"long_name": "patch id"}),
        }
        if seeds is not None:
            coords["replicate"] = ("replicate", np.arange(len(seeds)),
                                   {"long_name": "replicate"})
            coords["seed"] = ("replicate", np.asarray(seeds, dtype=np.int64),
                              {"long_name": "seed of the replicate's random numbers"})
        skeleton = xr.Dataset(
            {"area_km2": ("patch", study.landscape.area_km2,
                          {"units": "km2", "long_name": "patch area"})},
            coords=coords,
            attrs=dict(title=f"trophoscape run: {sc.name}", Conventions="CF-1.8",
                       source=f"trophoscape {__version__}", scenario=sc.text,
                       time_unit=sc["time_unit"]))
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{self.path.name}.partial-", dir=self.path.parent)
        os.close(fd)
        self._tmp = Path(tmp)
        _usual_mode(self._tmp, 0o666)
        self.rows_written = 0
        self._file = None
        try:
            skeleton.to_netcdf(self._tmp, engine="h5netcdf")
            self._file = h5netcdf.File(self._tmp, "a")
            chunks = tuple(max(1, int(min(size, limit)))
                           for size, limit in zip(self.shape, _CHUNK_LIMITS))
            self._vars = []
            for name in SPECIES:
                var = self._file.create_variable(
                    name, dims, np.float32, chunks=chunks, compression="gzip",
                    compression_opts=4, fillvalue=np.float32(np.nan))
                var.attrs.update(units="1", long_name=f"{name} abundance (individuals)")
                if seeds is not None:
                    var.attrs["coordinates"] = "seed"
                self._vars.append(var)
        except BaseException:
            self.abort()
            raise

    def __enter__(self):
        return self

    def __exit__(self, kind, value, tb):
        if kind is None:
            self.finish()
        else:
            self.abort()

    def write(self, start: int, blocks) -> None:
        """Rows ``start ..`` of each species: ``blocks`` is (prey, predator), each of shape
        (rows, n_patches) or (rows, n_patches, n_replicates)."""
        for var, block in zip(self._vars, blocks):
            block = np.asarray(block, dtype=np.float32)
            var[start:start + block.shape[0]] = block
        self.rows_written = max(self.rows_written, start + np.shape(blocks[0])[0])

    def sink_options(self, replicates: int | None = None) -> dict:
        """``sink`` and ``sink_rows`` for :func:`trophoscape.simulate.simulate`.

        The sink takes ``(start, stop, record)``, with ``record`` the run's (species, time,
        state patch) array; with ``replicates`` the state holds that many stacked copies of
        the network (``noise.stack_system``), which become the ``replicate`` dimension.
        """
        def sink(start, stop, record):
            blocks = record[:, start:stop]
            if replicates is not None:
                from .noise import unstack_series

                blocks = unstack_series(blocks, replicates)
            self.write(start, blocks)

        return {"sink": sink, "sink_rows": SERIES_BLOCK_ROWS}

    def finish(self, trajectory=None) -> Path:
        """Write the rows not written yet (from ``trajectory``), close and rename into place."""
        try:
            if self.rows_written < self.shape[0]:
                if trajectory is None:
                    raise ValueError(f"{self.shape[0] - self.rows_written} census rows of "
                                     f"{self.path.name} were never written")
                start = self.rows_written
                self.write(start, [trajectory.data[s].values[start:] for s in SPECIES])
            self._file.close()
            self._file = None
            os.replace(self._tmp, self.path)
        except BaseException:
            self.abort()
            raise
        return self.path

    def abort(self) -> None:
        """Close and delete the partial file."""
        if self._file is not None:
            with contextlib.suppress(Exception):
                self._file.close()
            self._file = None
        self._tmp.unlink(missing_ok=True)


def write_timeseries(path, result):
    """NetCDF4 time series (CF attributes), abundances as float32.

    A run started with ``run_study(..., series_to=...)`` wrote its file as it went; that
    file is copied. Otherwise the series are written from memory by the same writer.
    """
    path = Path(path)
    streamed = result.series_file
    if streamed is not None and Path(streamed).exists():
        if Path(streamed).resolve() != path.resolve():
            shutil.copyfile(streamed, path)
        return
    data = result.trajectory.data
    seeds = data["seed"].values if "replicate" in data.dims else None
    with SeriesWriter(path, study=result.study, times=data["time"].values,
                      seeds=seeds) as writer:
        writer.write(0, [data[s].values for s in SPECIES])


def write_run(result, out, *, maps: bool = True, geojson: bool = False,
              force: bool = False) -> Path:
    """Write the whole output folder of a run, atomically.

    Parameters
    ----------
    result : RunResult
    out : path
        The output folder (created if needed; an earlier output folder there is replaced as
        a whole once every new file is complete; see :func:`check_out` for what is refused).
    maps : bool
        Draw PNG maps and the HTML report.
    geojson : bool
        Also write ``patches.geojson`` (WGS 84, as RFC 7946 wants).
    force : bool
        Replace an existing folder even when trophoscape did not write it.
    """
    out = Path(out)
    with staged_folder(out, force=force, inputs=input_files(result.study.scenario),
                       command="write_run") as stage:
        write_run_files(result, stage, maps=maps, geojson=geojson)
    return out


def write_run_files(result, stage, *, maps: bool = True, geojson: bool = False) -> None:
    """The files of :func:`write_run`, written into ``stage``, a folder from
    :func:`staged_folder` (the command line opens it before the run, so that the run
    writes ``timeseries.nc`` there as it goes)."""
    stage = Path(stage)
    gdf = patches_frame(result)
    links = result.study.network.links_frame(result.study.landscape)
    summary = dict(result.summary)
    summary["crs"] = result.study.landscape.crs.to_string()
    summary["repaired_geometries"] = list(result.study.landscape.repaired)
    summary["provenance"] = provenance(result.study)
    gdf.to_file(stage / "patches.gpkg", layer="patches", driver="GPKG", engine="pyogrio")
    links.to_file(stage / "patches.gpkg", layer="links", driver="GPKG", engine="pyogrio")
    if geojson:
        gdf.to_crs("EPSG:4326").to_file(stage / "patches.geojson", driver="GeoJSON",
                                        engine="pyogrio")
    result.patches.to_csv(stage / "patches.csv", index=True)
    write_timeseries(stage / "timeseries.nc", result)
    write_json(stage / "summary.json", summary)
    if maps:
        from .report import write_figures_and_report

        write_figures_and_report(stage, result, gdf, links, summary)
