"""Where a library comes from: one record per run, written into the Liberty header and the JSON.

The record names charflow's version, the simulator and its version, the config file and every
model file (with its section) by name and sha256 digest, and the settings that decide the
numbers. It holds nothing that changes between two runs of the same inputs (no date, host or
folder), so the same results give the same bytes. Files are named, not located: where a file
lies changes nothing it holds, its digest says what it holds, and a path would make the same
library differ between two checkouts.

The simulator's version is read without loading libngspice in this process: the subprocess
backend's runs start the ``ngspice`` executable, so ``ngspice -v`` here asks that program;
the shared backend's runs load libngspice in worker processes, so one of those (the sweep's own
pool, which stays up for the runs) loads it and answers. Its answer is kept in the user's cache
folder (``banner_cache``) with the identity of the library file the worker loaded, so a run
served wholly from the store starts no worker at all while that file is unchanged.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import json
import os
import re
import shutil
from dataclasses import dataclass, fields
from pathlib import Path
from typing import TYPE_CHECKING

from charflow import __version__
from charflow.config.library import LibraryConfig, Simulation, Thresholds
from charflow.execution.workers import default_jobs, in_worker
from charflow.records.lazy import deferred
from charflow.records.units import energy_unit, power_unit, time_scale
from charflow.simulation.backends import loaded_library, make_backend
from charflow.simulation.netlist import model_files
from charflow.simulation.session import SESSION

# A Dask cluster's side (and the measurers it imports) loads only for a run on one.
if TYPE_CHECKING:
    from charflow.execution import cluster
else:
    cluster = deferred("charflow.execution.cluster")

# ngspice's banner: "ngspice-39, Creation Date: Sun Feb  5 13:44:35 UTC 2023" (``_version_of``).
_RELEASE = re.compile(r"(?P<program>[A-Za-z]+)-(?P<version>[^\s,]+)")
_BUILT = re.compile(r"creation date:\s*(?P<date>.+)", re.IGNORECASE)
NUMBER = "{:.10g}"  # settings in the Liberty header: enough digits to give the value back


@dataclass(frozen=True, slots=True)
class Simulator:
    """The simulator the runs use, as it reports itself."""

    backend: str  # "shared" (libngspice in worker processes) or "subprocess" (ngspice -b)
    banner: str  # its version and build date as it prints them (``simulate._version_of``)

    @property
    def key(self) -> str:
        """What the result store's keys hold: a new simulator or backend makes rows stale."""
        return f"{self.backend} {self.banner}"

    @property
    def program(self) -> str:
        found = _RELEASE.search(self.banner)
        return found["program"] if found else "ngspice"

    @property
    def version(self) -> str:
        """The release ("39"); the whole banner when it names none."""
        found = _RELEASE.search(self.banner)
        return found["version"] if found else self.banner

    @property
    def build_date(self) -> str | None:
        found = _BUILT.search(self.banner)
        return " ".join(found["date"].split()) if found else None


@dataclass(frozen=True, slots=True)
class FileDigest:
    file: str  # the file's name
    sha256: str | None  # None: the file could not be read (the simulator then says why)


@dataclass(frozen=True, slots=True)
class ModelDigest:
    file: str  # the file's name
    section: str | None  # the section read (``.lib FILE SECTION``); None: read whole
    sha256: str | None
    # The config's model file that names this one (``.include``/``.lib``, any section); None:
    # the config names it.
    included_by: str | None = None


@dataclass(frozen=True, slots=True)
class Provenance:
    """What made a library: programs, input files and the settings behind its numbers."""

    charflow: str
    simulator: Simulator
    config: FileDigest
    models: tuple[ModelDigest, ...]
    corner: str  # ``LibraryConfig.corner_name``: the [[corner]], else the model sections read
    vdd: float  # V
    temperature: float  # degrees C
    time_unit: str
    cap_unit: str
    thresholds: Thresholds
    simulation: Simulation
    options: tuple[tuple[str, str], ...]  # the testbench's .option lines
    compat: str | None  # ngspice's ngbehavior
    scale: float | None  # .option scale


# Banners met in this process, by backend and program (the ngspice executable, or the Dask
# scheduler whose workers run the simulator).
_ASKED: dict[tuple[str, str | None], str] = {}


