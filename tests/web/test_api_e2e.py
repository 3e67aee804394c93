"""End to end over HTTP: a script posts a capture with its token to a live server, and a real worker
process analyses it while the script polls the capture's URL."""

from __future__ import annotations

import json
import urllib.error
import urllib.request
from pathlib import Path

import pytest
from rest_framework.authtoken.models import Token

from emicase.models import FailingFrequency
from emicase.uploader import multipart_body
from tests.conftest import wait_until
from tests.web.traces import bad_csv, receiver_csv

pytestmark = pytest.mark.worker


def _call(url: str, token: str, *, body=None) -> tuple[int, dict]:
    headers = {"Authorization": f"Token {token}", "Accept": "application/json"}
    data = None
    if body is not None:
        content_type, data, length = body
        headers.update({"Content-Type": content_type, "Content-Length": str(length)})
    try:
        with urllib.request.urlopen(
            urllib.request.Request(url, data=data, headers=headers), timeout=30
        ) as response:
            return response.status, json.loads(response.read())
    except urllib.error.HTTPError as exc:
        raise AssertionError(f"{exc.code} from {url}: {exc.read()[:500]!r}") from None


def _post_capture(live_server, token: str, case, path: Path) -> dict:
    fields = {
        "case": case.pk,
        "probe_kind": "h_field",
        "tip": "loop 10 mm",
        "location": "U4",
        "x_mm": 10,
        "y_mm": 20,
    }
    status, capture = _call(
        f"{live_server.url}/api/captures/", token, body=multipart_body(fields, "file", path)
    )
    assert status == 201
    return capture


def _poll(url: str, token: str) -> dict:
    def finished():
        _, capture = _call(url, token)
        return capture if capture["status"] in ("done", "failed") else None

    return wait_until(finished, timeout=90, interval=0.3, what="the capture's analysis")


def test_a_capture_posted_with_a_token_is_analysed_and_read(
    worker, live_server, engineer, case, revision, tmp_path
):
    FailingFrequency.objects.create(
        case=case, frequency_hz=75e6, level=36.0, limit_level=30.0, confirmed=True
    )
    token = Token.objects.create(user=engineer).key
    trace = tmp_path / "near-field.csv"
    trace.write_bytes(receiver_csv([(75.1e6, 52.0)], unit="dBµV", floor=5.0))

    capture = _post_capture(live_server, token, case, trace)
    # The answer re-reads the capture, and the live worker may already have taken it.
    assert capture["status"] in ("queued", "running", "done")
    assert capture["url"].startswith(live_server.url)
    done = _poll(capture["url"], token)

    assert done["status"] == "done", done["error_text"]
    assert done["progress"] == 1.0 and done["error_text"] == ""
    assert any(abs(p["frequency_hz"] - 75.1e6) < 0.5e6 for p in done["results"]["peaks"])
    # 75.1 MHz lies within the team's 0.5 % of 75 MHz: the capture reads its 52 dBµV tone there.
    [reading] = done["readings"]
    assert reading["level"] == pytest.approx(52.0, abs=0.5)
    _, envelope = _call(done["envelope_url"], token)
    assert len(envelope["frequency_hz"]) == len(envelope["level"]) > 10


def test_a_bad_trace_posted_by_a_script_ends_failed_with_the_engines_words(
    worker, live_server, engineer, case, revision, tmp_path
):
    token = Token.objects.create(user=engineer).key
    trace = tmp_path / "broken.csv"
    trace.write_bytes(bad_csv(line_of_error=5))
    done = _poll(_post_capture(live_server, token, case, trace)["url"], token)
    assert (done["status"], done["error_kind"]) == ("failed", "input")
    assert "broken.csv line 5" in done["error_text"]
