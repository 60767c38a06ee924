"""The config sections in `aftercast.settings`: they stay below every stage.

`config.py` assembles these sections and nearly every stage imports `config.py`, so a section
that imported a stage would bring an import cycle back. The check reads each module's imports
(a syntax tree, nothing is run) and allows only the standard library, third-party packages and
the lowest-level aftercast modules.
"""

from __future__ import annotations

import ast
import re
from importlib import resources
from pathlib import Path
from typing import get_args

import pytest
import yaml
from pydantic import BaseModel

import aftercast.settings
from aftercast.alerts.rules import DETECTIONS
from aftercast.config import Config, parse_config
from aftercast.errors import ConfigError
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


def _section_block(text: str, section: str) -> str:
    """The starter's lines of one top-level section, up to the next top-level key."""
    lines = text.split("\n")
    start = next(i for i, line in enumerate(lines) if line.startswith(f"{section}:"))
    block = []
    for line in lines[start + 1 :]:
        if line and not line.startswith((" ", "#")):
            break
        block.append(line)
    return "\n".join(block)


def test_starter_shows_every_key_and_reads_as_the_defaults() -> None:
    """Every section of the config and every key of a section is in the starter (written or
    commented), and what is written is the built-in default, as its header says."""
    text = resources.files("aftercast").joinpath("starter.yaml").read_text(encoding="utf-8")
    for section, field in Config.model_fields.items():
        assert re.search(rf"^{section}:", text, re.MULTILINE), section
        model = field.annotation
        if not (isinstance(model, type) and issubclass(model, BaseModel)):
            continue  # a list of entries: its keys are shown by the commented examples
        block = _section_block(text, section)
        for key in model.model_fields:
            assert re.search(rf"^\s*#?\s*{key}:", block, re.MULTILINE), f"{section}.{key}"
    assert parse_config(yaml.safe_load(text)).model_dump() == Config().model_dump()


def test_example_config_is_the_starter() -> None:
    """config/aftercast.example.yaml is what `init --write-config` writes, byte for byte, so the
    file the README links to never falls behind the built-in starter."""
    starter = resources.files("aftercast").joinpath("starter.yaml").read_text(encoding="utf-8")
    example = Path(__file__).resolve().parents[1] / "config" / "aftercast.example.yaml"
    assert example.read_text(encoding="utf-8") == starter


WINDOW_ERRORS = {
    "an extra window named like the default": (
        {"window": {"name": "recent", "days": 28}, "windows": [{"name": "recent", "days": 7}]},
        "config key windows[0].name: window name 'recent' is already used by window.name",
    ),
    "two extra windows of one name": (
        {
            "windows": [
                {"name": "q", "days": 91},
                {"name": "long", "days": 9},
                {"name": "q", "points": 5},
            ]
        },
        "config key windows[2].name: window name 'q' is already used by windows[0].name",
    ),
    "detection names no window": (
        {"windows": [{"name": "quarter", "days": 91}], "detection": {"window": "quartr"}},
        "config key detection.window: no window is named 'quartr' (configured: recent, quarter)",
    ),
}


@pytest.mark.parametrize("case", list(WINDOW_ERRORS))
def test_window_names_are_unique_and_detection_names_a_configured_one(case: str) -> None:
    raw, message = WINDOW_ERRORS[case]
    with pytest.raises(ConfigError) as error:
        parse_config(raw, "c.yaml")
    assert str(error.value).startswith(f"c.yaml: {message}")


def test_detection_window_may_name_any_configured_window() -> None:
    raw = {"windows": [{"name": "quarter", "days": 91}], "detection": {"window": "quarter"}}
    assert parse_config(raw).detection.window == "quarter"
