"""Tests of the HTTP service against real ``ergodex serve`` processes on 127.0.0.1.

Every server here is started by the test through the command line (``ServerProcess``) on a port
the system picks, and stopped when the test ends; nothing is mocked: real SQLite, real worker
processes, real pysindy fits.
"""

from __future__ import annotations

import io
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

httpx = pytest.importorskip("httpx")
pytest.importorskip("fastapi")

from ergodex.service.auth import (  # noqa: E402
    MISSING_TOKEN,
    NO_TOKEN_CONFIGURED,
    WRONG_TOKEN,
    authorize,
    bearer_token,
)
from ergodex.service.datasets import UploadRefused, check_filename  # noqa: E402
from ergodex.service.jobs import (  # noqa: E402
    CANCELLED,
    FAILED,
    INTERRUPTED,
    QUEUED,
    RUNNING,
    SUCCEEDED,
    JobStore,
)
from ergodex.service.process import ServerProcess  # noqa: E402

TOKEN = "test-token-0123456789abcdef"
READ_METHODS = {"get", "head", "options"}


# -- helpers -----------------------------------------------------------------------------------


def convection_csv(seed: int, *, n_runs: int = 4, duration: float = 30.0) -> bytes:
    """CSV bytes of the heated convection loop (Lorenz-63 sensors) through the project's writer."""
    import tempfile

    from ergodex import scenarios
    from ergodex.writers import write_csv

    series = scenarios.convection_loop(seed=seed, n_runs=n_runs, duration=duration)
    with tempfile.TemporaryDirectory() as folder:
        return write_csv(Path(folder) / "loop.csv", series, digits=8).read_bytes()


def wait_for_job(client, job_id: str, timeout: float) -> dict:
    deadline = time.monotonic() + timeout
    job = None
    while time.monotonic() < deadline:
        job = client.get(f"/jobs/{job_id}").json()
        if job["state"] in (SUCCEEDED, FAILED, CANCELLED):
            return job
        time.sleep(0.25)
    raise AssertionError(f"job {job_id} did not finish within {timeout} s: {job}")


def wait_for(condition, timeout: float, what: str, interval: float = 0.05):
    """Poll ``condition()`` until it is true; a generous deadline, never a fixed sleep."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if condition():
            return
        time.sleep(interval)
    raise AssertionError(f"{what} did not happen within {timeout} s")


def upload(client, name: str, data: bytes, *, token: str | None = TOKEN, **form):
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    return client.post("/datasets", files={"file": (name, data)}, data=form, headers=headers)


def auth(token: str = TOKEN) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    """One server shared by the tests of this module (2 workers, 2 MiB upload limit)."""
    root = tmp_path_factory.mktemp("served")
    token_file = root / "token"
    token_file.write_text(TOKEN + "\n")
    server = ServerProcess(
        root / "home", token_file=token_file, workers=2, extra_args=["--max-upload-mb", "2"]
    ).start()
    try:
        with httpx.Client(base_url=server.url, timeout=60) as client:
            yield server, client
    finally:
        server.stop()


# -- token checks (no server) -----------------------------------------------------------------


def test_authorize_needs_the_exact_bearer_token():
    # Scheme names are case-insensitive (RFC 7235 section 2.1, used by RFC 6750 section 2.1).
    assert bearer_token("bearer abc") == "abc"
    assert bearer_token("Basic abc") is None
    assert authorize(f"Bearer {TOKEN}", TOKEN) is None
    assert authorize(None, TOKEN) == MISSING_TOKEN
    assert authorize("Bearer ", TOKEN) == MISSING_TOKEN
    assert authorize(f"Bearer {TOKEN}x", TOKEN) == WRONG_TOKEN
    assert authorize(f"Bearer {TOKEN[:-1]}", TOKEN) == WRONG_TOKEN
    # No configured token: even a request carrying some token is refused.
    assert authorize(f"Bearer {TOKEN}", None) == NO_TOKEN_CONFIGURED


@pytest.mark.parametrize(
    "name, code",
    [
        ("../data.csv", "bad-filename"),
        ("sub/data.csv", "bad-filename"),
        ("..\\data.csv", "bad-filename"),
        ("/etc/passwd.csv", "bad-filename"),
        (".hidden.csv", "bad-filename"),
        ("C:data.csv", "bad-filename"),
        ("", "bad-filename"),
        ("data.exe", "unsupported-type"),
        ("data", "unsupported-type"),
    ],
)
def test_upload_names_with_path_parts_or_foreign_types_are_refused(name, code):
    with pytest.raises(UploadRefused, match="name|type") as info:
        check_filename(name)
    assert info.value.code == code
    assert 400 <= info.value.status < 500


# -- the job table (no server) ----------------------------------------------------------------

_CLAIMER = """
import json, os, sys
from ergodex.service.jobs import JobStore
store = JobStore(sys.argv[1])
claimed = []
while (job := store.claim(os.getpid())) is not None:
    claimed.append(job.id)
