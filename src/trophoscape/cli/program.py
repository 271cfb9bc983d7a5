"""The command line: a thin shell over ``load_study -> run_study -> write_run``.

Exit codes: 0 success; 2 bad input (one-line message naming file, feature and field);
1 a failure of the run itself; 130 after Ctrl-C and 143 after SIGTERM (both remove what was
half-written; a signal that comes while the output folder is being put in place waits for
that, and the message then says the output was written).
"""

from __future__ import annotations

import argparse
import contextlib
import os
import signal
import sys
import threading
import warnings
from pathlib import Path

from importlib import import_module

from ..errors import (InputError, RunError, Terminated, TrophoscapeError, clear_stop,
                      note_stop, raise_if_stopped, render_params)

__all__ = ["main", "entry"]

#: Parameters of the public calls behind the commands -> the options that set them. Library
#: errors name parameters (:func:`trophoscape.errors.param`); the command line shows these.
FLAGS = {
    "out": "--out", "force": "--force", "resume": "--resume", "quiet": "--quiet",
    "maps": "--no-maps", "plots": "--no-plots", "geojson": "--geojson",
    "variants_or_vary_specs": "--vary", "table": "--table", "replicates": "--replicates",
    "workers": "--workers", "scheduler": "--scheduler", "dask_local": "--dask-local",
    "candidates": "--candidates", "max_candidates": "--max-candidates", "layer": "--layer", "budget": "--budget",
    "weights": "--weights", "screen": "--screen", "exhaustive_limit": "--exhaustive-limit",
    "links": "--remove-links", "columns": "--columns",
    "runs": "--no-runs", "origins": "--origins", "patches": "--patches", "name": "--name",
    "counts": "--counts",
    "scenarios": "scenarios",  # compare's positional argument
}

#: Modules that add a command: each has ``add_parser(subparsers)``, which registers its
#: parser with ``set_defaults(handler=fn)``; ``fn(args)`` returns the exit code.
COMMAND_MODULES: tuple[str, ...] = ("init", "spread", "corridors", "sweep", "fit")

EPILOG_RUN = "example:\n  trophoscape run valley.toml --out results/valley-a"
EPILOG_CHECK = "example:\n  trophoscape check valley.toml"
EPILOG_DEMO = "example:\n  trophoscape demo --out demo-out"




