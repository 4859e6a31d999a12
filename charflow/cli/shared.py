"""What every command of ``charflow`` shares: exit codes, lazy module binding, warnings on
stderr, the progress bar, the output folder, and errors turned into exit codes.

Exit codes: 0 done; 1 the run finished but some points failed and were not filled
(``--allow-gaps``; no Liberty written), or ``diff`` found differences; 2 bad input (config,
netlist, function, a library diff cannot read); 3 simulator, store, cluster or output trouble.
"""

from __future__ import annotations

import argparse
import contextlib
import logging
import sys
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING

from charflow.records.errors import (
    CharflowError,
    ConfigError,
    DiffError,
    FunctionalMismatchError,
    NetlistError,
    OutputError,
)
from charflow.records.lazy import deferred

if TYPE_CHECKING:
    from charflow.config.library import LibraryConfig
    from charflow.execution.store import Store
    from charflow.flow.characterize import RunResult

# The modules the commands use pull in numpy, scipy, matplotlib, jinja2 and the simulator's
# bindings: seconds of start-up that --help, --version and a mistyped option should not pay.
# Each cli module binds those it uses at its top with ``deferred``; they load on first use (not
# to dodge an import cycle). Only the version and the error types are imported as usual.
flow = deferred("charflow.flow.characterize")
lock = deferred("charflow.execution.lock")
outcomes = deferred("charflow.records.outcomes")
tqdm = deferred("tqdm")

EXIT_OK, EXIT_FAILED_POINTS, EXIT_BAD_INPUT, EXIT_TROUBLE = 0, 1, 2, 3
EXIT_DIFFERENT = 1  # charflow diff: the libraries differ
EXIT_INTERRUPTED = 130  # 128 + SIGINT, as shells report a command stopped by Ctrl-C
EXIT_PIPE_CLOSED = 141  # 128 + SIGPIPE: the reader of the output went away (`| head`)
RUNS = Path("runs")  # default outputs: runs/<library name> under the current folder
BAD_INPUT = (ConfigError, NetlistError, FunctionalMismatchError, DiffError)


def guarded(command: Callable[[argparse.Namespace], int], args: argparse.Namespace) -> int:
    """``command(args)``; charflow's errors and Ctrl-C become a line on stderr and an exit code."""
    try:
        return command(args)
    except BAD_INPUT as exc:
        print(f"charflow: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except CharflowError as exc:
        print(f"charflow: {exc}", file=sys.stderr)
        return EXIT_TROUBLE
    except KeyboardInterrupt:
        print("charflow: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED


def output_options(p: argparse.ArgumentParser) -> None:
    """The options of every command that writes into an output folder."""
    p.add_argument(
        "--out",
        type=Path,
        metavar="FOLDER",
        help="output folder (default: runs/<library name> in the current folder); it also "
        "holds the result store that later runs reuse",
    )
    p.add_argument("--jobs", type=int, metavar="N", help="worker processes (default: one per core)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def check_jobs(args: argparse.Namespace) -> None:
    if args.jobs is not None and args.jobs < 1:
        raise ConfigError(f"--jobs must be at least 1, got {args.jobs}")


@contextlib.contextmanager
def output_folder(name: str, args: argparse.Namespace) -> Iterator[Path]:
    """The output folder of library ``name``, made and held (``lock.FolderLock``) for as long
    as the command runs."""
    out = args.out or RUNS / name
    # Before the run, not after it: a folder that cannot be made would waste the whole sweep.
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot make the output folder: {exc.strerror}", file=out) from exc
    with lock.FolderLock(out):
        yield out


class Progress:
    """A tqdm bar on a terminal; nothing when output is redirected or --quiet. The bar counts
    work, each point's ``cost`` (about its simulations), not points: a flip-flop's search
    weighs what its runs take, and the time left holds when the searches come last. Points
    from the store take no time and count for none."""

    def __init__(self, quiet: bool, name: str = "points") -> None:
        self.enabled = not quiet and sys.stderr.isatty()
        self.name = name
        self.bar = None
        self.seen = self.stored_count = self.failed = 0
        self.from_store: set = set()

    def start(self, total: int) -> None:
        """``total``: the work of every point to come (``sweep.work``)."""
        if self.enabled:
            # No monitor thread: the local pool forks its workers only from a driver running
            # a single Python thread (execution.pool.start_method).
            tqdm.tqdm.monitor_interval = 0
            # smoothing 0: the mean rate since the start, steadier than a recent one when
            # results come a worker's chunk at a time.
            self.bar = tqdm.tqdm(
                total=total, unit="sim", desc=self.name, dynamic_ncols=True, smoothing=0.0
            )

    def stored(self, found: tuple) -> None:
        self.stored_count = len(found)
        self.from_store = {m.point for m in found}
        if self.bar is not None:
            self.bar.total -= sum(m.point.cost for m in found)

    def result(self, outcome: object) -> None:
        self.seen += 1
        if isinstance(outcome, outcomes.Failure):
            self.failed += 1
        if self.bar is not None:
            simulated = max(0, self.seen - self.stored_count - self.failed)
            counts = {
                "stored": min(self.seen, self.stored_count),
                "simulated": simulated,
                "failed": self.failed,
            }
            self.bar.set_postfix(counts, refresh=False)
            point = outcome.point
            self.bar.update(0 if point in self.from_store else point.cost)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()

    def hooks(self) -> dict[str, Callable]:
        """The three callbacks a characterizing stage takes (``flow.characterize``,
        ``fidelity.check``): the bar's start, the store's share, each result."""
        return {"on_start": self.start, "on_stored": self.stored, "on_result": self.result}


def tables(
    cfg: LibraryConfig, args: argparse.Namespace, store: Store, use: str
) -> RunResult | None:
    """The library characterized for a command that reads its tables (``fidelity``, ``paths``):
    the ``--cell`` chosen, the store reused, a progress bar. None when a grid point failed:
    the failures are listed on stderr, there are no tables ``use`` says what for."""
    progress = Progress(args.quiet)
    try:
        result = flow.characterize(
            cfg,
            cells=args.cell,
            jobs=args.jobs,
            store=store,
            **progress.hooks(),
        )
    finally:
        progress.close()
    if result.failures:
        print(f"{len(result.failures)} grid point(s) failed; no tables {use}:", file=sys.stderr)
        for f in result.failures[:20]:
            print(f"  {f.message}", file=sys.stderr)
        return None
    return result


class _Stderr(logging.StreamHandler):
    """Writes to the ``sys.stderr`` of the moment: a caller (a test, an embedding program) may
    replace it after the first command set the handler up."""

    # typeshed declares ``stream`` a plain attribute, which a property may stand for at run time.
    @property  # type: ignore[override]
    def stream(self):
        return sys.stderr

    @stream.setter
    def stream(self, value) -> None:
        pass


def show_warnings() -> None:
    """charflow's warnings (a worker that died, points re-run alone) go to stderr as lines."""
    log = logging.getLogger("charflow")
    if not log.handlers:
        handler = _Stderr()
        handler.setFormatter(logging.Formatter("charflow: %(message)s"))
        log.addHandler(handler)
