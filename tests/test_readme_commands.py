"""The README's set-up and main-job commands, run verbatim in a fresh virtual environment."""
import os
import re
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def readme_block(after_heading: str, index: int) -> str:
    """The index-th indented command block of the section that starts with ``after_heading``."""
    section = ROOT.joinpath("README.md").read_text().split(after_heading, 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"((?:\n    \S.*)+)", section)
    return "\n".join(line[4:] for line in blocks[index].strip("\n").splitlines())


@pytest.mark.slow
def test_set_up_and_main_job_work_as_written(tmp_path):
    setup, main_job = readme_block("## Set up and run", 0), readme_block("## Set up and run", 1)
    assert "pip install torch==2.13.0" in setup and main_job == "refops demo"
    script = f"set -e\ncd {tmp_path}\ncp -r {ROOT}/refops {ROOT}/pyproject.toml {ROOT}/README.md .\n" \
             f"{setup}\n{main_job}\n"
    env = {k: v for k, v in os.environ.items() if k != "VIRTUAL_ENV"}
    env["PATH"] = os.pathsep.join(p for p in env["PATH"].split(os.pathsep) if ".venv" not in p)
    run = subprocess.run(["bash", "-c", script], capture_output=True, text=True, timeout=900, env=env)
    assert run.returncode == 0, run.stdout[:4000] + "\n[...]\n" + run.stdout[-2000:] + run.stderr[-2000:]
    assert "The correct layer passed and the slipped one was caught." in run.stdout
    assert (tmp_path / "refops-demo" / "tile_conv_slipped.html").exists()
