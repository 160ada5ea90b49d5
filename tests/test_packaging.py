"""A wheel carries the shipped templates and rule sets (pyproject.toml), found by pipeline.shipped."""

from __future__ import annotations

import fnmatch
import tomllib
from pathlib import Path

import pytest

from pipeline import shipped

REPO = Path(__file__).resolve().parent.parent


def test_every_shipped_template_and_rule_file_is_in_the_wheels_package_data() -> None:
    tool = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]
    covered: set[Path] = set()
    for package, patterns in tool["package-data"].items():
        assert package in tool["packages"], package
        top = ".".join(package.split(".")[:2])  # pipeline.templates.fonts -> pipeline.templates
        folder = REPO / tool["package-dir"][top] / Path(*package.split(".")[2:])
        for path in folder.iterdir():
            if path.is_file() and any(fnmatch.fnmatch(path.name, p) for p in patterns):
                covered.add(path)
    shipped_files = {
        p for top in ("templates", "rules") for p in (REPO / top).rglob("*")
        if p.is_file() and p.suffix != ".py" and "__pycache__" not in p.parts
    }
    assert shipped_files <= covered, sorted(str(p.relative_to(REPO)) for p in shipped_files - covered)


def test_every_python_package_of_the_checkout_is_in_the_wheel() -> None:
    packages = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))["tool"][
        "setuptools"]["packages"]
    found = {
        ".".join(init.parent.relative_to(REPO).parts) for init in (REPO / "pipeline").rglob("__init__.py")
    }
    assert sorted(found - set(packages)) == []


def test_a_checkout_uses_its_own_folders() -> None:
    assert shipped.TEMPLATES_DIR == REPO / "templates"
    assert shipped.RULES_DIR == REPO / "rules"


def test_an_installed_package_uses_the_folders_inside_it(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    package = tmp_path / "site-packages" / "pipeline"
    (package / "templates").mkdir(parents=True)
    monkeypatch.setattr(shipped, "_PACKAGE", package)
    assert shipped._find("templates") == package / "templates"
