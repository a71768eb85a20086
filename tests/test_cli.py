from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

from patchloom.cli.main import main

ROOT = Path(__file__).parent.parent


def test_help_lists_commands():
    out = subprocess.run([sys.executable, "-m", "patchloom.cli.main", "--help"], capture_output=True, text=True)
    assert out.returncode == 0
    for cmd in ("demo", "run", "recipe"):
        assert cmd in out.stdout


def test_recipe_check_and_show(capsys):
    assert main(["recipe", "check", str(ROOT / "recipes/eval.yaml")]) == 0
    assert "ok (fingerprint" in capsys.readouterr().out
    assert main(["recipe", "show", str(ROOT / "recipes/eval.yaml")]) == 0
    shown = capsys.readouterr().out
    assert "pixel_limit:" in shown and "aspect_rule: pad" in shown


def test_any_error_of_ours_is_one_line_and_exit_2(monkeypatch, capsys):
    import patchloom.cli.run as run_cmd
    from patchloom.store import StoreError

    def broken(args):
        raise StoreError("packed/manifest.json: manifest field workers must be an integer")

    monkeypatch.setattr(run_cmd, "cmd_run", broken)
    assert main(["run", "any.yaml", "--no-progress"]) == 2
    err = capsys.readouterr().err
    assert err == "patchloom: error: packed/manifest.json: manifest field workers must be an integer\n"


def test_bench_help_lists_every_benchmark():
    out = subprocess.run([sys.executable, "-m", "patchloom.cli.main", "bench", "--help"], capture_output=True,
                         text=True)
    assert out.returncode == 0
    for name in ("pipeline", "drops", "packing", "resume", "workers", "soak"):
        assert name in out.stdout


def test_bad_recipe_exits_nonzero_with_message(tmp_path, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text("sizing: {max_tokens: 5000}\n")
    assert main(["recipe", "check", str(bad)]) == 2
    assert "max_tokens must be <= packing.seq_len" in capsys.readouterr().err


def test_run_prints_summary_and_writes_json(tmp_path, demo_dir, capsys):
    out = tmp_path / "s.json"
    code = main(["run", str(ROOT / "recipes/pretrain.yaml"), "--shards", str(demo_dir / "demo-*.tar"),
                 "--no-progress", "--json", str(out)])
    assert code == 0
    text = capsys.readouterr().out
    assert "images emitted" in text and "padding" in text and "images/s" in text
    data = json.loads(out.read_text())
    assert data["ledger"]["read"] == data["ledger"]["emitted"] + data["ledger"]["skipped"]
    assert data["stats"]["images"] == data["ledger"]["emitted"]


def test_run_with_missing_shards_fails_cleanly(tmp_path, capsys):
    code = main(["run", str(ROOT / "recipes/eval.yaml"), "--shards", str(tmp_path / "none.tar"), "--no-progress"])
    assert code == 2
    assert "does not exist" in capsys.readouterr().err


def test_demo_command_makes_data_and_reports(tmp_path):
    data = tmp_path / "demo"
    out = subprocess.run([sys.executable, "-m", "patchloom.cli.main", "demo", "--data", str(data), "--no-progress"],
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert "patchloom demo" in out.stdout and "images skipped  1" in out.stdout
    assert list(data.glob("demo-*.tar"))
