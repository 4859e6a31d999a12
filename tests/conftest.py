"""Shared test machinery: every library JSON charflow writes during the tests is checked
against the JSON Schema shipped in the package (charflow/bundled/schema), with the jsonschema
package (Julian Berman, jsonschema 4, an implementation of JSON Schema draft 2020-12).

Two hooks do it without each test asking: every document ``flow.to_json`` builds in the test
process, and, after each test that uses ``tmp_path``, every ``<library>.json`` under it (runs of
the ``charflow`` command in a subprocess included). The ``valid_library_json`` fixture checks
one file where neither hook sees it.
"""

from __future__ import annotations

import functools
import json
import shutil
from pathlib import Path

import jsonschema
import pytest

from charflow.config.resources import LIBRARY_SCHEMA
from charflow.flow import characterize as flow

SHOWN_ERRORS = 5  # schema violations a failure lists


@functools.cache
def library_validator() -> jsonschema.Draft202012Validator:
    schema = json.loads(LIBRARY_SCHEMA.read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def assert_valid_library(doc: object, where: str) -> None:
    errors = sorted(library_validator().iter_errors(doc), key=lambda e: list(e.path))
    if errors:
        shown = "\n  ".join(f"{e.json_path}: {e.message[:300]}" for e in errors[:SHOWN_ERRORS])
        pytest.fail(f"{where} does not follow {LIBRARY_SCHEMA.name} ({len(errors)}):\n  {shown}")


def assert_valid_library_json(path: Path) -> None:
    """The library JSON file at ``path`` follows the package's schema."""
    assert_valid_library(json.loads(Path(path).read_text(encoding="utf-8")), str(path))


@pytest.fixture(scope="session")
def ngspice() -> None:
    """A test that simulates asks for this: it fails, never skips, without ngspice."""
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; this test needs it (apt-get install ngspice)")


@pytest.fixture(scope="session")
def valid_library_json():
    """``assert_valid_library_json``, for a test whose library JSON neither hook sees (written
    by the ``charflow`` command into a folder that is not the test's ``tmp_path``)."""
    return assert_valid_library_json


def is_library_json(path: Path) -> bool:
    """A library JSON is ``<library>.json`` (``flow.write``), not a fidelity or study report."""
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(doc, dict) and f"{doc.get('library')}.json" == path.name and "points" in doc


@pytest.fixture(scope="session", autouse=True)
def _every_to_json_is_valid():
    built = flow.to_json

    def checked(config, result):
        doc = built(config, result)
        # Through JSON as the file has it: tuples become arrays.
        assert_valid_library(json.loads(json.dumps(doc)), f"flow.to_json of {config.name}")
        return doc

    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(flow, "to_json", checked)
        yield


@pytest.fixture(autouse=True)
def _written_library_json_is_valid(request: pytest.FixtureRequest):
    folder = request.getfixturevalue("tmp_path") if "tmp_path" in request.fixturenames else None
    yield
    if folder is not None:
        for path in sorted(folder.rglob("*.json")):
            if is_library_json(path):
                assert_valid_library_json(path)
