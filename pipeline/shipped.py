"""Where the shipped certificate templates and rule sets are.

In a source checkout (and an editable install) they are the folders ``templates/`` and
``rules/`` beside the package; a wheel carries the same files inside the package
(``pipeline/templates``, ``pipeline/rules``: see pyproject.toml). The checkout wins when
both exist.
"""

from __future__ import annotations

from pathlib import Path

_PACKAGE = Path(__file__).resolve().parent


def _find(name: str) -> Path:
    for candidate in (_PACKAGE.parent / name, _PACKAGE / name):
        if candidate.is_dir():
            return candidate
    return _PACKAGE.parent / name  # missing: messages name where a checkout keeps it


TEMPLATES_DIR = _find("templates")
RULES_DIR = _find("rules")
