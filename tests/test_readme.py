"""The README's two commands stay true: CI runs the README's own test command."""

import re

from conftest import REPO


def _readme_commands():
    text = (REPO / "README.md").read_text()
    return re.findall(r"```bash\n(python3 -m venv[^\n]*)\n```", text)


def test_ci_runs_the_readme_test_command():
    commands = _readme_commands()
    assert len(commands) == 2, commands
    ci = (REPO / ".ci" / "run").read_text()
    match = re.search(r'^TEST_COMMAND="(.*)"$', ci, flags=re.M)
    assert match and match.group(1) == commands[1]


def test_first_command_runs_the_demo_on_a_shipped_system():
    first = _readme_commands()[0]
    assert first.endswith("hopwell demo")
    cli = (REPO / "src" / "hopwell" / "cli.py").read_text()
    shipped = re.findall(r'_systems_dir\(\) / "([^"]+)"', cli)
    assert shipped and all((REPO / "systems" / name).is_file() for name in shipped)
