"""ngspice backends: in-process (libngspice through PySpice) and one batch process per run.

Both take the same request: a deck, the ``alter`` commands that set one point's values, an
analysis line and the vectors wanted back, and both return those vectors as numpy arrays.
The in-process backend keeps one simulator per worker process with the last deck loaded,
so the models and the cell are parsed once per worker and cell, not once per point.
"""

from __future__ import annotations

import functools
import logging
import os
import re
import shutil
import signal
import subprocess
import tempfile
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from charflow.records.errors import (
    DeckReadError,
    SimulatorError,
    SimulatorHungError,
    SimulatorTimeoutError,
)
from charflow.simulation.cards import Card
from charflow.simulation.netlist import Deck, model_files, spice_cards

# Fallback ladder for runs that do not converge: each rung adds options to the previous one.
RETRY_LADDER: tuple[tuple[str, ...], ...] = (
    (),
    ("method=gear",),
    ("method=gear", "gmin=1e-10", "itl4=100"),
)


# ngspice's defaults of the options a run may set, put back after it.
RESETTABLE = {"method": "trap", "gmin": "1e-12", "itl4": "10", "reltol": "1e-3", "trtol": "7"}
_OPTION_LINE = re.compile(r"^[ \t]*\.options?[ \t]+(.*)$", re.IGNORECASE | re.MULTILINE)


def deck_options(text: str) -> dict[str, str]:
    """The ``name=value`` settings of a deck's ``.option`` lines, names in lower case."""
    found = {}
    for line in _OPTION_LINE.findall(text):
        for name, value in re.findall(r"(\w+)\s*=\s*(\S+)", line):
            found[name.lower()] = value
    return found


# ngspice evaluates BSIM devices with OpenMP threads (two unless told otherwise). For a cell's
# few devices that costs more than it saves, and with one worker per core the spinning
# threads of two workers starve each other (measured: 15x slower); parallelism is across points.
SINGLE_THREAD = "set num_threads=1"
QUIET = "set noinit"  # no initial-solution listing per transient: a dozen callbacks less each
RELEASE_EVERY = 200  # runs between clearing ngspice's command history (it grows per command)
# Testbenches a worker keeps loaded (ngspice switches between them with `setcirc`), so a
# worker that goes back to a cell does not read the models again: with a foundry's model
# file that read can take seconds.
MAX_CIRCUITS = 16
# s a halted run may take to stop: ngspice checks for a halt between time steps, so only a
# simulator stuck inside one step (in a model's code, say) takes longer.
HALT_GRACE = 5.0


@dataclass(frozen=True, slots=True)
class Request:
    deck: Deck
    alters: tuple[str, ...]
    analysis: str  # "op" or "tran STEP STOP 0 MAXSTEP"
    vectors: tuple[str, ...]  # node names and "<source>#branch"
    options: tuple[str, ...] = ()
    stop_when: str | None = (
        None  # ngspice condition that ends a transient early, e.g. "v(y) > 1.19"
    )
    # Every node voltage of the run comes back too (``node_names``), by ngspice's name
    # (``xdut.n5`` inside the cell): a flop's held state (``measurement.heldstate``).
    every_node: bool = False


@dataclass(frozen=True, slots=True)
class Result:
    vectors: dict[str, np.ndarray] = field(hash=False)
    seconds: float  # wall time of the analysis


def _simulator_class() -> type[Any]:
    """PySpice's simulator, told when a run in ngspice's background thread ends."""
    from PySpice.Spice.NgSpice.Shared import NgSpiceShared, ffi

    class Simulator(NgSpiceShared):
        done = threading.Event()

        @staticmethod
        def _background_thread_running(stopped, ngspice_id, user_data):
            # ngspice calls this from its background thread, with True as that thread ends.
            if stopped:
                ffi.from_handle(user_data).done.set()
            return 0

    return Simulator


