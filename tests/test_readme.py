"""The README's two set-up commands, and CI running the README's test command verbatim."""

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _commands():
    text = (ROOT / "README.md").read_text()
    setup = text.split("## Set-up", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```bash\n(.+?)\n```", setup, flags=re.S)


def test_readme_has_exactly_two_setup_commands():
    cmds = _commands()
    assert len(cmds) == 2
    assert all("\n" not in c for c in cmds)
    assert cmds[0].startswith("pip install torch==2.13.0") and "hiddenlens demo" in cmds[0]
    assert cmds[1].startswith("pip install torch==2.13.0") and "pytest" in cmds[1]


def test_ci_runs_the_readme_test_command():
    assert _commands()[1] in (ROOT / ".ci" / "run").read_text()


def test_readme_opens_with_the_job():
    first = (ROOT / "README.md").read_text().split("\n\n")[1]
    assert "recurrent" in first and "hiddenlens" in first
