"""The status line of the command line: what the long stages are doing, on a
terminal only, erased before the results or an error message.

The study is Holzinger & Swineford (1939) as semopy ships it, with a
one-construct rival whose refinement path takes several steps.
"""

from __future__ import annotations

import io
import logging

import pytest

import holzinger as hz
import scalewright
from test_reported_numbers import STUDY as STUDY_TEMPLATE
from scalewright import cli, progress

#: the three-construct model and a one-construct rival, by normal-theory ML
STUDY = STUDY_TEMPLATE.format(method="normal")


class Terminal(io.StringIO):
    """An error stream that says it is a terminal."""

    def isatty(self) -> bool:
        return True


@pytest.fixture()
def study(tmp_path):
    hz.data().to_csv(tmp_path / "hs.csv", index=False)
    path = tmp_path / "hs.yaml"
    path.write_text(STUDY, encoding="utf-8")
    return path


def test_the_check_says_each_long_stage_in_order(study, caplog):
    with caplog.at_level(logging.INFO, logger="scalewright.progress"):
        scalewright.check(study)
    said = [r.getMessage() for r in caplog.records if r.name == "scalewright.progress"]
    assert said[:3] == ["reading 'hs.csv'", "screening 9 items in 301 rows",
                        "model 'three' (1 of 2): fitting"]
    assert "model 'three': omega of 'visual' without each of its 3 items" in said
    steps = [s for s in said if s.startswith("model 'one': refinement path, step")]
    assert len(steps) >= 2 and steps[0].startswith(
        "model 'one': refinement path, step 1: refitting without each of ")
    assert said.index("model 'one' (2 of 2): fitting") > said.index(
        "model 'three': omega of 'speed' without each of its 3 items")


def test_a_terminal_gets_a_status_line_that_is_erased_before_the_results(
        study, tmp_path, monkeypatch, capsys):
    terminal = Terminal()
    monkeypatch.setattr("sys.stderr", terminal)
    assert cli.main(["check", str(study), "--out", str(tmp_path / "out")]) == 0
    shown = terminal.getvalue()
    assert shown.startswith("\r\x1b[K… reading 'hs.csv'")
    assert "\r\x1b[K… model 'one' (2 of 2): fitting" in shown
    assert shown.endswith("\r\x1b[K")                 # erased, nothing else left on it
    assert "\n" not in shown                          # one line, rewritten
    assert capsys.readouterr().out.startswith("Holzinger and Swineford (1939): 301 of 301")
    assert not any(isinstance(h, progress.StatusLine) for h in progress.LOGGER.handlers)


def test_an_error_on_a_terminal_erases_the_status_line_first(study, monkeypatch):
    study.write_text(STUDY.replace("x9]\n  one", "x99]\n  one"), encoding="utf-8")
    terminal = Terminal()
    monkeypatch.setattr("sys.stderr", terminal)
    assert cli.main(["check", str(study)]) == 2
    shown = terminal.getvalue()
    status, message = shown.rsplit("\r\x1b[K", 1)
    assert status.startswith("\r\x1b[K… reading 'hs.csv'")
    assert "'x99'" in message and message.endswith("\n")


def test_without_a_terminal_nothing_but_results_is_printed(study, tmp_path, capsys):
    assert cli.main(["check", str(study), "--out", str(tmp_path / "out")]) == 0
    printed = capsys.readouterr()
    assert printed.err == ""
    assert "\x1b" not in printed.out
