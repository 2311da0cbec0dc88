"""The command line: exit codes and one-paragraph errors (the documented contract in README.md)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

from typer.testing import CliRunner

from corpusprep.cli import EXIT_FAILED, EXIT_OK, EXIT_USAGE, app

ROOT = Path(__file__).parent.parent
runner = CliRunner()


def test_check_accepts_the_demo() -> None:
    result = runner.invoke(app, ["check", str(ROOT / "pipelines" / "demo.toml")])
    assert result.exit_code == EXIT_OK, result.output
    assert "valid" in result.output


def test_check_names_file_line_and_key(tmp_path: Path) -> None:
    path = tmp_path / "bad.toml"
    path.write_text('input = "raw"\n[near]\nthreshold = 1.3\n', encoding="utf-8")
    result = runner.invoke(app, ["check", str(path)])
    assert result.exit_code == EXIT_USAGE
    assert f"{path}:3: near.threshold = 1.3" in result.stderr
    assert "Traceback" not in result.stderr


def test_run_without_input_folder_fails_clearly(tmp_path: Path) -> None:
    path = tmp_path / "job.toml"
    path.write_text('input = "missing"\noutput = "out"\n', encoding="utf-8")
    result = runner.invoke(app, ["run", str(path), "--quiet"])
    assert result.exit_code == EXIT_FAILED
    assert "missing" in result.stderr and "does not exist" in result.stderr


def test_run_refuses_non_empty_output(tmp_path: Path) -> None:
    (tmp_path / "raw").mkdir()
    (tmp_path / "raw" / "a.txt").write_text("the morning boat leaves at six\n", encoding="utf-8")
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "old.txt").write_text("x", encoding="utf-8")
    path = tmp_path / "job.toml"
    path.write_text('input = "raw"\noutput = "out"\n', encoding="utf-8")
    result = runner.invoke(app, ["run", str(path), "--quiet", "--workers", "1"])
    assert result.exit_code == EXIT_FAILED
    assert "--force" in result.stderr


def test_unknown_option_is_a_usage_error() -> None:
    result = runner.invoke(app, ["run", "x.toml", "--wrokers", "2"])
    assert result.exit_code == EXIT_USAGE


def test_inspect_needs_a_manifest(tmp_path: Path) -> None:
    result = runner.invoke(app, ["inspect", str(tmp_path)])
    assert result.exit_code == EXIT_USAGE
    assert "no manifest.json" in result.stderr


def test_module_entry_point_and_help_are_cheap() -> None:
    # `--help` must not import the heavy stage modules (ftfy, datasets, tokenizers).
    code = (
        "import sys; from corpusprep.cli import app\n"
        "heavy = [m for m in ('ftfy', 'datasets', 'tokenizers', 'pyarrow') if m in sys.modules]\n"
        "print(','.join(heavy))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
    help_run = subprocess.run([sys.executable, "-m", "corpusprep", "--help"], capture_output=True, text=True)
    assert help_run.returncode == 0 and "run" in help_run.stdout
