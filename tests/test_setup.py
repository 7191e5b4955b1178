"""Package set-up: import with an empty home, quiet pyGIMLi, thread setting, README/CI contract."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

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


def test_readme_test_command_is_what_ci_runs():
    readme = (ROOT / "README.md").read_text()
    blocks = re.findall(r"<!-- test-command -->\s*```(?:bash|sh)?\n(.*?)\n```", readme, re.S)
    assert len(blocks) == 1, "README must hold exactly one test-command block"
    ci = (ROOT / ".ci" / "run").read_text()
    # .ci/run extracts the block from README and runs it verbatim
    assert "test-command" in ci and "readme_block" in ci


def test_cli_entry_points():
    out = subprocess.run([sys.executable, "-m", "tbminv", "--help"], capture_output=True,
                         text=True, timeout=120)
    assert out.returncode == 0
    for cmd in ("simulate", "check", "invert", "reach", "report", "demo"):
        assert cmd in out.stdout
