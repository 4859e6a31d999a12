"""Files that ship inside the package: the testbench and cell templates, the demo config and
its invented model cards. Found beside this module, so an installed wheel has them too."""

from __future__ import annotations

from pathlib import Path

BUNDLED = Path(__file__).resolve().parent.parent / "bundled"
TEMPLATE_DIR = BUNDLED / "templates"
DEMO_CONFIG = BUNDLED / "demo" / "vellum90.toml"
MODEL_DIR = BUNDLED / "models"
# The JSON Schema of the library JSON charflow writes beside each Liberty file.
LIBRARY_SCHEMA = BUNDLED / "schema" / "charflow-library.schema.json"
