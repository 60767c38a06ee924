"""The docstring examples of every module under src/aftercast run, and hold.

The hand-worked examples (an interval score of 26 for y = 0 below [2, 8] at 80%, a period
ordinal per UTC day, ...) are documentation a reader trusts; running them keeps them true to
the code. Modules are found by the `>>>` in their source, so a new example is checked without
a list to update here.
"""

from __future__ import annotations

import doctest
import importlib
from pathlib import Path

import pytest

import aftercast

PACKAGE = Path(aftercast.__file__).parent


def modules_with_examples() -> list[str]:
    """Dotted names of the modules whose source holds a docstring example."""
    names = []
    # Files, not pkgutil: some sub-packages (alerts) have no __init__.py, which pkgutil skips.
    for path in sorted(PACKAGE.rglob("*.py")):
        if ">>> " in path.read_text(encoding="utf-8"):
            parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
            names.append(".".join(parts[:-1] if parts[-1] == "__init__" else parts))
    return names


MODULES = modules_with_examples()


def test_the_known_examples_are_found() -> None:
    # A guard on the finder itself: these modules are known to carry worked examples.
    assert {"aftercast.measures", "aftercast.periods", "aftercast.detect.fleet"} <= set(MODULES)
    assert "aftercast.alerts.wording" in MODULES


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples_run(name: str) -> None:
    failures, attempted = doctest.testmod(
        importlib.import_module(name), optionflags=doctest.ELLIPSIS, verbose=False
    )
    assert attempted > 0, f"{name}: a '>>> ' in the source but no docstring example"
    assert failures == 0
