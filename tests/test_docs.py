"""Docs stay true: every command has help text and appears in README.md; README starts right."""

from __future__ import annotations

import re
from pathlib import Path

import typer

from tubetrack.cli import app

REPO_ROOT = Path(__file__).resolve().parents[1]


def _commands(group, prefix: str = "") -> list:
    out = []
    for name, cmd in sorted(group.commands.items()):
        full = f"{prefix}{name}"
        out.append((full, cmd))
        if hasattr(cmd, "commands"):
            out.extend(_commands(cmd, full + " "))
    return out


def test_every_command_has_help_and_is_in_readme():
    readme = (REPO_ROOT / "README.md").read_text(encoding="utf-8")
    root = typer.main.get_command(app)
    assert hasattr(root, "commands")
    missing_help, missing_readme = [], []
    for name, cmd in _commands(root):
        if not (cmd.help or "").strip():
            missing_help.append(name)
        if f"tubetrack {name}" not in readme:
            missing_readme.append(name)
    assert not missing_help, f"commands without help: {missing_help}"
    assert not missing_readme, f"commands not in README.md: {missing_readme}"


def test_every_option_has_help():
    root = typer.main.get_command(app)
    bare = [
        f"{name} {p.name}"
        for name, cmd in _commands(root)
        for p in cmd.params
        if getattr(p, "param_type_name", "") == "option" and not (p.help or "").strip()
    ]
    assert not bare, f"options without help: {bare}"


def test_readme_starts_with_the_job_then_the_two_commands():
    text = (REPO_ROOT / "README.md").read_text(encoding="utf-8")
    first_block = re.search(r"```sh\n(.*?)```", text, re.S)
    assert first_block, "README has no shell block"
    lines = [ln.split("#")[0].strip() for ln in first_block.group(1).splitlines() if ln.strip()]
    assert lines[:2] == ["make demo", "make test"]
    # the job paragraph comes before the commands
    assert text.index("make demo") > text.index("X-ray tube")


def test_readme_carries_the_safety_caution():
    text = (REPO_ROOT / "README.md").read_text(encoding="utf-8")
    assert "qualified personnel" in text and "Never postpone a repair" in text
