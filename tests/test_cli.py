"""The CLI dispatches each command to exactly one package function (pre-commit's main_test pattern)."""

from __future__ import annotations

from unittest import mock

import pytest

from detdiff import cli


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
