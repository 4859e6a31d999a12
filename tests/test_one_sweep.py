"""A run's function checks share its one sweep, each cell's first, with no barrier before the
rest of the work: the library is the same as when the checks ran as a sweep of their own, and a
cell whose netlist is not its function still stops the run with its error, keeping what was
measured. Needs ngspice (fails without it).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from charflow.config import library as config
from charflow.config.resources import MODEL_DIR, TEMPLATE_DIR
from charflow.execution import sweep
from charflow.execution.store import FILE_NAME, Store
from charflow.flow import characterize as flow
from charflow.records.errors import FunctionalMismatchError
from charflow.records.outcomes import Failure, FunctionChecked
from charflow.records.points import FunctionPoint

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
# small_l1's rows in a store after a whole run: 90 grid points, 24 toggles, 3 leakage points
# and 3 function checks (tests/test_output_safety.py counts the same).
WHOLE_RUN_ROWS = 120
NOR = 'outputs = { Y = "!(IA|IB)" }'
NAND = 'outputs = { Y = "!(IA&IB)" }'


@pytest.fixture(scope="module", autouse=True)
def _need_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")


def _small(tmp_path: Path, *swaps: tuple[str, str]) -> Path:
    """small_l1 in ``tmp_path`` (its files found from there), with each (old, new) of
    ``swaps`` replaced in its text."""
    text = SMALL.read_text(encoding="utf-8")
    text = text.replace("../../charflow/bundled/models", MODEL_DIR.as_posix())
    text = text.replace("../../charflow/bundled/templates", TEMPLATE_DIR.as_posix())
    for old, new in swaps:
        assert old in text
        text = text.replace(old, new)
    path = tmp_path / "small_l1.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _files(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def test_a_run_is_one_sweep_and_writes_what_the_check_then_the_sweep_wrote(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    cfg = config.load(SMALL)
    swept: list[tuple] = []
    real = sweep.run

    def counted(cfg, points, **kwargs):
        swept.append(tuple(points))
        return real(cfg, swept[-1], **kwargs)

    monkeypatch.setattr(sweep, "run", counted)
    one = flow.characterize(cfg, jobs=1)
    assert len(swept) == 1
    checked = {p.cell for p in swept[0] if isinstance(p, FunctionPoint)}
    assert checked == {c.name for c in cfg.cells}
    flow.write(cfg, one, tmp_path / "one")
    # The order before: the checks as a sweep of their own (``verify``), then the run's sweep
    # without them.
    swept.clear()
    assert len(flow.verify(cfg, jobs=1)) == len(cfg.cells)
    monkeypatch.setattr(flow, "function_points", lambda cfg, names: ())
    two = flow.characterize(cfg, jobs=1)
    assert len(swept) == 2 and not any(isinstance(p, FunctionPoint) for p in swept[1])
    flow.write(cfg, two, tmp_path / "two")
    # Every value depends on its point alone, not on the order the points ran in: the same
    # bytes (the Liberty file and the JSON).
    assert _files(tmp_path / "one") == _files(tmp_path / "two")
    assert "small_l1.lib" in _files(tmp_path / "one")


def test_a_cell_not_its_function_stops_the_run_and_what_was_measured_stays(
    tmp_path: Path,
) -> None:
    # QNOR2_P1's netlist declared a NAND: its DC levels give it away.
    wrong = config.load(_small(tmp_path, (NOR, NAND)))
    seen: list[object] = []
    path = tmp_path / FILE_NAME
    with Store(path) as store, pytest.raises(FunctionalMismatchError) as caught:
        flow.characterize(wrong, jobs=1, store=store, on_result=seen.append)
    assert caught.value.context["cell"] == "QNOR2_P1"
    assert "QNOR2_P1" in str(caught.value) and "vector" in str(caught.value)
    measured = [o for o in seen if not isinstance(o, Failure)]
    with Store(path) as store:
        kept = store.count()
    # Stopped early (the rest of the run's work never started), and everything measured up to
    # the stop is in the store.
    assert kept == len(measured) < WHOLE_RUN_ROWS
    passed = {o.point for o in measured if isinstance(o, FunctionChecked)}
    assert all(p.cell != "QNOR2_P1" for p in passed)
    # Fixed, the run resumes: the checks that passed are not simulated again, nor anything else
    # the store holds.
    fixed = config.load(_small(tmp_path))
    served: list[tuple] = []
    with Store(path) as store:
        result = flow.characterize(fixed, jobs=1, store=store, on_stored=served.append)
        assert store.count() == WHOLE_RUN_ROWS
    (found,) = served
    assert passed <= {m.point for m in found} and len(found) == kept
    assert not result.failures and len(result.reused) == kept - len(passed)


def test_of_the_cells_failed_so_far_the_first_in_the_config_is_named(tmp_path: Path) -> None:
    # QNAND2_P1 and QNOR2_P1 declared as each other: whichever check fails first stops the
    # run; of the checks failed by then, the error is the first cell's in the config's order.
    swaps = ((NAND, "@@"), (NOR, NAND), ("@@", NOR))
    wrong = config.load(_small(tmp_path, *swaps))
    seen: list[object] = []
    with pytest.raises(FunctionalMismatchError) as caught:
        flow.characterize(wrong, jobs=2, on_result=seen.append)
    # Checks only: with no barrier a cell's timing points may run, and fail, beside its check
    # (a CI run raised QNOR2_P1's check while a QNAND2_P1 point other than its check had failed).
    failed = {
        o.point.cell for o in seen if isinstance(o, Failure) and isinstance(o.point, FunctionPoint)
    }
    assert failed <= {"QNAND2_P1", "QNOR2_P1"} and failed
    first = next(c.name for c in wrong.cells if c.name in failed)
    assert caught.value.context["cell"] == first