class SharedBackend:
    """libngspice in this process; one instance per worker (PySpice allows one per process).

    Analyses run in ngspice's background thread while this one waits with the timeout: a run
    past it is halted and raises SimulatorTimeoutError; one that does not halt leaves the
    simulator unusable (SimulatorHungError), and only ending the process frees it.
    """

    name = "shared"

    def __init__(self, timeout: float = 60.0) -> None:
        # PySpice logs every simulator message at error level; charflow reports them itself.
        logging.getLogger("PySpice").setLevel(logging.CRITICAL)
        try:
            simulator = _simulator_class()
        except ImportError as exc:  # pragma: no cover - PySpice is a dependency
            raise SimulatorError("PySpice is not installed") from exc
        self.timeout = timeout
        try:
            self._ng = simulator.new_instance()
        except OSError as exc:
            raise SimulatorError(
                f"cannot load the ngspice shared library ({exc}); install libngspice0 "
                "(Debian: apt-get install libngspice0-dev) or use backend 'subprocess'"
            ) from exc
        # PySpice clears ngspice's command history every so many commands, which also drops a
        # pending `stop when`; charflow clears it itself between runs instead.
        self._ng.NUMBER_OF_EXEC_CALLS_TO_RELEASE_MEMORY = float("inf")
        self._ng.exec_command(SINGLE_THREAD)
        self._ng.exec_command(QUIET)
        self._circuits: list[str] = []  # keys of the decks loaded, in ngspice's order
        # Per loaded deck, the last literal ``alter`` each device got (``_held``): the same
        # command again changes nothing and is not sent.
        self._altered: dict[str, dict[str, str]] = {}
        self._runs = 0
        # Testbenches read (their models parsed) by this process, and the wall time it took.
        self.reads = 0
        self.read_seconds = 0.0
        self._loaded: str | None = None
        self._version: str | None = None
        self._broken = ""  # ngspice's messages once it has given up on reading a deck
        self._hung = ""  # the run that did not stop when halted

    def version(self) -> str:
        """The shared library's version and build date, as ngspice reports them."""
        if self._version is None:
            self._version = _version_of(self._ng.exec_command("version -s"))
        return self._version

    def _command(self, command: str, cell: str) -> None:
        """Send ``command``; raise if ngspice refuses it or reports an error. Sent as PySpice's
        ``exec_command`` sends one, without its logging and its output joined into a string:
        every run sends several, none read their output."""
        ng = self._ng
        if len(command) > ng.MAX_COMMAND_LENGTH:
            raise SimulatorError(
                f"ngspice command too long ({len(command)} characters, at most "
                f"{ng.MAX_COMMAND_LENGTH}): {command[:60]}...",
                cell=cell,
            )
        ng.clear_output()
        refused = ng._ngspice_shared.ngSpice_Command(command.encode("ascii"))
        if refused or ng._error_in_stdout or ng._error_in_stderr:
            raise SimulatorError(
                f"ngspice command '{command}' failed: {_messages(ng._stderr)}", cell=cell
            )

    def load(self, deck: Deck) -> None:
        """Make ``deck`` the circuit ngspice runs, reading it only if it is not loaded."""
        if self._hung:
            raise SimulatorHungError(
                f"the simulator of this process is stuck in an earlier run ({self._hung})",
                cell=deck.cell,
            )
        if self._broken:
            raise DeckReadError(
                "the simulator cannot run any deck after an earlier one it could not read "
                f"({self._broken}); fix that one first",
                cell=deck.cell,
            )
        if self._loaded == deck.key:
            return
        if deck.key in self._circuits:
            # ngspice numbers its circuits newest first, from 1.
            self._ng.exec_command(f"setcirc {self._circuits.index(deck.key) + 1}")
            self._loaded = deck.key
            return
        from PySpice.Spice.NgSpice.Shared import NgSpiceCircuitError

        self._loaded = None
        if len(self._circuits) >= MAX_CIRCUITS:
            # The oldest goes: made current, then removed.
            self._ng.exec_command(f"setcirc {len(self._circuits)}")
            self._ng.exec_command("remcirc")
            self._altered.pop(self._circuits.pop(), None)
        # The compatibility mode applies to decks read after it is set.
        self._ng.exec_command(
            f"set ngbehavior={deck.compat}" if deck.compat else "unset ngbehavior"
        )
        listed = len(self._circuits)
        start = time.perf_counter()
        try:
            self._ng.load_circuit(deck.text)
            failed = None
        # PySpice raises NameError when ngspice gives up reading (e.g. a model card it cannot
        # parse), NgSpiceCircuitError when it read the deck but reported errors.
        except (NgSpiceCircuitError, NameError) as exc:
            failed = exc
        self.reads += 1
        self.read_seconds += time.perf_counter() - start
        output = f"{self._ng.stdout}\n{self._ng.stderr}"
        # ngspice may refuse a deck without a word to PySpice, or list one it read with errors:
        # either would shift the numbering of the others under them.
        if self._listed() > listed:
            if failed is None:
                self._circuits.insert(0, deck.key)
                self._altered[deck.key] = {}
                self._loaded = deck.key
                return
            self._ng.exec_command("remcirc")
        if "cannot recover" in output:
            self._broken = read_cause(output)
        raise deck_read_error("ngspice cannot read the testbench", deck, output) from failed

    def _listed(self) -> int:
        """How many circuits ngspice holds (``setcirc`` without a number lists them)."""
        from PySpice.Spice.NgSpice.Shared import NgSpiceCommandError

        try:
            listing = self._ng.exec_command("setcirc")
        except NgSpiceCommandError:
            return 0  # ngspice refuses the command when it holds no circuit
        return len(re.findall(r"^(?:current\s+)?\d+\s", listing, flags=re.M | re.I))

    def _analyse(self, analysis: str, cell: str) -> str | None:
        """Run ``analysis`` in ngspice's background thread, waiting at most the timeout; return
        the messages of a run that reported errors, None for a clean one."""
        ng = self._ng
        ng.done.clear()
        ng.clear_output()
        if ng._ngspice_shared.ngSpice_Command(f"bg_{analysis}".encode()):
            raise SimulatorError(f"ngspice refused '{analysis}'", cell=cell)
        if not ng.done.wait(self.timeout):
            ng._ngspice_shared.ngSpice_Command(b"bg_halt")
            if not ng.done.wait(HALT_GRACE):
                self._hung = f"'{analysis}', still running {self.timeout + HALT_GRACE:g} s on"
                raise SimulatorHungError(
                    f"'{analysis}' ran past the {self.timeout:g} s timeout and did not stop "
                    f"within {HALT_GRACE:g} s of being halted",
                    cell=cell,
                )
            raise SimulatorTimeoutError(
                f"'{analysis}' did not finish within the {self.timeout:g} s timeout and was halted",
                cell=cell,
            )
        # PySpice's message callback flags errors (ngspice also calls some notes errors).
        if ng._error_in_stdout or ng._error_in_stderr:
            return _messages(ng._stderr)
        return None

    def run(self, request: Request) -> Result:
        cell = request.deck.cell
        self.load(request.deck)
        self._alter(request.alters, request.deck.key, cell)
        for option in request.options:
            self._command(f"option {option}", cell)
        if request.stop_when:
            self._command(f"stop when {request.stop_when}", cell)
        # A run that reads every node (``Request.every_node``) keeps ngspice's default: all.
        if request.analysis.startswith("tran") and not request.every_node:
            self._command(f"save {' '.join(saved(request))}", cell)
        before = self._ng.last_plot
        start = time.perf_counter()
        try:
            # Errors are judged by the plot made: ngspice flags notes (gmin stepping) as errors.
            failed = self._analyse(request.analysis, cell)
        except SimulatorTimeoutError:
            self._after(request)  # the halted run's options and partial plot go
            raise
        seconds = time.perf_counter() - start
        plot = self._ng.last_plot
        try:
            if plot == before or plot == "const":
                # A transient saves only what it asked for: none of it there, ngspice runs none.
                why = failed or "no output"
                if "no data saved" in why:
                    why = f"the testbench has none of {', '.join(request.vectors)}; {why}"
                raise SimulatorError(f"'{request.analysis}' did not run: {why}", cell=cell)
            names = request.vectors
            if request.every_node:
                listed = self._ng._ngspice_shared.ngSpice_AllVecs(plot.encode())
                names += node_names(self._ng._convert_string_array(listed))
            vectors = self._vectors(plot, tuple(dict.fromkeys(names)), cell)
        finally:
            self._after(request)
        # A stop condition that was met interrupts the run on purpose.
        if failed and "condition met" not in failed and request.analysis.startswith("tran"):
            stop = float(request.analysis.split()[2])
            if vectors["time"][-1] < stop * (1 - 1e-9):
                raise SimulatorError(
                    f"transient stopped at {vectors['time'][-1]:.4g} s of {stop:.4g} s: {failed}",
                    cell=cell,
                )
        return Result(vectors, seconds)

    def _alter(self, commands: tuple[str, ...], key: str, cell: str) -> None:
        """Send ``commands``, but not an ``alter`` of a device whose last one (on the deck
        ``key``) was the same literal command: a point sets every value (a series' points
        share most), and each command costs the simulator tens of microseconds."""
        held = self._altered.setdefault(key, {})
        for command in commands:
            device, literal = _held(command)
            if device is not None and literal and held.get(device) == command:
                continue
            if device is not None:
                held.pop(device, None)  # unknown if the command fails
            self._command(command, cell)
            if device is not None and literal:
                held[device] = command

    def _after(self, request: Request) -> None:
        """Undo what a run set up, so the next run starts from the deck as loaded."""
        if request.options:
            self._reset_options(request.options, request.deck)
        if request.stop_when or request.analysis.startswith("tran"):
            self._command("delete all", request.deck.cell)  # the stop condition and the saves
        self._command("destroy all", request.deck.cell)
        self._runs += 1
        if self._runs % RELEASE_EVERY == 0:
            self._release()

    def _release(self) -> None:
        from PySpice.Spice.NgSpice.Shared import FFI

        self._ng._ngspice_shared.ngSpice_Command(FFI.NULL)

    def _vectors(self, plot: str, names: tuple[str, ...], cell: str) -> dict[str, np.ndarray]:
        # Only the vectors asked for, straight from the simulator's memory (one copy each).
        from PySpice.Spice.NgSpice.Shared import FFI, ffi

        out = {}
        for name in ("time", *names) if plot.startswith("tran") else names:
            info = self._ng._ngspice_shared.ngGet_Vec_Info(f"{plot}.{name}".encode())
            # Transient and operating-point vectors are real; anything else is not ours.
            if info == FFI.NULL or info.v_realdata == FFI.NULL:
                raise SimulatorError(f"ngspice returned no vector {name} in plot {plot}", cell=cell)
            data = ffi.buffer(info.v_realdata, info.v_length * 8)
            out[name] = np.frombuffer(data, dtype=np.float64).copy()
        return out

    def _reset_options(self, options: tuple[str, ...], deck: Deck) -> None:
        """Put each option a run set back to the deck's own value, ngspice's default if the
        deck sets none (a process's ``options`` are the deck's ``.option`` lines)."""
        values = {**RESETTABLE, **deck_options(deck.text)}
        for option in options:
            key = option.split("=")[0].strip().lower()
            if key in values:
                self._command(f"option {key}={values[key]}", deck.cell)


