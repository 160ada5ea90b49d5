"""A rules folder read into memory, and the digests that key a regrade's judgements.

:class:`Rules` holds every rule file (``*.toml``) and import profile (``profiles/*.toml``)
of a rules folder, checked as loading the folder for a station checks it, with one digest
over all of them. A regrade scatters it to every worker once per run
(:mod:`pipeline.regrade.grid`), and each worker process parses it once per digest
(:mod:`pipeline.regrade.tasks`). ``setting_digest`` covers what else decides a result
document: the name the file is judged under, its import profile, the size limits and the
formgate version. With the input's SHA-256, the two digests key a judgement in
:mod:`pipeline.regrade.cache`.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path, PurePath
from typing import TYPE_CHECKING

from pipeline import __version__
from pipeline.errors import ProfileError, RulesError
from pipeline.model import AccuracyClass, SourceRef
from pipeline.read.limits import TextLimits

if TYPE_CHECKING:
    from pipeline.rulebook.book import RuleBook


@dataclass(frozen=True, slots=True)
class Rules:
    """A rules folder read into memory: ``files`` holds (name, text) of every rule file
    (``*.toml``) and import profile (``profiles/*.toml``), sorted by name; ``digest`` is the
    SHA-256 over the names and texts. ``folder`` is the folder's name as given, for messages.

    A judgement depends on the whole bundle (the rule book picks a rule set by cell type,
    a profile reads the file), so the digest covers all of it: an edit to any file is a
    new regrade key.
    """

    folder: str
    files: tuple[tuple[str, str], ...]
    digest: str

    @classmethod
    def read(cls, folder: str | os.PathLike[str]) -> Rules:
        """Read and check a rules folder. Raises RulesError or ProfileError for a file that is
        not valid (the first problem, located), as loading the folder for a station would."""
        root = Path(folder)
        if not root.is_dir():
            raise RulesError(
                "rule folder not found",
                SourceRef(str(root)),
                hint="Create it, or give the folder that holds the rule files.",
            )
        paths = sorted(p for p in root.glob("*.toml") if p.is_file())
        paths += sorted(p for p in root.glob("profiles/*.toml") if p.is_file())
        texts = {}
        for path in paths:
            relative = path.relative_to(root).as_posix()
            texts[relative] = _utf8(path, relative)
        return cls.from_texts(texts, folder=str(root))

    @classmethod
    def from_texts(cls, texts: Mapping[str, str], *, folder: str = "rules") -> Rules:
        """A bundle of texts already in hand (for instance the rule files a ledger keeps):
        rule files by bare file name, import profiles as ``profiles/<name>``. Checked as
        :meth:`read` checks a folder."""
        for name in texts:
            parts = PurePath(name).parts
            if not name.endswith(".toml") or not (
                len(parts) == 1 or (len(parts) == 2 and parts[0] == "profiles")
            ):
                raise ValueError(f"{name}: a rules bundle holds *.toml and profiles/*.toml only")
        files = tuple(sorted(texts.items()))
        digest = hashlib.sha256()
        for name, text in files:
            for part in (name.encode("utf-8"), text.encode("utf-8")):
                digest.update(len(part).to_bytes(8, "big"))
                digest.update(part)
        bundle = cls(folder, files, digest.hexdigest())
        if not bundle.rule_files:
            raise RulesError(
                "no rule files (*.toml) in this folder",
                SourceRef(folder),
                hint="Add at least one rule file; docs/rules.md describes them.",
            )
        bundle.rulebook()  # raises the first problem
        from pipeline.read.profile import load_profile

        for name, text in bundle.profile_files.items():
            load_profile(text, bundle.source(name))
        return bundle

    @property
    def rule_files(self) -> dict[str, str]:
        """The rule files, name -> text, in name order."""
        return {name: text for name, text in self.files if "/" not in name}

    @property
    def profile_files(self) -> dict[str, str]:
        """The import profiles, ``profiles/<name>`` -> text."""
        return {name: text for name, text in self.files if name.startswith("profiles/")}

    def source(self, name: str) -> str:
        """How a file of the bundle is named in messages: as loading the folder names it."""
        return str(PurePath(self.folder) / name)

    def rulebook(self) -> RuleBook:
        """Parse the rule files into a RuleBook, as ``load_rules_dir`` loads the folder."""
        from pipeline.rulebook.book import RuleBook, load_rule_set

        return RuleBook(
            tuple(load_rule_set(text, self.source(name)) for name, text in self.rule_files.items())
        )

    def profile_text(self, profile_name: str) -> str | None:
        """The text of the bundle's import profile of that file name, or None."""
        return dict(self.files).get(f"profiles/{PurePath(profile_name).name}")


def _utf8(path: Path, relative: str) -> str:
    data = path.read_bytes()
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        column = exc.start - data.rfind(b"\n", 0, exc.start)  # in bytes, 1-based
        kind = ProfileError if relative.startswith("profiles/") else RulesError
        raise kind(
            "not UTF-8 text", SourceRef(str(path), line, column), "Save the file with UTF-8 encoding."
        ) from None


def setting_digest(
    name: str,
    profile_name: str | None,
    profile_text: str | None,
    max_uncompressed_bytes: int,
    limits: TextLimits | None,
    accuracy: AccuracyClass | None = None,
) -> str:
    """SHA-256 of what decides a result besides the bytes and the rules: the name the file is
    judged under, its import profile, the size limits, the channel's accuracy class and the
    formgate version."""
    parts = [
        name,
        profile_name or "",
        profile_text if profile_text is not None else "\0none",
        str(max_uncompressed_bytes),
        repr(limits),
        __version__,
        *([] if accuracy is None else [repr(accuracy)]),
    ]
    digest = hashlib.sha256()
    for part in parts:
        data = part.encode("utf-8")
        digest.update(len(data).to_bytes(8, "big"))
        digest.update(data)
    return digest.hexdigest()
