"""The bundled demo: its config as shipped, a quick variant for trials, and a copy to edit.

The quick variant is made from the shipped config (never a second config to keep in step):
slew and load axes keep their first, middle and last value, the other output's loads and the
setup/hold slews their first and last, and the models become the level-1 cards, so the whole
cell set (a two-output cell and both flip-flops included) runs in a fraction of the full
demo's time.
"""

from __future__ import annotations

import shutil
import tomllib
from pathlib import Path
from typing import Any

from charflow.config import library as config
from charflow.config.resources import BUNDLED, DEMO_CONFIG, MODEL_DIR
from charflow.records.errors import ConfigError, OutputError

QUICK_MODELS = MODEL_DIR / "vellum90_l1.lib"
QUICK_SUFFIX = (
    "_quick"  # the quick library's name, and so its output folder, differ from the demo's
)
COPIED = ("demo", "models", "templates/cells")  # what a user edits; the layout is kept


def load(*, quick: bool = False) -> config.LibraryConfig:
    """The demo's config as shipped, or its quick variant."""
    if not quick:
        return config.load(DEMO_CONFIG)
    try:
        doc = tomllib.loads(DEMO_CONFIG.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError(f"cannot read the bundled demo: {exc}", file=DEMO_CONFIG) from exc
    return config.parse(quick_document(doc), DEMO_CONFIG)


def quick_document(doc: dict[str, Any]) -> dict[str, Any]:
    """The demo's TOML document with thinned grids, the level-1 models and its own name."""
    library = {**doc["library"], "name": doc["library"]["name"] + QUICK_SUFFIX}
    models = [{**m, "file": QUICK_MODELS.as_posix()} for m in doc["process"]["models"]]
    cells = [
        {**cell, "grid": _thin(cell["grid"])} if "grid" in cell else cell for cell in doc["cell"]
    ]
    return {
        **doc,
        "library": library,
        "process": {**doc["process"], "models": models},
        "grid": _thin(doc["grid"]),
        "cell": cells,
    }


def _thin(grid: dict[str, list[float]]) -> dict[str, list[float]]:
    """Slew and load axes cut to their first, middle and last value; the other output's loads
    and the setup/hold slews (the costly searches) to their first and last."""
    return {key: _keep(values, 3 if key in ("slew", "load") else 2) for key, values in grid.items()}


def _keep(values: list[float], count: int) -> list[float]:
    if len(values) <= count:
        return values
    return (
        [values[0], values[len(values) // 2], values[-1]] if count == 3 else [values[0], values[-1]]
    )


def copy_to(folder: Path) -> Path:
    """Copy the demo's config, cell templates and models into ``folder``; return the config.

    The bundle's layout is kept, so the config's relative paths hold in the copy. Nothing is
    overwritten: a file already there is an error before anything is copied.
    """
    sources = [p for name in COPIED for p in sorted((BUNDLED / name).rglob("*")) if p.is_file()]
    for src in sources:
        target = folder / src.relative_to(BUNDLED)
        if target.exists():
            raise OutputError(
                "already exists; copy the demo into a new or empty folder", file=target
            )
    for src in sources:
        target = folder / src.relative_to(BUNDLED)
        try:
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(src, target)
        except OSError as exc:
            raise OutputError(f"cannot copy the demo: {exc.strerror}", file=target) from exc
    return folder / DEMO_CONFIG.relative_to(BUNDLED)
