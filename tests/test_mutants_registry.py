"""Registry: the documented guarantees that a mutation run found unpinned (hash check before
accepting, one accepted version per name, name rules at their limits), one behaviour at a time
(``benchmarks/mutation.py registry``). Versions are named by the ``VersionInfo`` that
``register`` returns, so these tests do not depend on the reference syntax."""

from __future__ import annotations

import hashlib
import re

import pytest

from ergodex.exceptions import IntegrityError, RegistryError
from ergodex.registry import Registry, sha256_hex, validate_name
from ergodex.scenarios import lorenz63_surrogate


def _exact(message: str) -> str:
    return "^" + re.escape(message) + "$"


def _card(surrogate, verdict: str = "pass") -> dict:
    """A scorecard dict with the keys the registry reads (verdict and the two fingerprints)."""
    return {
        "verdict": verdict,
        "rows": [],
        "data_fingerprint": "sha256:" + "cd" * 32,
        "model_fingerprint": surrogate.fingerprint(),
    }


def test_sha256_is_the_standard_digest():
    # reference: hashlib's SHA-256 and the FIPS 180-2 test vector for "abc"
    assert sha256_hex(b"abc") == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    )
    assert sha256_hex(b"") == hashlib.sha256(b"").hexdigest()


def test_accepting_checks_every_file_hash_first(tmp_path):
    # Registry.accept: "accept exactly the bytes that were checked" — a changed artifact
    # refuses the acceptance and the version stays a candidate
    reg = Registry(tmp_path / "home")
    truth = lorenz63_surrogate()
    info = reg.register("loop", truth, scorecard=_card(truth), report_html="<html>ok</html>")
    report = info.folder / "report.html"
    report.write_bytes(report.read_bytes().replace(b"ok", b"OK"))
    with pytest.raises(IntegrityError, match=r"report\.html: sha256 mismatch for loop"):
        reg.accept(info)
    listed = reg.versions("loop")[0]
    assert listed.status == "candidate" and listed.integrity == "failed"
    assert len(listed.integrity_problems) == 1 and "report.html" in listed.integrity_problems[0]


def test_one_accepted_version_per_name(tmp_path):
    # module docstring: accepting retires the previously accepted version in the same
    # transaction, event "retired", reason "replaced by version N"
    reg = Registry(tmp_path / "home")
    truth = lorenz63_surrogate()
    first = reg.register("loop", truth, scorecard=_card(truth))
    second = reg.register("loop", truth, scorecard=_card(truth))
    assert (first.version, second.version) == (1, 2)
    reg.accept(first)
    assert reg.accept(second).status == "accepted"
    assert [v.status for v in reg.versions("loop")] == ["retired", "accepted"]
    retired = [e for e in reg.history("loop") if e.event == "retired"]
    assert len(retired) == 1
    e = retired[0]
    assert (e.version, e.from_status, e.to_status) == (1, "accepted", "retired")
    assert e.reason == "replaced by version 2" and e.override is False
    summary = {m.name: m for m in reg.list_models()}["loop"]
    assert (summary.versions, summary.latest, summary.accepted) == (2, 2, 2)
    assert summary.statuses == {"candidate": 0, "accepted": 1, "rejected": 0, "retired": 1}


def test_acceptance_problems_are_all_named(tmp_path):
    reg = Registry(tmp_path / "home")
    truth = lorenz63_surrogate()
    card = _card(truth, verdict="inconclusive") | {"data_fingerprint": ""}
    info = reg.register("loop", truth, scorecard=card)
    with pytest.raises(
        RegistryError,
        match=re.escape(
            "loop@1 cannot be accepted: its scorecard's verdict is 'inconclusive'; its scorecard "
            "does not record the fingerprint of the data it checked. Check it again"
        ).replace("loop@1", r"loop\W1"),
    ):
        reg.accept(info)
    accepted = reg.accept(info, override=True, reason="reviewed by hand")
    assert accepted.status == "accepted"
    last = reg.history("loop")[-1]
    assert last.override is True and last.reason == "reviewed by hand"


def test_reject_and_retire_need_a_reason(tmp_path):
    reg = Registry(tmp_path / "home")
    truth = lorenz63_surrogate()
    info = reg.register("loop", truth, scorecard=_card(truth))
    with pytest.raises(RegistryError):
        reg.reject(info, reason="")
    assert reg.reject(info, reason="drifts").status == "rejected"
    with pytest.raises(RegistryError):
        reg.accept(info)  # rejected is final (candidate → accepted | rejected)


@pytest.mark.parametrize(
    "name, message",
    [
        (7, "model name must be a string, got int"),
        ("", "model name is empty; give a name such as 'convection-loop'"),
        ("a\x00b", "model name 'a\\x00b' contains a NUL byte; use letters, digits, . _ -"),
        ("a" * 65, f"model name {'a' * 40 + '…'!r} is 65 characters long; the limit is 64"),
        ("a/b", "model name 'a/b' contains a path separator; use letters, digits, . _ -"),
        ("a\\b", "model name 'a\\\\b' contains a path separator; use letters, digits, . _ -"),
        ("a..b", "model name 'a..b' contains '..'; use letters, digits, . _ -"),
        (
            "loop.",
            "model name 'loop.' is not allowed: use letters, digits, '.', '_' and '-', starting "
            "with a letter or digit and not ending with '.'",
        ),
        (
            "-loop",
            "model name '-loop' is not allowed: use letters, digits, '.', '_' and '-', starting "
            "with a letter or digit and not ending with '.'",
        ),
        ("CON", "model name 'CON' is reserved; choose another"),
        ("nul.v2", "model name 'nul.v2' is reserved; choose another"),
    ],
)
def test_model_names_are_refused_with_the_rule_they_break(name, message):
    with pytest.raises(RegistryError, match=_exact(message)):
        validate_name(name)


def test_model_names_at_the_limits_are_allowed():
    # validate_name docstring: 1 to 64 characters from A-Z a-z 0-9 . _ -, starting with a letter
    # or digit
    for name in ("a", "7", "a" * 64, "A.b_c-9", "console", "loop.v2"):
        assert validate_name(name) == name


def test_accept_defaults_to_no_override():
    # Registry.accept docstring: refused unless the scorecard passes; override=True with a
    # non-empty reason is the exception, so neither is assumed
    import inspect

    params = inspect.signature(Registry.accept).parameters
    assert params["override"].default is False and params["reason"].default == ""


def test_datasets_given_with_their_source_keep_both(tmp_path):
    # Registry.register docstring: datasets as role → {"fingerprint", "source"}; the scorecard's
    # data fingerprint is added as role "check" when not given
    reg = Registry(tmp_path / "home")
    truth = lorenz63_surrogate()
    fp = "sha256:" + "ef" * 32
    info = reg.register(
        "loop",
        truth,
        scorecard=_card(truth),
        datasets={"fit": {"fingerprint": fp, "source": "a.csv"}},
    )
    by_role = {d["role"]: d for d in info.datasets}
    assert by_role["fit"]["fingerprint"] == fp and by_role["fit"]["source"] == "a.csv"
    assert by_role["check"]["fingerprint"] == "sha256:" + "cd" * 32
    assert reg.versions("loop")[0].datasets == info.datasets