print(json.dumps(claimed))
"""


def test_three_processes_claim_every_job_exactly_once(tmp_path):
    store = JobStore(tmp_path / "jobs.sqlite3")
    ids = {store.submit("fit", {"n": i}).id for i in range(60)}
    procs = [
        subprocess.Popen([sys.executable, "-c", _CLAIMER, str(store.path)], stdout=subprocess.PIPE)
        for _ in range(3)
    ]
    claimed = []
    for proc in procs:
        out, _ = proc.communicate(timeout=60)
        assert proc.returncode == 0
        claimed.extend(json.loads(out))
    assert sorted(claimed) == sorted(ids)  # every job once: none lost, none twice
    assert store.counts()[RUNNING] == 60


def test_a_job_failed_as_interrupted_cannot_be_finished_by_its_old_worker(tmp_path):
    store = JobStore(tmp_path / "jobs.sqlite3")
    first = store.submit("fit", {"n": 1})
    second = store.submit("validate", {"n": 2})
    job = store.claim(worker_pid=12345)
    assert job is not None and job.id == first.id  # oldest first
    assert store.fail_running("server died") == [first.id]
    assert not store.succeed(job.id, job.claim, {"late": True})
    record = store.get(first.id)
    assert (record.state, record.error_code, record.error_message) == (
        FAILED,
        INTERRUPTED,
        "server died",
    )
    assert record.result is None
    assert store.get(second.id).state == "queued"


def test_a_retrain_result_stored_by_an_earlier_server_is_shown_with_todays_side_names(tmp_path):
    from ergodex.service.app import _job_out

    store = JobStore(tmp_path / "jobs.sqlite3")
    store.submit("retrain", {"name": "loop"})
    job = store.claim(worker_pid=12345)
    side = {"ref": "loop/1", "verdict": "pass", "score": 0.8}
    old = {
        "format": "ergodex-decision/1",
        "outcome": "kept",
        "champion": {**side, "role": "champion"},
        "challenger": {**side, "ref": "loop/2", "role": "challenger"},
    }
    assert store.succeed(job.id, job.claim, old)
    shown = _job_out(store.get(job.id)).result
    assert shown["format"] == "ergodex-decision/2"
    assert shown["incumbent"] == {**side, "role": "incumbent"}
    assert shown["refit"] == {**side, "ref": "loop/2", "role": "refit"}
    assert "champion" not in shown and "challenger" not in shown


def test_current_serves_the_accepted_version_and_the_former_alias_names_the_new_path(tmp_path):
    from fastapi.testclient import TestClient

    from ergodex.registry import Registry
    from ergodex.scenarios import lorenz63_surrogate
    from ergodex.service.app import create_app
    from ergodex.service.settings import ServiceSettings

    truth = lorenz63_surrogate()
    registry = Registry(tmp_path / "home")
    card = {
        "verdict": "pass",
        "data_fingerprint": "sha256:" + "ab" * 32,
        "model_fingerprint": truth.fingerprint(),
    }
    for _ in range(2):
        registry.register("loop", truth, scorecard=card)
    registry.accept("loop/1")
    app = create_app(ServiceSettings(home=registry.home, token=TOKEN), start_workers=False)
    with TestClient(app, raise_server_exceptions=False) as client:
        shown = client.get("/models/loop/current").json()
        assert (shown["ref"], shown["status"]) == ("loop/1", "accepted")
        response = client.get("/models/loop/current/model.json")
        assert response.status_code == 200
        assert response.content == registry.artifact("loop/1", "model.json")
        assert client.get("/models/loop/versions/2").json()["ref"] == "loop/2"
        for old, now in (
            ("/models/loop/versions/accepted", "/models/loop/current"),
            ("/models/loop/versions/accepted/model.json", "/models/loop/current/model.json"),
        ):
            response = client.get(old)
            assert response.status_code == 404
            assert response.json() == {
                "code": "not-found",
                "message": f"{old} is now {now}: use that path",
            }
        refused = client.post(
            "/jobs/validate",
            json={"name": "loop", "version": "accepted", "dataset": "0" * 64},
            headers=auth(),
        )
        assert refused.status_code == 422
        assert "write 'current', not 'accepted'" in refused.json()["message"]
        paths = app.openapi()["paths"]
        assert "/models/{name}/current/model.json" in paths
        assert not any("accepted" in path for path in paths)


# -- against a running server -----------------------------------------------------------------


def _write_operations(document: dict) -> list[tuple[str, str, dict]]:
    return [
        (method, path, operation)
        for path, operations in document["paths"].items()
        for method, operation in operations.items()
        if method not in READ_METHODS
    ]


def _fill(path: str) -> str:
    return path.replace("{name}", "convection-loop").replace("{version}", "1")


def test_every_write_endpoint_refuses_missing_and_wrong_tokens(served):
    server, client = served
    document = client.get("/openapi.json").json()
    writes = _write_operations(document)
    # Sanity: the list comes from the document, and the document does list the writes we know.
    paths = {(m, p) for m, p, _ in writes}
    assert {
        ("post", "/datasets"),
        ("post", "/jobs/fit"),
        ("post", "/jobs/validate"),
        ("post", "/jobs/retrain"),
    } <= paths
    assert len(writes) >= 7
    jobs_before = client.get("/jobs").json()["jobs"]
    for method, path, operation in writes:
        assert operation.get("security"), f"{method} {path} is not marked as needing the token"
        for headers, code in (({}, MISSING_TOKEN), (auth("not-" + TOKEN), WRONG_TOKEN)):
            if "multipart/form-data" in operation.get("requestBody", {}).get("content", {}):
                response = client.request(
                    method,
                    _fill(path),
                    headers=headers,
                    files={"file": ("a.csv", b"time,x\n0,1\n1,2\n")},
                )
            else:
                response = client.request(method, _fill(path), headers=headers, json={})
            assert response.status_code == 401, (method, path, response.text)
            assert response.json()["code"] == code
            assert response.headers["www-authenticate"] == "Bearer"
    assert client.get("/jobs").json()["jobs"] == jobs_before
    assert not [p for p in (server.home / "service" / "datasets").glob("*")]


def test_a_server_without_a_token_refuses_every_write(tmp_path):
    with ServerProcess(tmp_path / "home", token_file=None, workers=0) as server:
        with httpx.Client(base_url=server.url, timeout=30) as client:
            health = client.get("/health").json()
            assert health["writes_enabled"] is False
            response = client.post("/jobs/fit", json={}, headers=auth())
            assert response.status_code == 403
            assert response.json()["code"] == NO_TOKEN_CONFIGURED
            assert "token" in response.json()["message"]
            assert client.get("/models").json() == {"models": []}  # reads stay open


def test_token_from_the_environment_and_protected_reads(tmp_path):
    env = dict(os.environ, ERGODEX_TOKEN=TOKEN)
    with ServerProcess(
        tmp_path / "home", workers=0, env=env, extra_args=["--protect-reads"]
    ) as server:
        with httpx.Client(base_url=server.url, timeout=30) as client:
            health = client.get("/health").json()  # stays open for probes
            assert health["reads_protected"] is True and health["writes_enabled"] is True
            document = client.get("/openapi.json").json()
            reads = [
                p
                for p, ops in document["paths"].items()
                if "get" in ops and "{" not in p and p != "/health"
            ]
            assert {"/models", "/jobs", "/datasets"} <= set(reads)
            for path in reads:
                refused = client.get(path)
                assert refused.status_code == 401 and refused.json()["code"] == MISSING_TOKEN
                assert client.get(path, headers=auth()).status_code == 200


def test_serve_without_the_service_extra_says_what_to_install(tmp_path):
    # A child interpreter in which 'fastapi' cannot be imported, as on an install without the
    # extra (a None entry in sys.modules makes the import fail).
    script = (
        "import sys; sys.modules['fastapi'] = None; from ergodex.cli import main; "
        f"sys.exit(main(['serve', '--port', '0', '--home', {str(tmp_path / 'home')!r}]))"
    )
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=60
    )
    assert done.returncode == 2
    assert "pip install 'ergodex[service]'" in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1


def test_a_second_server_on_the_same_home_exits_with_code_2(served):
    server, _client = served
    done = subprocess.run(
        ServerProcess(server.home, workers=0).command(), capture_output=True, text=True, timeout=60
    )
    assert done.returncode == 2
    assert "already using the home" in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1


def _npz_bytes(**arrays) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


def test_bad_uploads_get_4xx_and_leave_nothing_behind(served):
    server, client = served
    datasets_dir = server.home / "service" / "datasets"
    before = sorted(p.name for p in datasets_dir.glob("*")) if datasets_dir.exists() else []
    listed_before = client.get("/datasets").json()
    rng = np.random.default_rng(7)
    good_rows = "\n".join(
        f"{0.1 * i:.1f},{v:.4f},{w:.4f}" for i, (v, w) in enumerate(rng.normal(size=(50, 2)))
    )
    cases = [
        ("../escape.csv", b"time,x\n0,1\n", 400, "bad-filename"),
        ("dir%2Fx.csv", b"time,x\n0,1\n", 400, "bad-filename"),
        ("data.pkl", b"\x80\x04K\x01.", 415, "unsupported-type"),
        ("data.csv", b"\xff\xfe\x00\x00garbage" * 10, 422, "invalid-dataset"),
        ("data.csv", b"", 422, "invalid-dataset"),
        ("data.csv", b"time,x,y\n0,1\n0.1,2,3,4\n", 422, "invalid-dataset"),
        ("data.csv", ("time,x,y\n" + good_rows + "\n0.9,nan,1\n").encode(), 422, "invalid-dataset"),
        ("data.npz", b"PK\x03\x04 not really a zip", 422, "invalid-dataset"),
        ("data.npz", b"plain text", 422, "invalid-dataset"),
        ("data.npz", _npz_bytes(x=np.array([object()], dtype=object)), 422, "invalid-dataset"),
        ("data.nc", b"CDF\x01 truncated", 422, "invalid-dataset"),
        ("big.csv", b"time,x\n" + b"0.0,1.0\n" * 400_000, 413, "upload-too-large"),
    ]
    for name, data, status, code in cases:
        response = upload(client, name, data)
        assert response.status_code == status, (name, response.text)
        body = response.json()
        assert body["code"] == code, (name, body)
        assert body["message"]
    # A request without the file part is a 4xx in the same JSON shape.
    response = client.post("/datasets", data={"dt": "0.1"}, headers=auth())
    assert response.status_code == 422 and response.json()["code"] == "invalid-request"
    after = sorted(p.name for p in datasets_dir.glob("*")) if datasets_dir.exists() else []
    assert after == before
    assert client.get("/datasets").json() == listed_before


@pytest.mark.slow
def test_upload_fit_validate_accept_download_round_trip(served):
    from ergodex.registry import Registry

    server, client = served
    fit_csv = convection_csv(seed=11)
    response = upload(client, "loop-fit.csv", fit_csv)
    assert response.status_code == 201, response.text
    dataset = response.json()
    assert dataset["variables"] == ["flow", "dT_across", "dT_up"]
    assert dataset["runs"] == 4 and dataset["format"] == "csv"
    # The same bytes again name the same dataset.
    again = upload(client, "loop-fit.csv", fit_csv)
    assert again.status_code == 200 and again.json()["id"] == dataset["id"]
    assert again.json()["already_present"] is True
    check = upload(client, "loop-check.csv", convection_csv(seed=12, n_runs=2)).json()

    check_options = {"members": 8, "seed": 3}
    job = client.post(
        "/jobs/fit",
        json={
            "dataset": dataset["id"],
            "name": "convection-loop",
            "method": "sparse",
            "holdout": 2,
            "check": check_options,
        },
        headers=auth(),
    )
    assert job.status_code == 202, job.text
    assert job.json()["state"] in ("queued", "running")
    fitted = wait_for_job(client, job.json()["id"], timeout=120)
    assert fitted["state"] == SUCCEEDED, fitted["error"]
    version = fitted["result"]["version"]
    assert fitted["result"]["status"] == "candidate"

    job = client.post(
        "/jobs/validate",
        json={
            "name": "convection-loop",
            "version": version,
            "dataset": check["id"],
            "check": check_options,
        },
        headers=auth(),
    )
    checked = wait_for_job(client, job.json()["id"], timeout=120)
    assert checked["state"] == SUCCEEDED, checked["error"]
    assert checked["result"]["verdict"] in ("pass", "fail")
    assert checked["result"]["data_fingerprint"] == check["fingerprint"]

    accepted = client.post(
        f"/models/convection-loop/versions/{version}/accept",
        json={"reason": "round-trip test"},
        headers=auth(),
    )
    if fitted["result"]["verdict"] == "pass":
        assert accepted.status_code == 200, accepted.text
        assert accepted.json()["status"] == "accepted"
        served_ref = "current"
    else:  # the registry refuses a failed scorecard without an override: a 409, not a 500
        assert accepted.status_code == 409 and accepted.json()["code"] == "status-conflict"
        served_ref = f"versions/{version}"

    registry = Registry(server.home)
    for filename in ("model.json", "scorecard.json", "report.html"):
        response = client.get(f"/models/convection-loop/{served_ref}/{filename}")
        assert response.status_code == 200, (filename, response.text)
        assert response.content == registry.artifact(f"convection-loop/{version}", filename)
        assert (
            response.headers["etag"].strip('"')
            == registry.get(f"convection-loop/{version}").artifacts[filename]
        )
    events = client.get("/models/convection-loop/history").json()["events"]
    assert [e["event"] for e in events][:1] == ["registered"]
    assert "checked" in [e["event"] for e in events]
    listing = client.get("/models").json()["models"]
    assert [m["name"] for m in listing] == ["convection-loop"]


def test_a_check_on_a_record_too_short_to_tell_is_inconclusive_through_the_service(served):
    # The exact Lorenz-63 equations (Lorenz 1963) against 2 runs × 6 time units of their own
    # sensors: the record cannot tell a time scale or a variance ×1.5 from the truth, so the
    # check may not say "pass" (measured: not even a ×5 change is detected).
    from ergodex import scenarios
    from ergodex.registry import Registry

    server, client = served
    Registry(server.home).register("short-record", scenarios.lorenz63_surrogate())
    short = upload(client, "loop-short.csv", convection_csv(seed=12, n_runs=2, duration=6.0))
    assert short.status_code == 201, short.text
    job = client.post(
        "/jobs/validate",
        json={
            "name": "short-record",
            "version": 1,
            "dataset": short.json()["id"],
            # the threshold from the record's own null distribution (opt-in): with the fixed
            # tolerance a record this short can also fail the true equations on a noisy row
            "check": {"members": 8, "seed": 3, "false_reject_rate": 0.05},
        },
        headers=auth(),
    )
    assert job.status_code == 202, job.text
    checked = wait_for_job(client, job.json()["id"], timeout=120)
    assert checked["state"] == SUCCEEDED, checked["error"]  # the job ran; the check is the result
    result = checked["result"]
    assert result["verdict"] == "inconclusive"
    assert result["scorecard"]["verdict"] == "inconclusive"
    assert result["reasons"][0].startswith("inconclusive: the record")
    assert result["scorecard"]["power"]["sufficient"] is False
    assert result["scorecard"]["threshold"]["false_reject_rate"] == 0.05
    events = client.get("/models/short-record/history").json()["events"]
    assert any(e["event"] == "checked" and "inconclusive" in e["reason"] for e in events), events


@pytest.mark.slow
def test_schemathesis_finds_no_server_error_and_no_schema_violation(served, tmp_path):
    pytest.importorskip("schemathesis")
    server, client = served
    # Point the generated requests at real resources where the server has some (after the round
    # trip above: a registered model, datasets, jobs), so that the downloads, job reads and status
    # changes are exercised beyond their 404s.
    known = {}
    models = client.get("/models").json()["models"]
    if models:
        known["path.name"] = models[0]["name"]
        known["path.version"] = str(models[0]["latest"])
    datasets = client.get("/datasets").json()["datasets"]
    if datasets:
        known["path.dataset_id"] = datasets[0]["id"]
    jobs = client.get("/jobs").json()["jobs"]
    if jobs:
        known["path.job_id"] = jobs[0]["id"]
    config = tmp_path / "schemathesis.toml"
    config.write_text("[parameters]\n" + "".join(f'"{k}" = "{v}"\n' for k, v in known.items()))
    cli = Path(sys.executable).with_name("schemathesis")
    command = [
        str(cli),
        "--config-file",
        str(config),
        "run",
        f"{server.url}/openapi.json",
        "--checks",
        "not_a_server_error,status_code_conformance,content_type_conformance,"
        "response_schema_conformance",
        "--max-examples",
        "4",
        "--max-time",
        "15",
        "--seed",
        "2026",
        "--no-shrink",
        "--phases",
        "examples,fuzzing",
        "--workers",
        "1",
        "--request-timeout",
        "20",
        "--header",
        f"Authorization: Bearer {TOKEN}",
    ]
    done = subprocess.run(command, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stdout[-4000:] + done.stderr[-2000:]
    assert "passed" in done.stdout
    assert client.get("/health").json()["status"] == "ok"  # and the server is still up


@pytest.mark.slow
def test_killed_server_or_worker_fails_its_job_and_the_queued_ones_still_run(tmp_path):
    from ergodex import scenarios
    from ergodex.registry import Registry

    # Every wait below is on a condition with a deadline far beyond what an idle machine needs
    # (a loaded 2-core machine can be ten times slower); the jobs killed on purpose are long
    # enough that they cannot finish before the kill, whatever the load.
    patience = 300.0
    token_file = tmp_path / "token"
    token_file.write_text(TOKEN)
    home = tmp_path / "home"
    # The true Lorenz-63 equations, registered directly, are what the queued jobs check.
    Registry(home).register("truth", scenarios.lorenz63_surrogate(), note="reference equations")
    server = ServerProcess(home, token_file=token_file, workers=1, start_timeout=patience).start()
    try:
        with httpx.Client(base_url=server.url, timeout=120) as client:
            data = upload(client, "loop.csv", convection_csv(seed=21, n_runs=3, duration=20.0))
            assert data.status_code == 201, data.text
            dataset = data.json()["id"]
            # The first job is a sparse fit (pysindy alone takes seconds to import), so it is
            # surely still running when the server is killed. The second check has a spin-up of
            # 256 members × 10^7 steps (minutes of work, no memory), so it is surely still
            # running when its worker is killed; the third is quick.
            fit = {"dataset": dataset, "name": "loop", "method": "sparse"}
            long_check = {
                "name": "truth",
                "version": 1,
                "dataset": dataset,
                "check": {"members": 256, "spinup": 1e5, "seed": 1},
            }
            check = {
                "name": "truth",
                "version": 1,
                "dataset": dataset,
                "check": {"members": 4, "seed": 1},
            }
            ids = [client.post("/jobs/fit", json=fit, headers=auth()).json()["id"]]
            ids += [
                client.post("/jobs/validate", json=body, headers=auth()).json()["id"]
                for body in (long_check, check)
            ]
            wait_for(
                lambda: client.get(f"/jobs/{ids[0]}").json()["state"] != QUEUED,
                patience,
                "the start of the first job",
            )
            assert client.get(f"/jobs/{ids[0]}").json()["state"] == RUNNING
        server.kill()
    finally:
        server.stop()
    # The worker dies with its server (it must not finish the job behind the new server's back).
    store = JobStore(home / "service" / "jobs.sqlite3")
    pid = store.get(ids[0]).worker_pid
    wait_for(lambda: not _alive(pid), 60, f"the end of worker {pid} after its server's")
    assert [store.get(i).state for i in ids] == [RUNNING, QUEUED, QUEUED]

    with ServerProcess(home, token_file=token_file, workers=1, start_timeout=patience) as server:
        with httpx.Client(base_url=server.url, timeout=120) as client:
            first = client.get(f"/jobs/{ids[0]}").json()
            assert first["state"] == FAILED
            assert first["error"]["code"] == INTERRUPTED
            assert "killed" in first["error"]["message"]
            # A worker that dies mid-job (here SIGKILL; in life the kernel's out-of-memory
            # killer) fails its job at once and is replaced; the queue goes on.
            wait_for(
                lambda: store.get(ids[1]).state == RUNNING, patience, "the start of the second job"
            )
            os.kill(store.get(ids[1]).worker_pid, signal.SIGKILL)
            second = wait_for_job(client, ids[1], timeout=patience)
            assert second["state"] == FAILED and second["error"]["code"] == INTERRUPTED
            assert "worker process" in second["error"]["message"]
            third = wait_for_job(client, ids[2], timeout=patience)
            assert third["state"] == SUCCEEDED, third["error"]
            assert third["result"]["verdict"] in ("pass", "fail")
            wait_for(
                lambda: client.get("/health").json()["workers"] == {"configured": 1, "alive": 1},
                60,
                "a replacement worker",
            )
    registry = Registry(home)
    # The interrupted fit left no version behind, and every stored byte matches its hash.
    assert [m.name for m in registry.list_models()] == ["truth"]
    registry.verify("truth/1")
    assert [e.event for e in registry.history("truth")] == ["registered", "checked"]


def _alive(pid: int | None) -> bool:
    if pid is None:
        return False
    try:
        with open(f"/proc/{pid}/stat") as handle:
            return handle.read().split(")")[-1].split()[0] != "Z"
    except FileNotFoundError:
        return False