def _parser() -> argparse.ArgumentParser:
    from .. import __version__

    p = argparse.ArgumentParser(
        prog="trophoscape",
        description="Predator-prey dynamics on a network of habitat patches read from a GIS "
                    "file: persistence and synchrony, patch by patch.",
    )
    p.add_argument("--version", action="version", version=f"trophoscape {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    fmt = argparse.RawDescriptionHelpFormatter
    run = sub.add_parser("run", help="run a scenario and write its output folder",
                         description="Run a scenario and write maps, tables and time series.",
                         epilog=EPILOG_RUN, formatter_class=fmt)
    run.add_argument("scenario", type=Path, help="scenario file (TOML)")
    _output_options(run)

    check = sub.add_parser("check", help="validate a scenario and its inputs; run nothing",
                           description="Validate the scenario, the patch file and the links, "
                                       "print the network summary, and run nothing.",
                           epilog=EPILOG_CHECK, formatter_class=fmt)
    check.add_argument("scenario", type=Path, help="scenario file (TOML)")

    demo = sub.add_parser("demo", help="run the bundled demo landscape",
                          description="Run the bundled demo: an invented landscape of habitat "
                                      "patches with a few corridors.",
                          epilog=EPILOG_DEMO, formatter_class=fmt)
    _output_options(demo)
    for module in COMMAND_MODULES:
        import_module(f"trophoscape.cli.{module}").add_parser(sub)
    return p


def out_options(p, help="output folder") -> None:
    """``--out`` and ``--force``, the same for every command that writes a folder.

    ``--out`` stays text here (an empty name must not become ".");
    :func:`main` turns it into a path through :func:`trophoscape.io.folder.out_argument`.
    """
    p.add_argument("--out", required=True, metavar="OUT", help=help)
    p.add_argument("--force", action="store_true",
                   help="write to OUT even when it holds files trophoscape did not write: "
                        "that folder is kept, renamed to OUT.replaced-YYYYmmdd-HHMMSS (never "
                        "an input's folder, the current folder, home, or the root)")


def _output_options(p):
    out_options(p)
    p.add_argument("--geojson", action="store_true", help="also write patches.geojson")
    p.add_argument("--no-maps", action="store_true", help="skip the PNG maps and the report")
    p.add_argument("--quiet", action="store_true", help="no progress bar or summary")


def _show_warning(message, category, filename, lineno, file=None, line=None):
    print(f"warning: {render_params(message, FLAGS)}", file=sys.stderr)


def _print_check(study) -> None:
    net = study.network.summary()
    land = study.landscape
    area = land.area_km2
    print(f"scenario   {study.scenario.name}")
    print(f"patches    {net['patches']} from {land.path} (CRS {land.crs.to_string()})")
    print(f"area       {area.sum():.2f} km² in all; {area.min():.3g} to {area.max():.3g} km² "
          "per patch")
    print(f"links      {net['links']} ({net['components']} connected group(s), "
          f"{len(net['isolated'])} isolated patch(es))")
    if land.repaired:
        print(f"repaired   {len(land.repaired)} geometry(ies): {', '.join(land.repaired[:10])}")
    from ..analysis.advice import practical_warnings

    for advice in practical_warnings(study):
        print(f"note       {advice}")


def _print_summary(result, out) -> None:
    s = result.summary
    print(f"wrote {out}")
    print(f"  prey persists in {s['prey_regional_persistence']:.0%} of patches, "
          f"predator in {s['predator_regional_persistence']:.0%}")


@contextlib.contextmanager
def _sigterm_as_interrupt(state: dict, *, last: bool = False):
    """While the command runs, SIGTERM raises :class:`Terminated` (a KeyboardInterrupt), so
    the same clean-up runs as after Ctrl-C; the previous handlers are restored afterwards.

    Both signals are also recorded (:func:`~trophoscape.errors.note_stop`): Python drops a
    KeyboardInterrupt raised inside a weakref callback or a ``__del__`` (it prints "Exception
    ignored" and goes on), so the command checks the record before it puts an output in
    place and when it ends, and such reports are kept off stderr. Once ``state["done"]`` is
    set the command is over and a signal is only recorded. With ``last`` (the process ends
    after this command) both signals stay ignored afterwards, through the interpreter's
    shutdown, instead of the previous handlers coming back.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    owner = os.getpid()
    clear_stop()

    def handler(signum, frame):
        if os.getpid() != owner:  # a forked worker process: end as SIGTERM would
            signal.signal(signum, signal.SIG_DFL)
            os.kill(os.getpid(), signum)
            return
        # one clean-up: a further SIGTERM during it is ignored (not queued), until
        # _sigterm_as_interrupt puts the previous handler back when the command returns
        signal.signal(signum, signal.SIG_IGN)
        note_stop(Terminated)
        if not state.get("done"):
            raise Terminated()

    def on_interrupt(signum, frame):
        if os.getpid() != owner:
            raise KeyboardInterrupt
        note_stop(KeyboardInterrupt)
        if not state.get("done"):
            raise KeyboardInterrupt

    def unraisable(info):
        if issubclass(info.exc_type, KeyboardInterrupt):
            note_stop(info.exc_type)  # recorded; raised again at the next check
            return
        previous_hook(info)

    previous = signal.signal(signal.SIGTERM, handler)
    # only where Ctrl-C has its usual meaning (not in a shell's background job that ignores it)
    previous_int = signal.getsignal(signal.SIGINT)
    if previous_int is signal.default_int_handler:
        signal.signal(signal.SIGINT, on_interrupt)
    previous_hook = sys.unraisablehook
    sys.unraisablehook = unraisable
    try:
        yield
    finally:
        if last:
            signal.signal(signal.SIGTERM, signal.SIG_IGN)
            signal.signal(signal.SIGINT, signal.SIG_IGN)
        else:
            signal.signal(signal.SIGTERM, previous)
            if previous_int is signal.default_int_handler:
                signal.signal(signal.SIGINT, previous_int)
        sys.unraisablehook = previous_hook


def main(argv=None, *, last: bool = False) -> int:
    """Run the ``trophoscape`` command with ``argv`` (default: the process's arguments) and
    return its exit code. ``last``: the process ends right after (see :func:`entry`)."""
    state = {"done": False}
    mark = _written_count()
    with _sigterm_as_interrupt(state, last=last):
        try:
            args = _parser().parse_args(argv)
            with warnings.catch_warnings():  # the printer is the command's, not the process's
                warnings.showwarning = _show_warning
                code = _main(args)
            state["done"] = True
            return code
        except KeyboardInterrupt as exc:  # Ctrl-C, or SIGTERM (errors.Terminated)
            state["done"] = True
            return _stopped(exc, _written_since(mark))


def entry() -> None:
    """The ``trophoscape`` program: :func:`main`, then exit with its code. Signals after the
    command ended are ignored while the interpreter shuts down (a Ctrl-C there would
    otherwise end the process by SIGINT after a finished, successful command).

    After Ctrl-C or SIGTERM the process ends at once with the command's code (130 or 143),
    everything it wrote already closed and removed: a KeyboardInterrupt that struck inside a
    library's own start-up code (run by the interpreter's string-execution API during an
    import) leaves a flag in the interpreter that would make it end by SIGINT at shutdown,
    after the one-line message, whatever the code.
    """
    code = main(last=True)
    if code in (130, Terminated.exit_code):
        for stream in (sys.stdout, sys.stderr):
            try:
                stream.flush()
            except (OSError, ValueError):
                pass
        os._exit(code)
    sys.exit(code)


def _written_count() -> int:
    """Output folders put in place so far (none when outputs was never imported)."""
    outputs = sys.modules.get("trophoscape.io.folder")
    return 0 if outputs is None else outputs.written_count()


def _written_since(mark: int) -> list[str]:
    """Output folders put in place since :func:`_written_count` gave ``mark``."""
    outputs = sys.modules.get("trophoscape.io.folder")
    return [] if outputs is None else outputs.written_since(mark)


def _main(args) -> int:
    """Run the parsed command; input and machine errors become one line and an exit code
    (a Ctrl-C or SIGTERM goes up to :func:`main`, which reports it)."""
    try:
        if getattr(args, "out", None) is not None:
            from ..io.folder import out_argument

            args.out = out_argument(args.out)
        try:
            code = _dispatch(args)
        except BaseException:
            # an error raised because of a Ctrl-C is the stop (Python wraps a
            # KeyboardInterrupt raised during a class's creation in a RuntimeError, for one)
            raise_if_stopped()
            raise
        raise_if_stopped()  # a Ctrl-C that Python swallowed still ends the command as one
        return code
    except InputError as exc:
        print(f"error: {exc.render(FLAGS)}", file=sys.stderr)
        return 2
    except RunError as exc:
        print(f"error: the run failed: {render_params(exc, FLAGS)}", file=sys.stderr)
        return 1
    except TrophoscapeError as exc:  # pragma: no cover - every error has a subclass
        print(f"error: {render_params(exc, FLAGS)}", file=sys.stderr)
        return 1
    except BrokenPipeError:  # output piped into `head` and the like
        sys.stderr.close()
        return 0
    except OSError as exc:  # the machine, not the input: a full disk, a lost mount
        where = f" {exc.filename}" if exc.filename else ""
        print(f"error: could not read or write{where}: {exc.strerror or exc}; free space or fix "
              "the folder, then run again", file=sys.stderr)
        return 1
    except MemoryError:
        print("error: this machine ran out of memory; run fewer patches, replicates or "
              "census rows (a longer run.census_interval)", file=sys.stderr)
        return 1


def _stopped(exc: KeyboardInterrupt, written: list) -> int:
    """The one line and the exit code after Ctrl-C (130) or SIGTERM (143)."""
    word, code = (("terminated", Terminated.exit_code) if isinstance(exc, Terminated)
                  else ("interrupted", 130))
    if written:  # the signal came after the output folder was put in place
        print(f"{word}; the output was written to {written[-1]}", file=sys.stderr)
    else:
        print(f"{word}; no output was written", file=sys.stderr)
    return code


def _dispatch(args) -> int:
    if getattr(args, "handler", None) is not None:
        return int(args.handler(args) or 0)
    from ..report.run import run_to_folder
    from ..scenario import demo_scenario_path
    from ..workflows.study import load_study

    if args.command == "check":
        _print_check(load_study(args.scenario))
        return 0
    scenario = demo_scenario_path() if args.command == "demo" else args.scenario
    study = load_study(scenario)
    result = run_to_folder(study, args.out, maps=not args.no_maps, geojson=args.geojson,
                           force=args.force, progress=not args.quiet, command=args.command,
                           on_accepted=None if args.quiet else _print_check)
    if not args.quiet:
        _print_summary(result, args.out)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
