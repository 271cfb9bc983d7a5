"""Shared pieces of the benchmarks: the model settings and the assembly of a coupled system.

``assemble`` builds the coupled system the way :func:`trophoscape.workflows.study.build_study` does
(per-patch parameter arrays, a :class:`~trophoscape.model.dynamics.LocalModel` with logistic prey and
Holling type II predation, one movement operator per species), without a scenario file.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import functools  # noqa: E402
import platform  # noqa: E402
import resource  # noqa: E402
import shutil  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from trophoscape.model.dynamics import LocalModel
from trophoscape.model.network import build_network, movement_operator
from trophoscape.model.system import CoupledSystem, pack

#: Local model (per km², per year): prey growth r, capacity K = 300 × quality, Holling II.
LOCAL = dict(growth_rate=1.0, capacity_density=300.0, attack_rate=0.05, handling_time=0.1,
             conversion=0.3, mortality=0.4)
#: Dispersal per species: emigration rate (per year) and exponential-kernel scale (km).
DISPERSAL = {"prey": dict(emigration_rate=0.1, scale_km=1.0),
             "predator": dict(emigration_rate=0.05, scale_km=2.0)}
SURVIVAL_PER_KM = 0.97
#: max_distance_km giving about 8-9 links per patch on the synthetic landscapes.
MAX_DISTANCE_KM = {"boundary": 2.0, "centroid": 3.0}


def model_params(landscape) -> dict:
    """Per-patch parameter arrays, shape (n_patches,), as build_study makes them."""
    n = landscape.n_patches
    quality = landscape.frame["quality"].to_numpy(dtype=float)
    return {
        "growth_rate": np.full(n, LOCAL["growth_rate"]),
        "capacity": LOCAL["capacity_density"] * quality,
        "allee_density": np.full(n, 5.0),
        "attack_rate": np.full(n, LOCAL["attack_rate"]),
        "handling_time": np.full(n, LOCAL["handling_time"]),
        "interference": np.zeros(n),
        "conversion": np.full(n, LOCAL["conversion"]),
        "mortality": np.full(n, LOCAL["mortality"]),
    }


def assemble(landscape, *, distance="boundary", max_distance_km=None, network=None):
    """Network, local model, coupled system and a start state for a landscape.

    Returns
    -------
    network : trophoscape.model.network.Network
    model : trophoscape.model.dynamics.LocalModel
    system : trophoscape.model.system.CoupledSystem
    y0 : ndarray, shape (2 n_patches,)
        Prey 150 and predator 10 per km², each times a random factor 0.8-1.2 (seed 1), so
        that patches start out of step.
    """
    if network is None:
        network = build_network(
            landscape, kernel="exponential", distance=distance,
            max_distance_km=MAX_DISTANCE_KM[distance] if max_distance_km is None
            else max_distance_km)
    model = LocalModel(growth="logistic", response="holling2", params=model_params(landscape))
    ops = {s: movement_operator(network, emigration_rate=d["emigration_rate"],
                                scale_km=d["scale_km"], survival_per_km=SURVIVAL_PER_KM)
           for s, d in DISPERSAL.items()}
    system = CoupledSystem(model=model, area_km2=landscape.area_km2,
                           prey_movement=ops["prey"], predator_movement=ops["predator"])
    rng = np.random.default_rng(1)
    area = landscape.area_km2
    n = landscape.n_patches
    y0 = pack(150.0 * area * rng.uniform(0.8, 1.2, n), 10.0 * area * rng.uniform(0.8, 1.2, n))
    return network, model, system, y0


def versions() -> str:
    import scipy
    import shapely

    return (f"python {platform.python_version()}, numpy {np.__version__}, scipy "
            f"{scipy.__version__}, shapely {shapely.__version__}; "
            f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS')}; "
            f"{os.cpu_count()} CPUs")


def per_call(fn, *args, budget_s=1.0, repeats=7):
    """Median CPU seconds per call of ``fn(*args)`` over ``repeats`` batches (``budget_s`` in all).

    CPU time of this process (``time.process_time``), not wall time: the benchmark machine is
    shared, and time spent waiting for a core is not the code's cost.
    """
    fn(*args)
    t0 = time.process_time()
    fn(*args)
    one = max(time.process_time() - t0, 1e-7)
    number = max(1, int(budget_s / repeats / one))
    samples = []
    for _ in range(repeats):
        t0 = time.process_time()
        for _ in range(number):
            fn(*args)
        samples.append((time.process_time() - t0) / number)
    return float(np.median(samples))


def table(rows, headers):
    """Print rows (lists of str) as an aligned text table."""
    widths = [max(len(h), *(len(r[k]) for r in rows)) for k, h in enumerate(headers)]
    line = "  ".join(h.rjust(w) for h, w in zip(headers, widths))
    print(line)
    print("-" * len(line))
    for r in rows:
        print("  ".join(c.rjust(w) for c, w in zip(r, widths)))


def now() -> np.ndarray:
    """(wall, CPU) seconds; the machine is shared, so CPU time is given beside wall time."""
    return np.array([time.perf_counter(), time.process_time()])


def clock(stages: dict, name: str, fn, beside: Path | None = None):
    """``fn`` wrapped so that the (wall, CPU) seconds it takes add up in ``stages[name]``.

    Called in a process forked from this one (the stability analysis beside the others),
    the seconds are written to the file ``beside / name`` instead (read back by
    :func:`read_beside`), since ``stages`` is this process's."""
    pid = os.getpid()

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        t0 = now()
        try:
            return fn(*args, **kwargs)
        finally:
            took = now() - t0
            if os.getpid() == pid:
                stages[name] = stages.get(name, 0.0) + took
            elif beside is not None:
                (beside / name).write_text(" ".join(map(str, took)))
    return wrapper