class SubprocessBackend:
    """One ``ngspice -b`` process per run: slower, but a crash or hang costs only that run."""

    name = "subprocess"

    def __init__(self, timeout: float = 60.0, executable: str | None = None) -> None:
        exe = executable or shutil.which("ngspice")
        if exe is None:
            raise SimulatorError(
                "ngspice is not on PATH; install it (Debian: apt-get install ngspice)"
            )
        self._exe = exe
        self.timeout = timeout
        self._version: str | None = None
        # Every run is a process that reads its testbench: counted, its reading not timed apart.
        self.reads = 0
        self.read_seconds = 0.0

    def version(self) -> str:
        """The executable's version and build date, as ``ngspice -v`` reports them."""
        if self._version is None:
            try:
                proc = subprocess.run(
                    [self._exe, "-v"], capture_output=True, text=True, timeout=self.timeout
                )
            except (OSError, subprocess.TimeoutExpired) as exc:
                raise SimulatorError(f"cannot ask ngspice for its version: {exc}") from exc
            self._version = _version_of(proc.stdout + proc.stderr)
        return self._version

    def run(self, request: Request) -> Result:
        names = (
            ("time", *request.vectors) if request.analysis.startswith("tran") else request.vectors
        )
        with tempfile.TemporaryDirectory(prefix="charflow-") as tmp:
            out = Path(tmp) / "vectors.txt"
            deck_path = _write_batch_deck(Path(tmp), request, out, names)
            start = time.perf_counter()
            proc = self._execute(deck_path, tmp, request.deck.cell)
            seconds = time.perf_counter() - start
            self.reads += 1
            _check_batch_run(proc, out, request)
            table = np.loadtxt(out, skiprows=1, ndmin=2)
            if request.every_node:
                header = out.read_text(encoding="utf-8").split("\n", 1)[0]
                return Result(_every_vector(table, header, names, request.analysis), seconds)
        return Result(_batch_vectors(table, names, request.analysis), seconds)

    def _execute(self, deck_path: Path, tmp: str, cell: str) -> subprocess.CompletedProcess[str]:
        """One ``ngspice -b`` on ``deck_path`` in ``tmp``, killed past the timeout."""
        try:
            return subprocess.run(
                [self._exe, "-b", str(deck_path)],
                capture_output=True,
                text=True,
                timeout=self.timeout,
                cwd=tmp,
                env={**os.environ, "LC_ALL": "C"},
            )
        except subprocess.TimeoutExpired as exc:
            raise SimulatorTimeoutError(
                f"ngspice did not finish within the {self.timeout:g} s timeout and was killed",
                cell=cell,
            ) from exc


