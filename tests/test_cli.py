"""The CLI dispatches each command to exactly one package function (pre-commit's main_test pattern).

Also: every option of every (sub)command has a help line; ``--flips`` reaches the config; ``detdiff config``.
"""

from __future__ import annotations

import argparse
from unittest import mock

import pytest
import yaml

from detdiff import cli
from detdiff.config import ConfigError, load_config, packaged_config


@pytest.mark.parametrize("argv, target", [
    (["check", "a.json", "--images", "imgs"], "detdiff.data.lint.run_check"),
    (["demo", "--out", "d"], "detdiff.data.scenarios.generate_demo"),
    (["audit", "a.json", "--images", "imgs", "--out", "r"], "detdiff.pipeline.run_audit"),
    (["analyze", "r"], "detdiff.pipeline.analyze"),
    (["report", "r"], "detdiff.pipeline.report"),
])
def test_each_command_dispatches_once(argv: list[str], target: str) -> None:
    with mock.patch(target) as fn:
        fn.return_value = 0 if target.endswith("run_check") else mock.MagicMock()
        cli.main(argv)
    assert fn.call_count == 1


def test_audit_passes_overrides() -> None:
    with mock.patch("detdiff.pipeline.run_audit") as fn:
        cli.main(["audit", "a.json", "--images", "i", "--out", "r", "--epochs", "3", "--image-size", "160",
                  "--no-thumbnails", "--config", "ci"])
    kwargs = fn.call_args.kwargs
    assert kwargs["overrides"]["train"]["epochs"] == 3
    assert kwargs["overrides"]["data"]["image_size"] == 160
    assert kwargs["thumbnails"] is False
    assert kwargs["config_path"] == "ci"


def test_expected_error_is_one_line_exit_2(tmp_path, capsys) -> None:
    bad = tmp_path / "notjson.json"
    bad.write_text("{ this is not json")
    status = cli.main(["audit", str(bad), "--images", str(tmp_path), "--out", str(tmp_path / "run"),
                       "--config", "ci", "--quiet"])
    err = capsys.readouterr().err
    assert status == 2
    assert "not valid JSON" in err and "Traceback" not in err
    assert err.count("\n") == 1


def test_unknown_config_key_is_named(tmp_path, capsys) -> None:
    cfg = tmp_path / "bad.yaml"
    cfg.write_text("train:\n  epoch: 3\n")
    status = cli.main(["audit", "a.json", "--images", str(tmp_path), "--out", str(tmp_path / "r"),
                       "--config", str(cfg)])
    assert status == 2
    assert "unknown key 'epoch'" in capsys.readouterr().err


def _parsers(parser: argparse.ArgumentParser, name: str = "detdiff"):
    """``(name, parser)`` for the parser and every subcommand's parser below it."""
    yield name, parser
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for sub_name, sub in action.choices.items():
                yield from _parsers(sub, f"{name} {sub_name}")


def test_every_option_has_help() -> None:
    parsers = dict(_parsers(cli.build_parser()))
    assert {"detdiff audit", "detdiff config list", "detdiff config show"} <= set(parsers)
    missing = [f"{name} {action.option_strings or action.dest}" for name, parser in parsers.items()
               for action in parser._actions
               if not isinstance(action, argparse._SubParsersAction) and not (action.help or "").strip()]
    assert not missing


def test_config_help_lists_packaged_configs() -> None:
    audit = dict(_parsers(cli.build_parser()))["detdiff audit"]
    (config,) = [a for a in audit._actions if "--config" in a.option_strings]
    assert all(name in config.help for name in ("default", "topdown", "fast", "ci"))


def test_flips_reaches_the_config() -> None:
    with mock.patch("detdiff.pipeline.run_audit") as fn:
        cli.main(["audit", "a.json", "--images", "i", "--out", "r", "--flips", "dihedral"])
    overrides = fn.call_args.kwargs["overrides"]
    assert load_config("ci", overrides)["train"]["flips"] == "dihedral"
    assert load_config("topdown", cli._overrides(cli.build_parser().parse_args(
        ["audit", "a.json", "--images", "i", "--out", "r"])))["train"]["flips"] == "dihedral"
    with pytest.raises(SystemExit):
        cli.build_parser().parse_args(["audit", "a.json", "--images", "i", "--out", "r", "--flips", "vertical"])


def test_api_audit_passes_flips() -> None:
    import detdiff

    with mock.patch("detdiff.pipeline.run_audit") as fn:
        detdiff.audit("a.json", "i", "r", config="ci", flips="none", epochs=2)
    train = fn.call_args.kwargs["overrides"]["train"]
    assert train["flips"] == "none" and train["epochs"] == 2
    with pytest.raises(ConfigError, match="flips must be one of"):
        detdiff.audit("a.json", "i", "r", flips="vertical")


def test_config_list_and_show(capsys) -> None:
    assert cli.main(["config", "list"]) == 0
    listed = capsys.readouterr().out
    assert all(f"{name} " in listed for name in ("default", "topdown", "fast", "ci"))
    assert cli.main(["config", "show", "topdown"]) == 0
    assert capsys.readouterr().out == packaged_config("topdown").read_text(encoding="utf-8")
    assert cli.main(["config", "show"]) == 0
    assert yaml.safe_load(capsys.readouterr().out)["version"] == 1       # without a name: the default