def read_beside(stages: dict, beside: Path) -> None:
    """Add the seconds that :func:`clock` wrote from other processes to ``stages``."""
    for path in beside.iterdir():
        stages[path.name] = stages.get(path.name, 0.0) + np.array(
            [float(v) for v in path.read_text().split()])


def peak_mb() -> float:
    """Peak resident memory of this process so far, MB (ru_maxrss is in KiB on Linux)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


class TreeMemory:
    """Peak memory of this process and its children together while in the ``with`` block,
    MB: their proportional set sizes (PSS: a page shared by several processes, as a forked
    child shares its parent's, is split between them) summed, sampled every 0.05 s by a
    thread (psutil). ``peak_mb`` is the largest sum seen."""

    def __init__(self, every: float = 0.05):
        self.every = every
        self.peak_mb = 0.0

    def _sample(self) -> None:
        import psutil

        me = psutil.Process()
        while not self._done.wait(self.every):
            total = 0
            for proc in [me, *me.children(recursive=True)]:
                try:
                    total += proc.memory_full_info().pss
                except (psutil.Error, AttributeError):
                    pass
            self.peak_mb = max(self.peak_mb, total / 2**20)

    def __enter__(self):
        import threading

        self._done = threading.Event()
        self._thread = threading.Thread(target=self._sample, daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._done.set()
        self._thread.join()


#: The study functions whose time each end-to-end benchmark reports as a stage.
STUDY_STAGES = ("read_patches", "build_network", "simulate", "persistence_table",
                "synchrony_analysis", "stability_analysis", "capacity_analysis")


def write_study_inputs(folder: Path, n: int, scenario_text: str) -> None:
    """A GeoPackage of ``n`` synthetic patches (by a separate process, so that neither its
    time nor its memory counts) and ``scenario.toml`` beside it."""
    import subprocess

    env = {**os.environ, "PYTHONPATH": os.environ.get("PYTHONPATH", "src")}
    subprocess.run([sys.executable, str(Path(__file__).resolve().parent / "synthetic.py"),
                    str(n), str(folder / "patches.gpkg")], check=True,
                   stdout=subprocess.DEVNULL, env=env)
    (folder / "scenario.toml").write_text(scenario_text, encoding="utf-8")


def timed_study(folder: Path, *, profile: str | None = None, kernel: str = "auto",
                maps: bool = False) -> dict:
    """Run ``folder/scenario.toml`` as the command line does, timing every stage.

    ``load_study``; then, inside the staged output folder ``folder/out``, ``run_study`` with
    ``series_to`` (``timeseries.nc`` written as the run goes) and ``write_run_files(maps=maps)``
    (with ``maps``, the maps and ``report.html`` too);
    the functions of :data:`STUDY_STAGES`, ``analyse`` and the series writer's block writes are wrapped
    by :func:`clock` for the time of the call. ``profile``: a cProfile output file for the
    whole of it. ``kernel="numpy"`` keeps the local terms on numpy at every size.

    Returns
    -------
    dict
        ``stages`` (name -> (wall, CPU) seconds, every :data:`STUDY_STAGES` name,
        ``analyse`` (all the analyses, wall) and ``series_blocks``; CPU seconds are the
        process's, all threads), ``load``, ``run``, ``write``, ``total`` (the same pairs),
        ``study``, ``result``, ``base_mb`` (peak RSS before the run), ``peak_mb``,
        ``write_tree_mb`` (:class:`TreeMemory` over ``write_run_files``: this process
        and the one that draws the maps, if any) and ``analyses_tree_mb`` (the same over
        the analyses: this process and the one of the stability analysis, if any). The
        seconds of a stage run in a forked process (the stability analysis from 20,000
        patches on Linux) are that process's own, written back by :func:`clock`; its CPU
        seconds are not in those of ``analyse``.
    """
    import trophoscape.workflows.study as study_module
    import trophoscape.model.system as system_module
    from trophoscape.io.series import SeriesWriter
    from trophoscape.io.folder import staged_folder
    from trophoscape.report.run import write_run_files

    import tempfile

    stages: dict[str, np.ndarray] = {}
    beside = Path(tempfile.mkdtemp(prefix="trophoscape-bench-beside-"))
    originals = {name: getattr(study_module, name) for name in (*STUDY_STAGES, "analyse")}
    for name, fn in originals.items():
        setattr(study_module, name, clock(stages, name, fn, beside))
    # sampled every 0.5 s: each sample walks the page tables of this large process, and
    # every 0.05 s that slowed the analyses by about a second (their allocations wait on it)
    analyses_tree = TreeMemory(every=0.5)

    def analyse_measured(*args, **kwargs):  # the stability analysis's process counted
        with analyses_tree:
            return clocked_analyse(*args, **kwargs)

    clocked_analyse = study_module.analyse
    study_module.analyse = analyse_measured
    write_block = SeriesWriter.write
    SeriesWriter.write = clock(stages, "series_blocks", write_block)
    threshold = system_module.COMPILED_MIN_PATCHES
    if kernel == "numpy":
        system_module.COMPILED_MIN_PATCHES = 1 << 62
    base = peak_mb()
    prof = None
    if profile:
        import cProfile

        prof = cProfile.Profile()
        prof.enable()
    try:
        t0 = now()
        study = study_module.load_study(folder / "scenario.toml")
        t1 = now()
        with staged_folder(folder / "out") as stage:
            result = study_module.run_study(study, series_to=stage / "timeseries.nc")
            t2 = now()
            with TreeMemory() as tree:
                write_run_files(result, stage, maps=maps)
        t3 = now()
    finally:
        if prof is not None:
            prof.disable()
            prof.dump_stats(profile)
        for name, fn in originals.items():
            setattr(study_module, name, fn)
        SeriesWriter.write = write_block
        system_module.COMPILED_MIN_PATCHES = threshold
        read_beside(stages, beside)
        shutil.rmtree(beside, ignore_errors=True)
    zero = np.zeros(2)
    return {"stages": {k: stages.get(k, zero)
                       for k in (*STUDY_STAGES, "analyse", "series_blocks")},
            "load": t1 - t0, "run": t2 - t1, "write": t3 - t2, "total": t3 - t0,
            "study": study, "result": result, "base_mb": base, "peak_mb": peak_mb(),
            "write_tree_mb": tree.peak_mb, "analyses_tree_mb": analyses_tree.peak_mb}
