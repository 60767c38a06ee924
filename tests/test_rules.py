"""Alert rules: defaults, merging by name, narrowing, config errors, and `rules check`.

The behaviour checked is the configuration contract of the design (design.md: "defaults that
alert sensibly with no rules configured"; routes name channels; "every error a user can
cause ... ends in one clear line naming the file, row or config key"). The label filters are
checked against pandas' own boolean indexing of the same labels.
"""

from __future__ import annotations

import json
from importlib import resources
from pathlib import Path

import pandas as pd
import pytest
import yaml

from aftercast.alerts.rules import (
    DEFAULT_RULES,
    DETECTIONS,
    effective_rules,
    evaluate_rules,
    explain_rule,
)
from aftercast.cli import main
from aftercast.config import parse_config
from aftercast.errors import ConfigError
from aftercast.settings.alerts import RuleConfig


def test_defaults_cover_every_detection_when_no_rules_are_configured() -> None:
    rules = effective_rules(parse_config({}).rules)
    assert [r.detection for r in rules] == list(DETECTIONS)
    assert rules == list(DEFAULT_RULES)


def test_a_rule_named_like_a_default_changes_only_what_it_gives() -> None:
    config = parse_config(
        {
            "rules": [
                {"detection": "bias", "raise_after": 4},
                {"detection": "coverage_high", "enabled": False},
                {"name": "planning-coverage", "detection": "coverage_low", "match": {"team": "p"}},
            ]
        }
    )
    rules = {r.name: r for r in effective_rules(config.rules)}
    default_bias = next(r for r in DEFAULT_RULES if r.name == "bias")
    assert rules["bias"].raise_after == 4
    assert rules["bias"].clear_after == default_bias.clear_after
    assert "coverage_high" not in rules
    assert rules["planning-coverage"].match == {"team": "p"}
    assert len(rules) == len(DEFAULT_RULES)  # one switched off, one added


def test_label_model_and_horizon_filters_agree_with_pandas_indexing() -> None:
    rng = pd.Series(range(60))
    findings = pd.DataFrame(
        {
            "detection": "coverage_low",
            "series_id": rng % 12,
            "model_id": 1,
            "model": (rng % 3).map({0: "planner", 1: "benchmark:naive", 2: "legacy"}),
            "horizon": (rng % 4).map({0: "1", 1: "2-7", 2: "8-14", 3: "15+"}),
            "flagged": rng % 5 != 0,
            "severity": "warning",
            "statistic": rng / 10.0,
            "p_value": 0.001,
            "n": 40,
            "evidence": [{}] * 60,
        }
    )
    labels = pd.Series(
        [{"team": "planning" if i % 2 else "ops", "region": "north"} for i in range(12)]
    )
    rule = RuleConfig.model_validate(
        {
            "detection": "coverage_low",
            "match": {"team": "planning"},
            "models": ["benchmark:*", "planner"],
            "horizons": ["1", "2-7"],
            "min_statistic": 2.0,
        }
    )
    out = evaluate_rules(findings, [rule], labels)
    team = labels.map(lambda d: d["team"]).reindex(findings["series_id"]).to_numpy()
    expected = findings[
        (team == "planning")
        & findings["model"].isin(["planner", "benchmark:naive"])
        & findings["horizon"].isin(["1", "2-7"])
    ]
    assert sorted(out["statistic"]) == sorted(expected["statistic"])  # in scope
    met = expected["flagged"] & (expected["statistic"].abs() >= 2.0)
    assert sorted(out.loc[out["met"], "statistic"]) == sorted(expected.loc[met, "statistic"])


def test_explanations_say_when_a_rule_raises_and_clears() -> None:
    text = explain_rule(
        RuleConfig.model_validate(
            {"detection": "coverage_low", "raise_after": 2, "clear_after": 3, "max_p_value": 0.01}
        )
    )
    assert "fewer outcomes than their level" in text
    assert "raised after 2 consecutive cycles" in text and "cleared after 3" in text
    assert "adjusted p-value at most 0.01" in text


@pytest.mark.parametrize(
    ("section", "key"),
    [
        ({"routes": [{"match": {"team": "x"}, "channels": ["nowhere"]}]}, "routes"),
        ({"rules": [{"detection": "coverage_wide"}]}, "rules.0.detection"),
        ({"rules": [{"detection": "bias"}, {"detection": "bias"}]}, "rules"),
        ({"delivery": {"max_attempts": 0}}, "delivery.max_attempts"),
        ({"delivery": {"backof_seconds": 3}}, "delivery.backof_seconds: unknown key"),
    ],
)
def test_config_mistakes_are_one_line_naming_the_key(section: dict[str, object], key: str) -> None:
    with pytest.raises(ConfigError) as caught:
        parse_config(section, "alerting.yaml")
    message = str(caught.value)
    assert "\n" not in message and f"config key {key}" in message


def test_rules_check_explains_rules_routes_and_channels(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "c.yaml"
    path.write_text(
        "channels:\n  - {name: local, type: file, path: alerts.jsonl}\n"
        "routes:\n  - {match: {team: planning}, channels: [local]}\n"
        "rules:\n  - {detection: forecasts_stalled, enabled: false}\n"
        "  - {name: planning-bias, detection: bias, match: {team: planning}, severity: critical}\n"
    )
    assert main(["--config", str(path), "rules", "check"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("config is valid: 7 rule(s) in force")
    assert "forecasts_stalled: switched off" in out
    assert "planning-bias: when errors keep one sign" in out and "severity critical" in out
    assert "route team=planning: team=planning -> local" in out
    assert main(["--config", str(path), "rules", "check", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert [r["name"] for r in report["rules"]][-1] == "planning-bias"
    assert report["channels"] == [{"name": "local", "type": "file"}]
    path.write_text("routes:\n  - {channels: [ghost]}\n")
    assert main(["--config", str(path), "rules", "check"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "config key routes" in err and "'ghost'" in err


def _uncomment(text: str, key: str) -> str:
    """The `key: []` section of the starter with its commented example entries switched on."""
    lines = text.split("\n")
    start = lines.index(f"{key}: []")
    block = [f"{key}:"]
    for line in lines[start + 1 :]:
        if not line.startswith("#"):
            break
        block.append(line[1:])
    return "\n".join(block)


def test_starter_config_examples_are_valid(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("HOOK_SECRET", "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw")
    monkeypatch.setenv("SMTP_PASSWORD", "unused")
    monkeypatch.setenv("HOOK_TOKEN", "unused")
    text = resources.files("aftercast").joinpath("starter.yaml").read_text(encoding="utf-8")
    examples = "\n".join(_uncomment(text, key) for key in ("channels", "routes", "rules"))
    config = parse_config(yaml.safe_load(examples), "starter examples")
    assert [c.type for c in config.channels] == ["email", "webhook", "file"]
    assert [r.name for r in config.rules] == ["coverage_low", "planning-bias"]
    assert parse_config(yaml.safe_load(text)).delivery.max_attempts == 8  # as written
