"""Every error charflow raises, in one place.

Each error carries the context that locates it (file, key, cell, pin, arc, point) and
puts that context into its message, so a user reading one line knows where to look.
Raise with ``from`` when wrapping a lower-level exception.
"""

from __future__ import annotations

_CONTEXT_ORDER = ("file", "line", "key", "cell", "pin", "arc", "state", "point", "vector")


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
        where = ", ".join(f"{k} {self.context[k]}" for k in _CONTEXT_ORDER if k in self.context)
        return f"{where}: {self.reason}" if where else self.reason


class ConfigError(CharflowError):
    """The configuration file is missing, malformed or inconsistent."""


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
    """A waveform does not give a measurement: no crossing, a glitch, or not settled."""


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