def _write_batch_deck(tmp: Path, request: Request, out: Path, names: tuple[str, ...]) -> Path:
    """The request's deck with a control block that runs it and writes ``names`` to ``out``,
    written to ``tmp`` (with a .spiceinit for the deck's compatibility mode)."""
    control = [
        ".control",
        "set wr_singlescale",
        "set wr_vecnames",
        SINGLE_THREAD,
        *request.alters,
        *(f"option {o}" for o in request.options),
        *([f"stop when {request.stop_when}"] if request.stop_when else []),
        request.analysis,
        f"wrdata {out} {'all' if request.every_node else ' '.join(map(_wrdata_name, names))}",
        ".endc",
    ]
    text = re.sub(r"^\.end\s*\Z", "\n".join(control) + "\n.end\n", request.deck.text, flags=re.M)
    deck_path = tmp / "deck.sp"
    deck_path.write_text(text, encoding="utf-8")
    if request.deck.compat:
        # ngspice reads .spiceinit from its working folder before the deck.
        (tmp / ".spiceinit").write_text(f"set ngbehavior={request.deck.compat}\n")
    return deck_path


def _check_batch_run(proc: subprocess.CompletedProcess[str], out: Path, request: Request) -> None:
    """Raise if ngspice crashed or wrote no results, saying why as well as its output can."""
    cell = request.deck.cell
    if proc.returncode < 0:
        raise SimulatorError(
            f"ngspice crashed ({_signal_name(-proc.returncode)}): "
            f"{_messages((proc.stdout + proc.stderr).splitlines())}",
            cell=cell,
        )
    if not out.is_file():
        output = f"{proc.stdout}\n{proc.stderr}"
        # ngspice ends with a fatal error when it cannot read the deck: options cannot
        # help, so the fallback ladder is not tried.
        if re.search(_UNREADABLE, output, re.IGNORECASE):
            what = f"ngspice cannot read the testbench (exit {proc.returncode})"
            raise deck_read_error(what, request.deck, output)
        raise SimulatorError(
            f"ngspice wrote no results (exit {proc.returncode}): {_messages(output.splitlines())}",
            cell=cell,
        )