def simulator(
    config: LibraryConfig, jobs: int | None = None, scheduler: str | None = None
) -> Simulator:
    """The simulator the runs of ``config`` use, with its version (see the module's note); a
    worker pool of ``jobs`` processes (the sweep's) answers for the shared backend unless the
    cache knows the library file, and every worker of the Dask cluster at ``scheduler`` for a
    run there. Asked once per process and program."""
    sim = config.simulation
    # The executable is looked up as the subprocess backend does: PATH may change.
    where = shutil.which("ngspice") if sim.backend == "subprocess" else None
    program = (sim.backend, scheduler or where)
    if program not in _ASKED:
        if scheduler is not None:
            _ASKED[program] = cluster.simulator_banner(scheduler, config)
        elif sim.backend == "subprocess":
            _ASKED[program] = make_backend(sim.backend, sim.timeout).version()
        else:
            _ASKED[program] = _cached_banner() or _ask_a_worker(config, jobs or default_jobs())
    return Simulator(sim.backend, _ASKED[program])


def _ask_a_worker(config: LibraryConfig, jobs: int) -> str:
    banner, library = in_worker(_banner_here, config, jobs=jobs)
    if library is not None:
        _keep_banner(library, banner)
    return banner


def _banner_here(config: LibraryConfig) -> tuple[str, str | None]:
    """In a worker: this process's simulator (kept for its runs), its version and the file of
    the shared library it loaded."""
    return SESSION.backend(config.simulation).version(), loaded_library()


# What decides which libngspice a worker loads besides the file itself: PySpice's variable
# and the dynamic linker's search path and cache (ldconfig rewrites it on every install).
LINKER_CACHE = Path("/etc/ld.so.cache")
SEARCH_VARIABLES = ("NGSPICE_LIBRARY_PATH", "LD_LIBRARY_PATH")


def banner_cache() -> Path:
    """The file that keeps the shared library's banner between runs (``XDG_CACHE_HOME``)."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "charflow" / "simulators.json"


def _identity(library: str) -> list[object] | None:
    """What must stay the same for a library file's banner to hold; None if it is gone."""
    files = []
    for path in (library, LINKER_CACHE):
        try:
            st = os.stat(path)
        except OSError:
            st = None
        if st is None and path == library:
            return None
        files.append([str(path), *((st.st_size, st.st_mtime_ns, st.st_ino) if st else ())])
    return [files, [os.environ.get(v) for v in SEARCH_VARIABLES]]


def _cached_banner() -> str | None:
    """The banner of the library file a worker loaded before, while nothing that decides
    which file a worker loads, or what it holds, has changed; None otherwise."""
    try:
        entry = json.loads(banner_cache().read_text(encoding="utf-8"))
        if _identity(entry["library"]) == entry["identity"]:
            return str(entry["banner"])
    except (OSError, ValueError, KeyError, TypeError):
        pass  # no cache, or not one this version wrote: a worker answers
    return None


def _keep_banner(library: str, banner: str) -> None:
    entry = {"library": library, "identity": _identity(library), "banner": banner}
    path = banner_cache()
    # A cache that cannot be written costs the next run a worker's start, nothing more.
    with contextlib.suppress(OSError):
        path.parent.mkdir(parents=True, exist_ok=True)
        # Renamed into place: a run reading it at the same time sees the old or the new one.
        part = path.with_name(f"{path.name}.{os.getpid()}")
        part.write_text(json.dumps(entry), encoding="utf-8")
        os.replace(part, path)


DIGESTS = 256  # file digests kept per process


def file_digest(path: Path) -> str | None:
    """The sha256 of a file's bytes; None when it cannot be read. Hashed once per process while
    the file keeps its size and modification time (a run asks for every model file several
    times: the store's keys of each stage and the provenance)."""
    try:
        stat = path.stat()
        return _digest(str(path), stat.st_mtime_ns, stat.st_size)
    except OSError:
        return None


@functools.lru_cache(maxsize=DIGESTS)
def _digest(path: str, mtime_ns: int, size: int) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def build(config: LibraryConfig, sim: Simulator) -> Provenance:
    """The provenance of a library made from ``config`` by ``sim``, from the files as they are."""
    p = config.process
    return Provenance(
        charflow=__version__,
        simulator=sim,
        config=FileDigest(config.path.name, config.digest),
        models=_models(config),
        corner=config.corner_name,
        vdd=p.vdd,
        temperature=p.temperature,
        time_unit=config.time_unit,
        cap_unit=config.cap_unit,
        thresholds=config.thresholds,
        simulation=config.simulation,
        options=p.options,
        compat=p.compat,
        scale=p.scale,
    )


