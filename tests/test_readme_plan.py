"""The README's plan examples run exactly as written (issue 18): each line of the block after
``<!-- plan-examples -->`` is run by bash from a scratch copy of the repository's layout, with
``ocrbench`` on PATH being this checkout's command."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def readme_plan_commands() -> list[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    block = re.search(r"<!-- plan-examples -->\s*```bash\n(.*?)```", text, re.S)
    assert block, "README.md has no plan-examples block"
    return [ln for ln in block.group(1).splitlines() if ln.strip() and not ln.startswith("#")]


def test_readme_names_every_plan_option_it_uses():
    from typer.testing import CliRunner

    from ocrbench.cli.app import app

    helps = {}
    for cmd in readme_plan_commands():
        words = cmd.split()
        if words[0] != "ocrbench":
            continue
        sub = words[1]
        if sub not in helps:
            helps[sub] = CliRunner().invoke(app, [sub, "--help"], env={"COLUMNS": "250"}).output
        for w in words:
            if w.startswith("--"):
                assert w in helps[sub], f"README uses {w} which `ocrbench {sub} --help` does not list"


@pytest.mark.slow
def test_readme_plan_examples_run_as_written(tmp_path):
    for name in ("scans_demo", "models"):
        (tmp_path / name).symlink_to(ROOT / name)
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    shim = bin_dir / "ocrbench"
    shim.write_text(f'#!/bin/sh\nexec "{sys.executable}" -m ocrbench "$@"\n', encoding="utf-8")
    shim.chmod(0o755)
    env = os.environ | {"PATH": f"{bin_dir}{os.pathsep}{os.environ.get('PATH', '')}",
                        "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""), "COLUMNS": "200"}
    outputs = []
    for cmd in readme_plan_commands():
        done = subprocess.run(["bash", "-e", "-c", cmd], cwd=tmp_path, env=env, capture_output=True, text=True,
                              timeout=900)
        assert done.returncode == 0, f"{cmd}\n{done.stdout[-3000:]}\n{done.stderr[-3000:]}"
        outputs.append(done.stdout)
    plans = [o for c, o in zip(readme_plan_commands(), outputs) if c.startswith("ocrbench plan")]
    assert plans and all("GBP" in o and "Archive plan" in o for o in plans)
