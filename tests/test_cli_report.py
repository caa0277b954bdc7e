"""``ergodex report NAME[@V]``: the report rebuilt from what the registry stored."""

from __future__ import annotations

import re

import pytest

from ergodex.cli import main
from ergodex.registry import Registry
from report_support import loop_check


@pytest.fixture(scope="module")
def registered(tmp_path_factory):
    """A registry holding the true convection-loop model with its real check and evidence."""
    result, surrogate = loop_check(28.0)
    home = tmp_path_factory.mktemp("home")
    evidence = tmp_path_factory.mktemp("evidence") / "evidence.npz"
    result.evidence.to_npz(evidence)
    registry = Registry(home)
    info = registry.register("loop", surrogate, scorecard=result.scorecard, evidence_path=evidence,
                             fit_settings={"method": "true equations"}, note="<demo> & check")
    return home, info, result


@pytest.fixture(scope="module")
def without_evidence(registered):
    """A second version of the same model whose scorecard was stored without evidence arrays."""
    home, _, result = registered
    _, surrogate = loop_check(28.0)
    return Registry(home).register("loop", surrogate, scorecard=result.scorecard)


def test_report_command_writes_the_page_from_the_registry(registered, tmp_path, capsys):
    home, info, result = registered
    out = tmp_path / "page.html"
    assert main(["report", f"loop@{info.version}", "--out", str(out), "--home", str(home)]) == 0
    assert capsys.readouterr().out.strip() == str(out)
    page = out.read_text(encoding="utf-8")
    verdict = re.search(r'data-verdict="(\w+)"', page)
    assert verdict and verdict.group(1) == result.scorecard.verdict
    assert page.count("<img ") == 6  # figures redrawn from the stored evidence
    assert "&lt;demo&gt; &amp; check" in page and "true equations" in page
    # The version itself is untouched: every stored file still matches its recorded hash.
    Registry(home).verify(info.ref)
    assert "report.html" not in {p.name for p in info.folder.iterdir()}


def test_report_without_evidence_goes_to_the_current_folder(registered, without_evidence,
                                                            tmp_path, monkeypatch):
    home, _, result = registered
    info = without_evidence
    monkeypatch.chdir(tmp_path)
    assert main(["report", f"loop@{info.version}", "--home", str(home)]) == 0
    page = (tmp_path / f"loop-v{info.version}-report.html").read_text(encoding="utf-8")
    # No evidence stored: the scorecard and the model are shown, the figures left out.
    assert f'data-verdict="{result.scorecard.verdict}"' in page
    assert "<img " not in page and "No evidence arrays" in page


@pytest.mark.parametrize("ref", ["nosuch@1", "loop@99"])
def test_report_command_unknown_version_exits_2_and_writes_nothing(registered, tmp_path, capsys,
                                                                   ref):
    home, _, _ = registered
    out = tmp_path / "page.html"
    assert main(["report", ref, "--out", str(out), "--home", str(home)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("ergodex: error:")
    assert not out.exists()
    assert list(tmp_path.iterdir()) == []


def test_report_command_missing_out_folder_exits_2(registered, tmp_path, capsys):
    home, info, _ = registered
    out = tmp_path / "no" / "such" / "page.html"
    assert main(["report", f"loop@{info.version}", "--out", str(out), "--home", str(home)]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert not (tmp_path / "no").exists()
