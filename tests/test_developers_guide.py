"""DEVELOPERS.md stays true: every path it names exists and every command it shows parses."""

from __future__ import annotations

import re
import shlex
from pathlib import Path

import pytest

from inventory.cli import build_parser

REPO = Path(__file__).resolve().parent.parent
GUIDE = (REPO / "DEVELOPERS.md").read_text(encoding="utf-8")

# paths as the guide writes them: repo-relative, or relative to inventory/ inside the diagram
_PATH = re.compile(r"(?<![\w<>*])((?:\.ci/|[\w-]+/)*[\w.-]+\.(?:py|json|md|toml)|(?:inventory|tests|schemas|pipelines|bench|sample_site|\.ci)/[\w./-]*)")
_OUTPUTS = {"closes/", "ledger.sqlite"}  # written by the tool, not part of the repository


def _named_paths() -> list[str]:
    found = set()
    for match in _PATH.finditer(GUIDE):
        text = match.group(1).rstrip(".,")
        before, after = GUIDE[match.start() - 1], GUIDE[match.end():match.end() + 1]
        if before in ".>" or after == "*":  # part of a pattern such as <name>.table.json or test_*.py
            continue
        if "<" in text or text in _OUTPUTS:
            continue
        found.add(text)
    return sorted(found)


@pytest.mark.parametrize("name", _named_paths())
def test_every_named_path_exists(name):
    # repo-relative; inside the diagram relative to inventory/; site files as in the sample site
    candidates = [REPO / name, REPO / "inventory" / name, REPO / "sample_site" / name]
    assert any(p.exists() for p in candidates), f"DEVELOPERS.md names {name}, which does not exist"


def test_the_guide_names_the_main_modules():
    names = _named_paths()
    for layer in ("inventory/model/", "inventory/io/", "inventory/site/", "inventory/survey/", "inventory/volume/",
                  "inventory/stock/", "inventory/ledger/", "inventory/export/", "inventory/close.py", "inventory/cli.py"):
        assert any(n.startswith(layer) for n in names), f"the guide never names {layer}"


def _shown_commands() -> list[list[str]]:
    cmds = []
    for block in re.findall(r"```sh\n(.*?)```", GUIDE, flags=re.S):
        for line in block.splitlines():
            line = line.split("#")[0].strip()
            if line.startswith((".venv/bin/inventory", "inventory ")):
                cmds.append(shlex.split(line)[1:])
    return cmds


def test_shown_commands_parse():
    cmds = _shown_commands()
    assert cmds, "the guide shows no inventory command"
    parser = build_parser()
    for argv in cmds:
        parser.parse_args(argv)  # raises SystemExit on a bad command line
        with pytest.raises(SystemExit) as info:
            parser.parse_args([argv[0], "--help"])
        assert info.value.code == 0
