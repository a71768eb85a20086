"""Bad command-line input gives one line and exit 2, before any work starts: no traceback, no hang,
no long run that fails only when it writes its summary at the end."""

from __future__ import annotations

import os

import pytest

from patchloom.cli.main import main


@pytest.mark.parametrize("argv, says", [
    (["run", "r.yaml", "--epoch", "-1"], "--epoch: -1 is below 0"),
    (["run", "r.yaml", "--world-size", "0"], "--world-size: 0 is below 1"),
    (["run", "r.yaml", "--max-batches", "0"], "--max-batches: 0 is below 1"),
    (["run", "r.yaml", "--rank", "x"], "'x' is not a whole number"),
    (["run", "r.yaml", "--ledger", "/nonexistent-folder/x.jsonl"], "does not exist; create it first"),
    (["pack", "r.yaml", "--out", "o", "--epoch", "-5"], "--epoch: -5 is below 0"),
    (["pack", "r.yaml", "--out", "o", "--workers", "0"], "--workers: 0 is below 1"),
    (["inspect", "r.yaml", "--samples", "-1"], "--samples: -1 is below 0"),
])
def test_bad_options_are_refused_when_read(argv, says, capsys):
    with pytest.raises(SystemExit) as info:
        main(argv)
    assert info.value.code == 2
    err = capsys.readouterr().err
    assert says in err and "Traceback" not in err


def test_a_folder_as_ledger_file_is_refused(tmp_path, capsys):
    with pytest.raises(SystemExit):
        main(["run", "r.yaml", "--ledger", str(tmp_path)])
    assert "is a folder; give a file name" in capsys.readouterr().err


def test_rank_not_below_world_size_is_one_line(capsys):
    assert main(["run", "r.yaml", "--rank", "5", "--world-size", "2"]) == 2
    err = capsys.readouterr().err.strip()
    assert err == "patchloom: error: --rank 5 is not below --world-size 2; ranks count from 0"


def test_a_recipe_that_is_a_pipe_is_refused_not_waited_on(tmp_path, capsys):
    fifo = tmp_path / "r.yaml"
    os.mkfifo(fifo)
    assert main(["recipe", "check", str(fifo)]) == 2  # returning at all shows it never opened the pipe
    assert "is a pipe or socket" in capsys.readouterr().err


def test_an_output_folder_that_cannot_be_made_is_one_line(tmp_path, capsys):
    recipe = tmp_path / "r.yaml"
    recipe.write_text("version: 1\nsource: {shards: " + str(tmp_path / "none-*.tar") + "}\n")
    blocker = tmp_path / "file"
    blocker.write_text("x")
    code = main(["inspect", str(recipe), "--out", str(blocker / "sub"), "--no-progress"])
    assert code == 2
    err = capsys.readouterr().err
    assert err.startswith("patchloom: error:") and "Traceback" not in err


def test_summary_escapes_control_characters_from_sample_keys():
    """A member named to retitle or clear the terminal is printed escaped."""
    from patchloom.summary import RunStats, format_table

    key = "x\x1b]0;PWNED\x07\x1b[2J"
    ledger = {"read": 3, "emitted": 2, "skipped": 1, "in_buffer": 0, "shards_failed": 0, "shard_errors": [],
              "skip_reasons": {"decode: broken": 1}, "skip_examples": {"decode: broken": [f"{key} (a.tar)"]}}
    table = format_table(RunStats(), ledger)
    assert "\x1b" not in table and "\x07" not in table
    assert "x\\x1b]0;PWNED\\x07\\x1b[2J (a.tar)" in table


def test_summary_shows_what_a_stopped_run_still_held():
    from patchloom.summary import RunStats, format_table

    ledger = {"read": 20, "emitted": 16, "skipped": 0, "in_buffer": 4, "shard_errors": []}
    assert "images in buffer  4" in format_table(RunStats(), ledger).replace("   ", "  ")
    assert "in buffer" not in format_table(RunStats(), {**ledger, "emitted": 20, "in_buffer": 0})
