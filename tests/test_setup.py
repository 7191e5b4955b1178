"""Package set-up: import with an empty home, quiet pyGIMLi, thread setting, README/CI contract."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_import_with_empty_home(tmp_path):
    # pyGIMLi crashes on first use when the user cache folder's parent is missing
    env = {k: v for k, v in os.environ.items() if not k.startswith("XDG_")}
    env["HOME"] = str(tmp_path / "nobody")  # does not even exist
    env.pop("TBMINV_CACHE_DIR", None)
    code = ("import tbminv, tbminv.gimli as g, tbminv.cache as c; "
            "g.ert.ERTModelling(); print(c.cache_dir('x'))")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                         cwd=tmp_path, timeout=120)
    assert out.returncode == 0, out.stderr
    assert str(tmp_path) in out.stdout


def test_pygimli_log_is_quiet_and_under_python_logging():
    code = ("import logging, tbminv.gimli as g; "
            "print(logging.getLogger('pyGIMLi').level, len(logging.getLogger().handlers))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=120)
    level, handlers = out.stdout.split()
    assert int(level) >= 30 and int(handlers) == 0


def test_thread_setting(monkeypatch):
    from tbminv import gimli

    monkeypatch.setenv("TBMINV_THREADS", "3")
    assert gimli.thread_count() == 3
    monkeypatch.setenv("TBMINV_THREADS", "zero")
    assert gimli.thread_count() == 1
    monkeypatch.delenv("TBMINV_THREADS")
    assert gimli.thread_count() == 1
    assert os.environ["BERT_NUM_THREADS"] == "1"


def test_environment_report_names_pygimli():
    import tbminv

    text = tbminv.environment_report()
    assert "pygimli" in text and "numpy" in text


def _ci_function(name: str) -> str:
    """The shell function ``name`` of .ci/run, as text."""
    text = (ROOT / ".ci" / "run").read_text()
    m = re.search(re.escape(name) + r"\(\) \{.*?^\}$", text, re.S | re.M)
    assert m, f".ci/run has no function {name}"
    return m.group(0)


def test_readme_test_command_is_what_ci_runs():
    readme = (ROOT / "README.md").read_text()
    blocks = re.findall(r"<!-- test-command -->\s*```(?:bash|sh)?\n(.*?)\n```", readme, re.S)
    assert len(blocks) == 1, "README must hold exactly one test-command block"
    script = _ci_function("readme_block") + "\nreadme_block test-command\n"
    out = subprocess.run(["bash", "-c", script], cwd=ROOT, capture_output=True, text=True,
                         timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == blocks[0].strip()


@pytest.mark.parametrize(("command", "expected"), [("exit 0", 0), ("exit 1", 1), ("exit 5", 5)])
def test_ci_step_fails_when_pytest_collects_nothing(command, expected):
    # pytest's exit code 5 means no test ran: CI must not pass it as green
    script = _ci_function("run_pytest_step") + f"\nrun_pytest_step probe {command!r}\necho passed\n"
    out = subprocess.run(["bash", "-c", script], cwd=ROOT, capture_output=True, text=True,
                         timeout=60)
    assert out.returncode == expected
    assert ("passed" in out.stdout) == (expected == 0)


def test_cli_entry_points():
    out = subprocess.run([sys.executable, "-m", "tbminv", "--help"], capture_output=True,
                         text=True, timeout=120)
    assert out.returncode == 0
    for cmd in ("simulate", "check", "invert", "reach", "report", "demo"):
        assert cmd in out.stdout