def _models(config: LibraryConfig) -> tuple[ModelDigest, ...]:
    """The config's model files, each followed by the files it names, as the testbench reads
    them; a file read twice (two sections) is listed twice, a file named twice once."""
    found: list[ModelDigest] = []
    for m in config.process.models:
        found.append(ModelDigest(m.path.name, m.section, file_digest(m.path)))
        try:
            text = m.path.read_text(encoding="utf-8", errors="replace")
        except OSError:
            continue  # the simulator names the missing file when the deck runs
        for path in model_files(text, m.path.parent):
            found.append(ModelDigest(path.name, None, file_digest(path), m.path.name))
    return tuple(dict.fromkeys(found))


def _number(value: float | None, scale: float = 1.0, unit: str = "") -> str:
    if value is None:
        return "none"
    return NUMBER.format(value / scale) + (f" {unit}" if unit else "")


def liberty_header(prov: Provenance) -> tuple[str, ...]:
    """The Liberty file's header comment lines, settings in the config's keys and units."""
    sim, tu = prov.simulator, prov.time_unit
    built = f", built {sim.build_date}" if sim.build_date else ""
    lines = [
        f"charflow {prov.charflow}",
        f"simulator {sim.program} {sim.version}{built}, {sim.backend} backend",
        f"config {prov.config.file} sha256 {prov.config.sha256 or 'none (not read from a file)'}",
    ]
    for m in prov.models:
        how = f"section {m.section}" if m.section else "whole file"
        if m.included_by:
            how = f"named in {m.included_by}"
        lines.append(f"model {m.file} {how} sha256 {m.sha256 or 'none (unreadable)'}")
    corner = f"corner {prov.corner}"
    lines.append(f"{corner}: vdd {_number(prov.vdd)} V, temperature {_number(prov.temperature)} C")
    lines.append(f"units: time 1{tu}, capacitance 1{prov.cap_unit}")
    t = prov.thresholds
    percent = ", ".join(
        f"{f.name} {_number(100 * getattr(t, f.name))}"
        for f in fields(t)
        if f.name != "slew_derate"
    )
    lines.append(f"thresholds (% of vdd): {percent}; slew_derate {_number(t.slew_derate)}")
    s, scale = prov.simulation, time_scale(tu)
    lines.append(
        f"simulation: backend {s.backend}, timeout {_number(s.timeout)} s, "
        f"window {_number(s.window, scale, tu)}, samples_per_edge {s.samples_per_edge}, "
        f"settle {_number(s.settle)}, pushout {_number(s.pushout)}, "
        f"bisect_tolerance {_number(s.bisect_tolerance, scale, tu)}"
    )
    options = ", ".join(f"{k}={v}" for k, v in prov.options) or "none"
    lines.append(
        f"process: options {options}, compat {prov.compat or 'none'}, scale {_number(prov.scale)}"
    )
    return tuple(lines)


def to_json(prov: Provenance) -> dict:
    """The JSON's provenance and settings, in SI units (thresholds as fractions of vdd)."""
    sim, s = prov.simulator, prov.simulation
    lib_power, _ = power_unit(prov.time_unit, prov.cap_unit)
    return {
        "provenance": {
            "charflow_version": prov.charflow,
            "simulator": {
                "program": sim.program,
                "version": sim.version,
                "build_date": sim.build_date,
                "backend": sim.backend,
            },
            "config": {"file": prov.config.file, "sha256": prov.config.sha256},
            "models": [
                {
                    "file": m.file,
                    "section": m.section,
                    "sha256": m.sha256,
                    "included_by": m.included_by,
                }
                for m in prov.models
            ],
        },
        "corner": {"name": prov.corner, "vdd_V": prov.vdd, "temperature_C": prov.temperature},
        "units": {
            "time": "s",
            "capacitance": "F",
            "charge": "C",
            "voltage": "V",
            "energy": "J",
            "power": "W",
        },
        "library_units": {
            "time": prov.time_unit,
            "capacitance": prov.cap_unit,
            "energy": energy_unit(prov.cap_unit),
            "power": lib_power[1:],
        },
        "thresholds": {
            f.name: getattr(prov.thresholds, f.name)
            for f in fields(prov.thresholds)
            if f.name != "slew_derate"
        },
        "slew_derate": prov.thresholds.slew_derate,
        "simulation": {
            "backend": s.backend,
            "timeout_s": s.timeout,
            "window_s": s.window,
            "samples_per_edge": s.samples_per_edge,
            "settle": s.settle,
            "pushout": s.pushout,
            "bisect_tolerance_s": s.bisect_tolerance,
        },
        "process": {"options": dict(prov.options), "compat": prov.compat, "scale": prov.scale},
    }