def _batch_vectors(
    table: np.ndarray, names: tuple[str, ...], analysis: str
) -> dict[str, np.ndarray]:
    """The vectors asked for from wrdata's table; an operating point keeps its last row."""
    # wrdata writes the plot's scale column first (for tran too, where "time" is also
    # asked for): the vectors asked for are the last columns.
    offset = table.shape[1] - len(names)
    vectors = {n: table[:, offset + i].copy() for i, n in enumerate(names)}
    if not analysis.startswith("tran"):
        vectors = {n: v[-1:] for n, v in vectors.items()}
    return vectors


def _every_vector(
    table: np.ndarray, header: str, names: tuple[str, ...], analysis: str
) -> dict[str, np.ndarray]:
    """The vectors asked for and every node voltage, from ``wrdata ... all``'s table: its
    header (``wr_vecnames``) names the scale's column, then every vector's in order."""
    listed = [n.lower() for n in header.split()[1:]]
    column = {n: 1 + i for i, n in reversed(list(enumerate(listed)))}
    column["time"] = 0
    wanted = dict.fromkeys((*names, *node_names(listed)))
    vectors = {n: table[:, column[n.lower()]].copy() for n in wanted}
    if not analysis.startswith("tran"):
        vectors = {n: v[-1:] for n, v in vectors.items()}
    return vectors


def node_names(names: list[str] | tuple[str, ...]) -> tuple[str, ...]:
    """The node voltages among a plot's vector names: not the scale, a branch current
    (``v1#branch``) or a device's internal node (``m1#dbody``)."""
    return tuple(n.lower() for n in names if "#" not in n and n.lower() not in ("time", "v-sweep"))


