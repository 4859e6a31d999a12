"""Every error charflow raises, in one place.

Each error carries the context that locates it (file, key, cell, pin, arc, point) and
puts that context into its message, so a user reading one line knows where to look.
Raise with ``from`` when wrapping a lower-level exception.
"""

from __future__ import annotations

import copy
from collections.abc import Mapping

_CONTEXT_ORDER = ("file", "line", "key", "cell", "device", "pin", "arc", "state", "point", "vector")


class CharflowError(Exception):
    """Base of every error charflow raises on purpose."""

    def __init__(self, message: str, **context: object) -> None:
        self.reason = message
        self.context = {k: v for k, v in context.items() if v is not None}
        unknown = set(self.context) - set(_CONTEXT_ORDER)
        if unknown:
            raise TypeError(f"unknown error context {sorted(unknown)}")
        super().__init__(self._format())

    def _format(self) -> str:
        where = place(self.context)
        return f"{where}: {self.reason}" if where else self.reason

    def located(self, reason: str | None = None, **context: object) -> CharflowError:
        """A copy of this error (same type, same attributes) with ``context`` added where it
        names none, and with ``reason`` in place of its own when given; raise it ``from``
        this one."""
        other = copy.copy(self)
        added = {k: v for k, v in context.items() if v is not None}
        unknown = set(added) - set(_CONTEXT_ORDER)
        if unknown:
            raise TypeError(f"unknown error context {sorted(unknown)}")
        other.context = {**added, **self.context}
        other.reason = self.reason if reason is None else reason
        other.args = (other._format(),)
        return other


def place(context: Mapping[str, object]) -> str:
    """Where a message is about, as errors say it: ``cell QINV_P1, arc A->Y (...), point ...``."""
    return ", ".join(f"{k} {context[k]}" for k in _CONTEXT_ORDER if k in context)


class ConfigError(CharflowError):
    """The configuration file is missing, malformed or inconsistent."""


class ConfigProblemsError(ConfigError):
    """Several problems in one config file; ``problems`` holds each as its own ConfigError."""

    def __init__(
        self, problems: list[ConfigError] | tuple[ConfigError, ...], **context: object
    ) -> None:
        self.problems = tuple(problems)
        listed = "\n  ".join(map(str, self.problems))
        super().__init__(f"{len(self.problems)} problems in the config:\n  {listed}", **context)


class FunctionSyntaxError(ConfigError):
    """A Boolean function in Liberty syntax cannot be parsed."""


class NetlistError(CharflowError):
    """A template cannot be rendered or a netlist has no usable ``.subckt``."""


class SimulatorError(CharflowError):
    """The simulator failed to load, run or converge."""


class DeckReadError(SimulatorError):
    """The simulator cannot read a testbench (its models or cell): no option can help."""


class SimulatorTimeoutError(SimulatorError):
    """A run took longer than the timeout and was stopped."""


class SimulatorHungError(SimulatorError):
    """The in-process simulator ran past its timeout and did not stop when told to: the process
    that holds it cannot simulate again."""


class MeasurementError(CharflowError):
    """A waveform does not give a measurement: no crossing, a glitch, or not settled.

    ``waveform`` (a ``records.outcomes.Waveform``; ``outcomes.waveform_of`` reads it typed:
    outcomes imports this module, which cannot name the type) holds the simulated vectors that
    failed, once a simulation ran, so the point can be inspected.
    """

    def __init__(self, message: str, *, waveform: object = None, **context: object) -> None:
        self.waveform = waveform
        super().__init__(message, **context)


class CutOffError(MeasurementError):
    """A run reached its stop-time cap (``[simulation] window`` or its default) before an
    output settled: the point was cut off, not mis-simulated. ``cap`` holds the window in
    effect (s past the run's last input event), when the run says it."""

    def __init__(self, message: str, *, cap: float | None = None, **context: object) -> None:
        self.cap = cap
        super().__init__(message, **context)


class FunctionalMismatchError(CharflowError):
    """The netlist does not implement the function the config declares."""


class TableError(CharflowError):
    """A table's axes or values are inconsistent."""


class LibertyError(CharflowError):
    """A Liberty file cannot be written or read back."""


class OutputError(CharflowError):
    """An output cannot be written."""


class StoreError(CharflowError):
    """The result store cannot be opened, read or written."""


class ClusterError(CharflowError):
    """The Dask cluster cannot be reached, or a task on it failed."""


class DiffError(CharflowError):
    """A library to compare cannot be read."""


def again(kind: str, reason: str, context: dict[str, str]) -> CharflowError:
    """An error of the type named ``kind`` (one of this module's), rebuilt from what a worker
    sent back (its reason and context): the driver raises it where a failure ends the run."""
    cls = globals().get(kind)
    if not (isinstance(cls, type) and issubclass(cls, CharflowError)):
        cls = CharflowError
    try:
        return cls(reason, **context)
    except TypeError:  # a type whose constructor wants more than a reason and context
        return CharflowError(reason, **context)
