"""README.md, DEVELOPERS.md and CI say what the code does: the README documents every
command and option of the command line (read from the typer application itself) and
every key of a cluster profile; CI runs the README's test command verbatim; DEVELOPERS.md's
layout lists every module of the package, and only those.  (The scenario format and the
result file are checked against the project's reference by ``test_reference.py``.)
"""

from __future__ import annotations

import re

import typer.main

from ensemble.cli import app
from ensemble.run.clusters import _KEYS as PROFILE_KEYS   # the keys the profile loader accepts
from support import REPO, markdown_tables, ticked

README = (REPO / "README.md").read_text(encoding="utf-8")
DEVELOPERS = (REPO / "DEVELOPERS.md").read_text(encoding="utf-8")


def fenced_after(text: str, marker: str) -> str:
    """The first line of the first fenced code block after ``marker`` in ``text``."""
    found = re.search(re.escape(marker) + r".*?```\w*\n(.*?)\n", text, re.DOTALL)
    assert found, f"no code block after {marker!r}"
    return found.group(1)


def test_ci_runs_the_readme_test_command_verbatim() -> None:
    command = fenced_after(README, "Set up and run the tests:")
    assert "pytest" in command
    ci = (REPO / ".ci" / "run").read_text(encoding="utf-8").splitlines()
    assert command in ci
    assert ci[-1] == command, "the test command's exit status must be CI's"
    assert not any("||" in line for line in ci if "slurm_testbed" in line), (
        "CI must fail when the SLURM test bed does not start")


def documented_options() -> dict[str, set[str]]:
    """Command name -> the options the README's table for that command lists."""
    tables = markdown_tables(README)
    commands = {}
    for heading in re.findall(r"^### `(ensemble [^`]+)`", README, re.MULTILINE):
        commands[heading.split()[1]] = {
            token.split()[0] for row in tables.rows(heading, "option")
            for token in ticked(row[0]) if token.startswith("-")}
    return commands


def test_readme_documents_every_command_and_option() -> None:
    group = typer.main.get_command(app)
    documented = documented_options()
    assert set(documented) == set(group.commands), "README's commands"
    for name, command in group.commands.items():
        options = {flag for parameter in command.params if parameter.param_type_name == "option"
                   for flag in parameter.opts}
        assert documented[name] == options, f"README's options of ensemble {name}"


def test_readme_documents_every_key_of_a_cluster_profile() -> None:
    section = README[README.index("<!-- cluster-section:start -->"):
                     README.index("<!-- cluster-section:end -->")]
    for key in PROFILE_KEYS:
        assert re.search(rf"`{key}`|\b{key} = ", section), (
            f"README's cluster section lacks the profile key {key}")


def layout_modules() -> set[str]:
    """The files of ``ensemble/`` that DEVELOPERS.md's layout lists (paths relative to
    the package), from the indentation of its tree."""
    block = re.search(r"## Layout.*?```\n(.*?)```", DEVELOPERS, re.DOTALL).group(1)
    listed, parents = set(), []
    for line in block.splitlines():
        name = line.strip().split(" ")[0]
        depth = (len(line) - len(line.lstrip())) // 2
        if not (name.endswith("/") or name.endswith((".py", ".md"))):
            continue                      # a wrapped description
        parents = parents[:depth]
        if name.endswith("/"):
            parents.append(name.rstrip("/"))
        elif parents and parents[0] == "ensemble":
            listed.add("/".join([*parents[1:], name]))
    return listed


def test_developers_layout_lists_every_module() -> None:
    package = REPO / "ensemble"
    modules = {str(path.relative_to(package)) for pattern in ("*.py", "*.md")
               for path in package.rglob(pattern)
               if path.name not in ("__init__.py", "__main__.py")}
    listed = layout_modules()
    assert modules - listed == set(), "modules missing from DEVELOPERS.md's layout"
    assert listed - modules == set(), "DEVELOPERS.md's layout lists modules that do not exist"


def test_every_test_the_readme_names_exists() -> None:
    """The README's promises name the tests that prove them: each named file exists and
    each named test is defined in it."""
    named = re.findall(r"`(tests/test_\w+\.py)(?:::(\w+))?`", README)
    assert len(named) >= 10, "the README names the tests behind its promises"
    for file, test in named:
        path = REPO / file
        assert path.is_file(), f"README names {file}, which does not exist"
        if test:
            assert re.search(rf"^def {test}\(", path.read_text(encoding="utf-8"), re.M), (
                f"README names {file}::{test}, which is not defined there")
