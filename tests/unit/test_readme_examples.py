"""The README's examples and the shipped configs are valid as written.

Every TOML block of README.md and every file in ``configs/`` goes through the real validator
(no data files are needed: validation does not open them); every Python block compiles, its
imports resolve and the ``api.NAME`` calls it shows exist. Reference: common practice —
documentation examples are tested like code.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

from corrpipe import api
from corrpipe.config import load_mock_config, parse_config

ROOT = Path(__file__).resolve().parents[2]
README = ROOT / "README.md"
CONFIGS = sorted((ROOT / "configs").glob("*.toml"))
REFERENCE_HEADING = "## Config reference"


def _blocks(language: str) -> list[tuple[int, str]]:
    text = README.read_text(encoding="utf-8")
    reference_at = text.find(REFERENCE_HEADING)
    out = []
    for m in re.finditer(rf"^```{language}\n(.*?)^```", text, flags=re.S | re.M):
        if reference_at >= 0 and m.start() > reference_at:
            continue  # the generated settings reference: checked by test_config
        out.append((text.count("\n", 0, m.start()) + 1, m.group(1)))
    return out


def test_readme_has_examples():
    # guards the extraction itself: the README shows configs and Python calls
    assert len(_blocks("toml")) >= 5 and len(_blocks("python")) >= 2


@pytest.mark.parametrize("line,text", _blocks("toml"), ids=lambda v: str(v)[:12])
def test_readme_toml_block_validates(line, text, tmp_path):
    source = tmp_path / f"readme_line_{line}.toml"
    if "[mock]" in text:
        source.write_text(text)
        load_mock_config(source)
    else:
        if not re.search(r"^\[catalogue\]", text, flags=re.M):
            # a fragment showing one table: complete it with the one required key
            text = text + '\n[catalogue]\npath = "galaxies.fits"\n'
        parse_config(text, source=source)


@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.name)
def test_shipped_config_validates(path):
    text = path.read_text(encoding="utf-8")
    if "[mock]" in text:
        load_mock_config(path)
    else:
        parse_config(text, source=path)


@pytest.mark.parametrize("line,text", _blocks("python"), ids=lambda v: str(v)[:12])
def test_readme_python_block_compiles_and_its_names_exist(line, text):
    tree = ast.parse(text, filename=f"README.md:{line}")
    compile(tree, f"README.md:{line}", "exec")
    namespace: dict = {}
    for node in tree.body:
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            exec(compile(ast.Module(body=[node], type_ignores=[]), "README", "exec"), namespace)
    for node in ast.walk(tree):
        if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name)
                and node.value.id == "api"):
            assert hasattr(api, node.attr), f"README.md:{line}: api.{node.attr} does not exist"
