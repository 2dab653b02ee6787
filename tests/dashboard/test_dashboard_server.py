"""The server's guards (Host header, request and upload size) and the background-job machinery.

Outside references: RFC 9110, section 7.2 (the Host header carries the host and port the
client used) and the DNS-rebinding attack it allows against servers on loopback addresses
(common practice in web security: check Host against the names the server is known by);
HTTP status 403 and 413 (RFC 9110, sections 15.5.4 and 15.5.14).
"""

from __future__ import annotations

import base64
import os
import threading
import time

import pytest

from dashboard import create_app
from dashboard.jobs import Cancelled, JobManager, WorkerFailed, Workers
from dashboard.panels.scenario import decode_upload, open_upload
from dashboard.server import DEFAULT_MAX_UPLOAD, allowed_hosts, format_size, request_limit


def test_allowed_hosts_of_a_loopback_bind_are_its_loopback_names_with_the_port():
    assert allowed_hosts("127.0.0.1", 8050) == {"127.0.0.1:8050", "localhost:8050", "[::1]:8050"}
    assert allowed_hosts("localhost", 80) >= {"localhost", "localhost:80", "127.0.0.1"}
    assert allowed_hosts("::1", 9000) >= {"[::1]:9000", "localhost:9000"}


def test_allowed_hosts_of_another_address_and_of_a_wildcard():
    assert allowed_hosts("192.168.1.20", 8050) == {"192.168.1.20:8050"}
    assert allowed_hosts("0.0.0.0", 8050) is None  # bound to every address on purpose: no check
    assert allowed_hosts("0.0.0.0", 8050, ["lab-server"]) == {"lab-server:8050"}
    assert allowed_hosts("127.0.0.1", 8050, ["lab.example:443"]) >= {"lab.example:443", "127.0.0.1:8050"}


@pytest.fixture(scope="module")
def guarded(tmp_path_factory):
    app = create_app(None, cache_dir=tmp_path_factory.mktemp("guard-cache"), max_upload=1000,
                     allowed_hosts=allowed_hosts("127.0.0.1", 8050))
    return app


def test_a_foreign_host_header_is_refused_with_a_message(guarded):
    client = guarded.server.test_client()
    assert client.get("/", headers={"Host": "127.0.0.1:8050"}).status_code == 200
    assert client.get("/_dash-layout", headers={"Host": "localhost:8050"}).status_code == 200
    refused = client.get("/_dash-layout", headers={"Host": "attacker.example:8050"})
    assert refused.status_code == 403
    text = refused.get_data(as_text=True)
    assert "Host header: got attacker.example:8050" in text and "--allow-host" in text
    # the same port on another name, and a loopback name on another port, are refused too
    assert client.get("/", headers={"Host": "127.0.0.2:8050"}).status_code == 403
    assert client.get("/", headers={"Host": "127.0.0.1:8051"}).status_code == 403


def test_a_request_larger_than_an_upload_can_make_is_refused_with_413(guarded):
    client = guarded.server.test_client()
    limit = request_limit(1000)
    body = b"x" * (limit + 1)
    answer = client.post("/_dash-update-component", data=body, headers={"Host": "127.0.0.1:8050",
                                                                        "Content-Type": "application/json"})
    assert answer.status_code == 413
    assert "--max-upload" in answer.get_data(as_text=True)


def _data_url(raw: bytes) -> str:
    return "data:application/octet-stream;base64," + base64.b64encode(raw).decode()


def test_an_upload_above_the_limit_is_refused_naming_file_size_and_limit():
    ok = b'[scenario]\nduration = "1 h"\n'
    assert decode_upload(_data_url(ok), "a.toml", 1000) == ("a.toml", ok)
    big = b"#" * 1001
    with pytest.raises(ValueError, match=r"^big.toml: file: got 1001 bytes; the dashboard accepts files up to "
                                         r"1000 bytes \(start it with --max-upload MB"):
        decode_upload(_data_url(big), "big.toml", 1000)
    draft, problems = open_upload(_data_url(b"#" * (6 * 1024 * 1024)), "huge.toml")
    assert draft is None
    assert problems == [f"huge.toml: file: got 6 MB; the dashboard accepts files up to "
                        f"{format_size(DEFAULT_MAX_UPLOAD)} (start it with --max-upload MB to accept larger ones)"]
    assert format_size(DEFAULT_MAX_UPLOAD) == "5 MB"


# ------------------------------------------------------------------ workers and jobs
def _boom(text: str) -> None:
    raise ValueError(text)


def _slow(seconds: float, progress=None) -> str:
    for i in range(int(seconds * 20)):
        time.sleep(0.05)
        if progress is not None:
            progress(i / (seconds * 20))
    return "slept"


def _die() -> None:
    os._exit(7)


@pytest.fixture(scope="module")
def workers():
    w = Workers(processes=1)
    yield w
    w.close()


def test_workers_return_answers_exceptions_and_progress(workers):
    assert workers.call(pow, 2, 10) == 1024
    with pytest.raises(ValueError, match="as sent"):
        workers.call(_boom, "as sent")
    seen = []
    assert workers.call(_slow, 0.5, progress=seen.append) == "slept"
    assert seen and all(0 <= f <= 1 for f in seen)


def test_a_cancelled_call_stops_its_worker_and_the_next_call_gets_a_fresh_one(workers):
    cancel = threading.Event()
    threading.Timer(0.3, cancel.set).start()
    started = time.monotonic()
    with pytest.raises(Cancelled):
        workers.call(_slow, 30.0, cancel=cancel)
    assert time.monotonic() - started < 10
    assert workers.call(pow, 3, 3) == 27


def test_a_worker_that_dies_fails_its_call_only(workers):
    with pytest.raises(WorkerFailed, match="exit code 7"):
        workers.call(_die)
    assert workers.call(pow, 2, 3) == 8


def test_jobs_with_identical_keys_keep_their_own_results():
    manager = JobManager(threads=4)

    def fn(x):
        time.sleep(0.1)
        return x

    job_fn = manager.make_job_fn(fn, progress=False)
    first = manager.call_job_fn("same-key", job_fn, [1], {})
    second = manager.call_job_fn("same-key", job_fn, [2], {})
    deadline = time.monotonic() + 10
    while not (manager._jobs[first].done_at and manager._jobs[second].done_at):
        assert time.monotonic() < deadline
        time.sleep(0.02)
    # running until collected: a result that arrived between two polls is not taken for a cancel
    assert manager.job_running(first) and manager.job_running(second)
    assert manager.get_result("same-key", second) == 2
    assert manager.get_result("same-key", first) == 1
    assert not manager.job_running(first)
