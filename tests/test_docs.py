"""The command reference (docs/cli.md) against the command line itself, so neither drifts.

docs/cli.md has one section per command, headed ``## `gapband NAME ARGS...` ``,
and shared sections headed ``## Options for ... (`cmd`, `cmd`)`` whose heading
names the commands that take them. Every option is a table row whose first
cell names it (``| `--opt VALUE` |``); that row gives its choices and default.
"""

from __future__ import annotations

import re
from pathlib import Path

import click
import pytest

from gapband.cli import cli

DOCS = Path(__file__).resolve().parents[1] / "docs"
CLI_MD = DOCS / "cli.md"
ROW_OPTION = re.compile(r"`(--[a-z][a-z0-9-]*)")
LINK = re.compile(r"\]\(([^)#\s]+)(?:#[^)]*)?\)")


def commands(group: click.Group, prefix: str = "") -> dict[str, click.Command]:
    """Every command under ``group`` by its full name, walking nested groups."""
    found = {}
    for name, command in group.commands.items():
        full = f"{prefix}{name}"
        if isinstance(command, click.Group):
            found |= commands(command, prefix=f"{full} ")
        else:
            found[full] = command
    return found


def sections() -> dict[str, str]:
    """docs/cli.md split at its ``## `` headings: heading -> body."""
    parts = re.split(r"^## ", CLI_MD.read_text(encoding="utf-8"), flags=re.MULTILINE)[1:]
    return {part.split("\n", 1)[0]: part.split("\n", 1)[1] for part in parts}


def rows(body: str) -> dict[str, str]:
    """Option name -> its table row, for rows whose first cell names options."""
    found = {}
    for line in body.splitlines():
        if line.startswith("| `--"):
            first_cell = line.split(" | ")[0]
            for option in ROW_OPTION.findall(first_cell):
                found[option] = line
    return found


def documented(name: str) -> dict[str, str]:
    """The rows documenting command ``name``: its own section and the shared ones naming it."""
    found: dict[str, str] = {}
    own = [h for h in sections() if h.startswith(f"`gapband {name}`")
           or h.startswith(f"`gapband {name} ")]
    assert len(own) == 1, f"docs/cli.md needs one section headed `gapband {name} ...`"
    for heading, body in sections().items():
        shared = heading.startswith("Options for") and f"`{name}`" in heading
        if heading in own or shared:
            overlap = set(found) & set(rows(body))
            assert not overlap, f"{name}: {sorted(overlap)} documented twice"
            found |= rows(body)
    return found


def options(command: click.Command) -> dict[str, click.Option]:
    """Long option name -> Option, without the --help every command has."""
    return {opt: param for param in command.params if isinstance(param, click.Option)
            for opt in param.opts if opt.startswith("--") and opt != "--help"}


ALL = commands(cli)


def test_the_cli_has_the_commands_the_docs_describe():
    headed = {h.split("`")[1].removeprefix("gapband ").split(" ")[0]
              for h in sections() if h.startswith("`gapband ")}
    assert headed == set(ALL)


@pytest.mark.parametrize("name", sorted(ALL))
def test_every_option_is_documented_and_nothing_else(name):
    in_cli, in_docs = set(options(ALL[name])), set(documented(name))
    assert in_cli - in_docs == set(), f"gapband {name}: options missing from docs/cli.md"
    assert in_docs - in_cli == set(), f"gapband {name}: docs/cli.md lists options it lacks"


@pytest.mark.parametrize("name", sorted(ALL))
def test_choices_and_defaults_match(name):
    rows_of = documented(name)
    for opt, param in options(ALL[name]).items():
        assert opt in rows_of, f"gapband {name}: {opt} has no row in docs/cli.md"
        row = rows_of[opt]
        if isinstance(param.type, click.Choice):
            for choice in param.type.choices:
                assert f"{choice}" in row, f"{opt}: choice {choice!r} not in {row!r}"
        if param.show_default and not param.is_flag and param.default not in (None, ()):
            default = param.default
            text = f"{default:g}" if isinstance(default, float) else str(default)
            assert f"default {text}" in row or f"default `{text}`" in row, \
                f"{opt}: default {text!r} not in {row!r}"


@pytest.mark.parametrize("name", sorted(ALL))
def test_arguments_appear_in_the_heading(name):
    heading = next(h for h in sections() if h.startswith(f"`gapband {name}"))
    for param in ALL[name].params:
        if isinstance(param, click.Argument):
            assert (param.metavar or param.name.upper()) in heading


def test_group_options_are_documented():
    text = CLI_MD.read_text(encoding="utf-8")
    for param in cli.params:
        for opt in param.opts:
            assert re.search(rf"(?<![\w-]){re.escape(opt)}(?![\w-])", text), opt


def test_every_guide_page_is_linked_and_every_link_resolves():
    pages = {p.name for p in DOCS.glob("*.md")} - {"README.md"}
    index = (DOCS / "README.md").read_text(encoding="utf-8")
    linked = set(LINK.findall(index))
    assert pages - linked == set(), "pages missing from docs/README.md"
    for page in [*DOCS.glob("*.md"), DOCS.parent / "README.md"]:
        for target in LINK.findall(page.read_text(encoding="utf-8")):
            if "://" not in target:
                assert (page.parent / target).exists(), f"{page.name} links to {target}"
