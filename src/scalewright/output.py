"""Write a check's results to disk: the JSON (the source of truth) and the
HTML report rendered from the same dict.

Only files that scalewright wrote earlier are ever replaced: an existing
file at a target path that is not a scalewright output is left alone and
the user is asked to choose another folder.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from scalewright.errors import StudyError

#: first bytes that mark a file as written by scalewright
JSON_MARK = '{\n  "tool": {\n    "name": "scalewright"'
HTML_MARK = '<meta name="generator" content="scalewright'


def to_json(report: dict) -> str:
    """The JSON text of a result dict (stable key order, two-space indent)."""
    return json.dumps(report, indent=2, ensure_ascii=False, allow_nan=False,
                      default=_not_serialisable) + "\n"


def _not_serialisable(value):
    raise TypeError(f"scalewright bug: {type(value).__name__} in the result dict")


def check_targets(folder: Path, stem: str) -> None:
    """Refuse early, before any fitting, if the output folder cannot hold the
    report or an output would replace a user's file."""
    check_folder(folder, "--out", "output folder", "report")
    for suffix in ("json", "html"):
        refuse_foreign(folder / f"{stem}.{suffix}")


def check_folder(folder: Path, option: str, role: str, what: str) -> None:
    """Refuse a folder given with ``option`` that is a file, lies below a file,
    or cannot be written into (``role``: the folder in words; ``what``: what
    would be written)."""
    if folder.exists() and not folder.is_dir():
        raise StudyError(f"{folder}: the {role} given with {option} is a file, so the "
                         f"{what} cannot be written into it. Give the path of a folder (it is "
                         "created if needed).")
    existing = next(p for p in (folder.absolute(), *folder.absolute().parents) if p.exists())
    if not existing.is_dir():
        raise StudyError(f"{folder}: the {role} cannot be created because {existing} "
                         f"is a file. Give {option} a path whose parent folders are folders.")
    if not os.access(existing, os.W_OK | os.X_OK):
        raise StudyError(f"{folder}: the {what} cannot be written there, because {existing} "
                         f"is not writable for you. Choose another {role} with {option}.")


def write_outputs(result, folder: Path) -> dict[str, Path]:
    """Write ``<folder>/<stem>.json`` and ``<stem>.html``; return their paths."""
    from scalewright.report.render import render_html

    report = result.to_dict()
    stem = result.study.path.stem
    check_targets(folder, stem)
    texts = {"json": to_json(report), "html": render_html(report)}
    paths = {}
    try:
        folder.mkdir(parents=True, exist_ok=True)
        for suffix, text in texts.items():
            target = folder / f"{stem}.{suffix}"
            target.write_text(text, encoding="utf-8")
            paths[suffix] = target
    except OSError as exc:
        raise StudyError(f"{exc.filename or folder}: the report could not be written "
                         f"({exc.strerror or exc}). Check that the folder is writable and the "
                         "disk is not full, or choose another output folder with --out.") from None
    return paths


def written_by_scalewright(path: Path) -> bool:
    """Whether ``path`` is a file scalewright wrote: a report's JSON, HTML or PDF."""
    if path.suffix == ".pdf":
        from scalewright.report.pdf import printed_by_scalewright
        return printed_by_scalewright(path)
    mark = {".json": JSON_MARK, ".html": HTML_MARK}.get(path.suffix)
    if mark is None or not path.is_file():
        return False
    with open(path, encoding="utf-8", errors="replace") as fh:
        return mark in fh.read(4096)


def refuse_foreign(target: Path) -> None:
    """Raise StudyError if ``target`` exists and was not written by scalewright."""
    if target.exists() and not written_by_scalewright(target):
        raise StudyError(
            f"{target}: this file already exists and was not written by scalewright, so it "
            "will not be overwritten. Choose another output folder with --out, or move the "
            "file away.")
