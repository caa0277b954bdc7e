"""``ergodex report NAME[/V]``: the report rebuilt from what the registry stored."""

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
    info = registry.register(
        "loop",
        surrogate,
        scorecard=result.scorecard,
        evidence_path=evidence,
        fit_settings={"method": "true equations"},
        note="<demo> & check",
    )
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
    assert main(["report", f"loop/{info.version}", "--out", str(out), "--home", str(home)]) == 0
    assert capsys.readouterr().out.strip() == str(out)
    page = out.read_text(encoding="utf-8")
    verdict = re.search(r'data-verdict="(\w+)"', page)
    assert verdict and verdict.group(1) == result.scorecard.verdict
    assert page.count("<img ") == 6  # figures redrawn from the stored evidence
    assert "&lt;demo&gt; &amp; check" in page and "true equations" in page
    # The version itself is untouched: every stored file still matches its recorded hash.
    Registry(home).verify(info.ref)
    assert "report.html" not in {p.name for p in info.folder.iterdir()}


def test_report_without_evidence_refuses_unless_asked_and_never_writes_to_cwd(
    registered, without_evidence, tmp_path, monkeypatch, capsys
):
    home, _, result = registered
    info = without_evidence
    monkeypatch.chdir(tmp_path)
    # No evidence stored and no data to recompute it: refused (one line naming --data), no page.
    assert main(["report", f"loop/{info.version}", "--home", str(home)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--data DATA" in err[0] and result.scorecard.data_fingerprint in err[0]
    assert not (home / "reports").exists()
    # Asked for a page without figures: written under the registry home, not the current folder.
    assert main(["report", f"loop/{info.version}", "--home", str(home), "--no-figures"]) == 0
    target = home / "reports" / f"loop-v{info.version}-report.html"
    assert capsys.readouterr().out.strip() == str(target)
    page = target.read_text(encoding="utf-8")
    assert f'data-verdict="{result.scorecard.verdict}"' in page
    assert "<img " not in page and "No evidence arrays" in page
    assert list(tmp_path.iterdir()) == []


def test_report_recomputes_missing_evidence_from_the_checked_data(
    registered, without_evidence, tmp_path, capsys
):
    from ergodex.writers import write_npz
    from report_support import loop_reference

    home, _, result = registered
    info = without_evidence
    data = write_npz(tmp_path / "reference.npz", loop_reference())
    out = tmp_path / "page.html"
    assert (
        main(
            [
                "report",
                f"loop/{info.version}",
                "--home",
                str(home),
                "--data",
                str(data),
                "--holdout",
                "none",
                "--out",
                str(out),
            ]
        )
        == 0
    )
    page = out.read_text(encoding="utf-8")
    # The recorded spec and seed give the same figures as the stored evidence of version 1.
    assert page.count("<img ") == 6
    # Other data (one run less) are not the checked data: refused, naming both fingerprints.
    other = write_npz(tmp_path / "other.npz", loop_reference().select_runs([0]))
    assert (
        main(
            [
                "report",
                f"loop/{info.version}",
                "--home",
                str(home),
                "--data",
                str(other),
                "--holdout",
                "none",
                "--out",
                str(tmp_path / "x.html"),
            ]
        )
        == 2
    )
    err = capsys.readouterr().err
    assert "not the data" in err and result.scorecard.data_fingerprint in err
    assert not (tmp_path / "x.html").exists()


@pytest.mark.parametrize("ref", ["nosuch@1", "loop@99"])
def test_report_command_unknown_version_exits_2_and_writes_nothing(
    registered, tmp_path, capsys, ref
):
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
    assert main(["report", f"loop/{info.version}", "--out", str(out), "--home", str(home)]) == 2
    assert "does not exist" in capsys.readouterr().err
    assert not (tmp_path / "no").exists()