# What a stop condition reads (``v(node)``, ``i(source)``): a run keeps it, or the condition
# finds nothing to test.
# (Either case spelled out: an IGNORECASE pattern folds the case of every character it tries.)
_CONDITION_VECTOR = re.compile(r"\b([vViI])\(([^)\s]+)\)")


def saved(request: Request) -> tuple[str, ...]:
    """What a transient keeps of its time points: the vectors asked for and the nodes its stop
    condition reads. ngspice keeps every node and branch otherwise (the cell's internal
    nodes, each source's current), stored at every time point only to be freed at the run's
    end (``destroy all``)."""
    read = _CONDITION_VECTOR.findall(request.stop_when or "")
    condition = (name.lower() + ("#branch" if kind in "iI" else "") for kind, name in read)
    return tuple(dict.fromkeys(("time", *request.vectors, *condition)))


def _wrdata_name(name: str) -> str:
    if name == "time":
        return "time"
    if name.endswith("#branch"):
        return f"i({name[: -len('#branch')]})"
    return f"v({name})"


def _signal_name(number: int) -> str:
    try:
        return signal.Signals(number).name
    except ValueError:
        return f"signal {number}"


# ``alter DEVICE = VALUE`` or ``alter @DEVICE[PARAM] = VALUE``; a literal value is a number or a
# bracketed list, anything else (a vector's name) can hold other values by the next run.
_ALTER = re.compile(r"^alter\s+@?([^\s\[=]+)(?:\[[^\]]*\])?\s*=\s*(\S)")
_LITERAL = frozenset("[0123456789+-.")


@functools.lru_cache(maxsize=1024)
def _held(command: str) -> tuple[str | None, bool]:
    """The device an ``alter`` command sets (None for any other command) and whether the
    value it gives is literal; remembered by command (a series sends most of its own again)."""
    match = _ALTER.match(command)
    if match is None:
        return None, False
    return match.group(1).lower(), match.group(2) in _LITERAL


def _version_of(text: str) -> str:
    """``ngspice-39, Creation Date: ...`` from ngspice's banner; the whole banner otherwise."""
    name = re.search(r"ngspice-\S+", text)
    date = re.search(r"creation date:.*", text, re.I)
    keep = [m.group(0).strip() for m in (name, date) if m]
    return ", ".join(keep) or " ".join(text.split())


# Words that make a simulator's line worth quoting (any case): every run's stop condition
# gives three lines, so a plain search beats a pattern that folds the case of each character.
_ALARMS = ("error", "fail", "too small", "singular", "unknown", "cannot", "not found")


def _messages(lines: list[str] | str) -> str:
    if isinstance(lines, str):
        lines = lines.splitlines()
    # Once each, in order: ngspice repeats a warning at every failed time step.
    keep = list(
        dict.fromkeys(
            ln.strip() for ln in lines if ln.strip() and not ln.startswith("Note: can't find init")
        )
    )
    interesting = [ln for ln in keep if any(word in ln.lower() for word in _ALARMS)]
    return "; ".join((interesting or keep)[-6:]) or "no message"


# ngspice's lines that say nothing about what went wrong.
_NOISE = re.compile(
    r"^(note:|circuit:|please check your input|error: ngspice\.dll cannot recover"
    r"|simulation interrupted|error: fatal error in ngspice|warning: can't find the init)",
    re.IGNORECASE,
)
# A line that introduces the card it is about, printed on the next line.
_INTRODUCES = re.compile(r"(:|from line)$", re.IGNORECASE)
# The cards ngspice quotes after such an introduction, and the line numbers it gives (of the
# card's first line in its own file, which ngspice does not name).
_QUOTED = re.compile(
    r"(?:from line|error on line:|on line \d+ :|expression err:|could not find include file)"
    r"\s*(.+)",
    re.IGNORECASE,
)
_LINE_NUMBER = re.compile(r"(?:line no\.|on line)\s+(\d+)", re.IGNORECASE)
# ngspice's words when it cannot read a deck at all.
_UNREADABLE = r"fatal error|error on line|could not find include file|unknown subckt"
QUOTE_CHARS = 60  # of a quoted card, matched against the files: ngspice cuts long ones short


def read_cause(output: str) -> str:
    """ngspice's account of a deck it cannot read, whole: each line once, a line that
    introduces a card joined with that card."""
    parts: list[str] = []
    for line in (ln.strip() for ln in output.splitlines()):
        if not line or _NOISE.match(line):
            continue
        if parts and _INTRODUCES.search(parts[-1]):
            parts[-1] += " " + line
        else:
            parts.append(line)
    return "; ".join(dict.fromkeys(parts)) or "no message"


