"""The config sections in `aftercast.settings`: they stay below every stage.

`config.py` assembles these sections and nearly every stage imports `config.py`, so a section
that imported a stage would bring an import cycle back. The check reads each module's imports
(a syntax tree, nothing is run) and allows only the standard library, third-party packages and
the lowest-level aftercast modules.
"""

from __future__ import annotations

import ast
from pathlib import Path
from typing import get_args

import aftercast.settings
from aftercast.alerts.rules import DETECTIONS
from aftercast.notify import CHANNELS
from aftercast.settings.alerts import Detection
from aftercast.settings.channels import ChannelConfig
from aftercast.settings.sources import SourceConfig
from aftercast.sources import SOURCE_TYPES

LOW_LEVEL = {"aftercast.errors", "aftercast.periods"}


def _aftercast_imports(path: Path) -> set[str]:
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.module:
            found.add(node.module)
        elif isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
    return {name for name in found if name == "aftercast" or name.startswith("aftercast.")}


def test_settings_import_no_stage_nor_the_root_config() -> None:
    folder = Path(aftercast.settings.__file__).parent
    modules = sorted(folder.glob("*.py"))
    assert len(modules) > 5
    for path in modules:
        for name in _aftercast_imports(path):
            assert name.startswith("aftercast.settings.") or name in LOW_LEVEL, (path.name, name)


def _type_names(union: object) -> set[str]:
    members = get_args(get_args(union)[0])  # Annotated[A | B | C, Field(...)]
    return {member.model_fields["type"].default for member in members}


def test_every_configurable_type_has_its_implementation() -> None:
    assert _type_names(ChannelConfig) == set(CHANNELS)
    assert _type_names(SourceConfig) == set(SOURCE_TYPES)


def test_every_detection_a_rule_can_name_is_described() -> None:
    assert set(get_args(Detection)) == set(DETECTIONS)