def _cards(text: str) -> list[Card]:
    """Each card of a SPICE text in lower case, as ngspice quotes cards."""
    return [Card(c.text.lower(), c.lines) for c in spice_cards(text)]


def locate(cause: str, deck: Deck) -> tuple[Path, int | None] | None:
    """The file and line of the card ngspice quotes in ``cause``: in the cell's netlist or a
    file the deck reads; a card at a line number ngspice gives first. A card found only in the
    cell's rendered text (a template's) gives the template, with no line."""
    quoted = [
        " ".join(q.split()).lower().removesuffix("...").rstrip(" }")[:QUOTE_CHARS]
        for q in _QUOTED.findall(cause.replace("; ", "\n"))
    ]
    quoted = [q for q in quoted if q]
    numbers = {int(n) for n in _LINE_NUMBER.findall(cause)}
    files = [f for f in (deck.source, *model_files(deck.text, Path.cwd())) if f is not None]
    found = []
    for path in dict.fromkeys(files):
        try:
            text = path.read_text(encoding="utf-8", errors="replace")
        except OSError:
            continue
        for card in _cards(text):
            for at in (card.text.find(q) for q in quoted):
                if at >= 0:
                    found.append((card.line not in numbers, path, card.line_at(at)))
    if found:
        _, path, line = min(found, key=lambda f: f[0])
        return path, line
    in_cell = any(card.text.find(q) >= 0 for card in _cards(deck.cell_text) for q in quoted)
    return (deck.source, None) if in_cell and deck.source is not None else None


def _missing_models(cause: str, deck: Deck) -> str:
    """For each model ngspice cannot find, where the files the deck reads define it, if
    anywhere (binned cards ``name.1``, ``name.2`` … too): a card in a ``.lib`` section the deck
    does not read, or bins that do not cover a device's size, are common slips."""
    notes = []
    files = model_files(deck.text, Path.cwd())
    for name in dict.fromkeys(re.findall(r"can't find model '([^']+)'", cause, re.I)):
        card = re.compile(rf"^[ \t]*\.model[ \t]+{re.escape(name)}(\.\d+)?\s", re.I | re.M)
        places = []
        for path in files:
            try:
                text = path.read_text(encoding="utf-8", errors="replace")
            except OSError:
                continue
            lines = (text.count("\n", 0, m.start()) + 1 for m in card.finditer(text))
            places += [f"{path} line {n}" for n in lines]
        notes.append(
            f"model {name} is defined at {', '.join(places)}: in a part the testbench does "
            "not read, or in bins none of which covers the device's W and L"
            if places
            else f"no file the testbench reads defines a model {name}"
        )
    return "".join(f"; {n}" for n in notes)


def deck_read_error(what: str, deck: Deck, output: str) -> DeckReadError:
    """``what`` with ngspice's whole cause, naming the file and line it is about when its
    messages let them be found, or else the files the deck reads."""
    cause = read_cause(output)
    where = locate(cause, deck)
    cause += _missing_models(cause, deck)
    if where is not None:
        return DeckReadError(f"{what}: {cause}", file=where[0], line=where[1], cell=deck.cell)
    files = ", ".join(map(str, model_files(deck.text, Path.cwd())))
    read = f" (not located; the testbench reads {files})" if files else ""
    return DeckReadError(f"{what}: {cause}{read}", cell=deck.cell)


def loaded_library() -> str | None:
    """The file of the ngspice shared library loaded in this process (Linux's account of the
    process's mappings); None when none is, or the system keeps no such account."""
    try:
        with open("/proc/self/maps", encoding="utf-8") as maps:
            for line in maps:
                path = line.split(maxsplit=5)[-1].strip()
                if os.path.basename(path).startswith("libngspice"):
                    return path
    except OSError:
        pass
    return None


def make_backend(name: str, timeout: float) -> SharedBackend | SubprocessBackend:
    """A new backend; the shared one exists once per process (``session.SESSION`` keeps it:
    PySpice hands every caller the same simulator, whose loaded circuits it tracks)."""
    if name == "shared":
        return SharedBackend(timeout)
    if name == "subprocess":
        return SubprocessBackend(timeout=timeout)
    raise SimulatorError(f"unknown backend {name!r}; use 'shared' or 'subprocess'")
