"""The job pages: HTML shells for browser navigations (no data, no token needed), JSON and 401
for everything else on the same addresses, and the report and its figures behind the token."""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from demaudit.service.api.routes.pages import wants_page
from tests.service.tokens import AUTH_B

# what Chromium sends when navigating (observed with chromium 156 on Debian)
BROWSER = "text/html,application/xhtml+xml,application/xml;q=0.9,image/avif,image/webp,*/*;q=0.8"
PNG = b"\x89PNG\r\n\x1a\n" + b"\0" * 32


class Tags(HTMLParser):
    """Start tags with their attributes, and the text inside each script element."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.script_text: list[str] = []
        self._in_script = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))
        self._in_script = tag == "script"

    def handle_endtag(self, tag: str) -> None:
        self._in_script = False

    def handle_data(self, data: str) -> None:
        if self._in_script:
            self.script_text.append(data)


def parse(html: str) -> Tags:
    tags = Tags()
    tags.feed(html)
    return tags


@pytest.mark.parametrize(
    ("accept", "query", "page"),
    [
        (BROWSER, b"", True),
        ("text/html", b"", True),
        (None, b"", False),
        ("*/*", b"", False),
        ("application/json", b"", False),
        ("application/json, text/html", b"", False),  # a tie goes to JSON
        ("text/html;q=0.5, application/json", b"", False),
        ("application/json;q=0.5, text/html", b"", True),
        (BROWSER, b"f=json", False),
        ("application/json", b"f=html", True),
        (BROWSER, b"limit=5&f=json", False),
    ],
)
def test_only_requests_preferring_html_get_the_page(accept, query, page):
    headers = [] if accept is None else [(b"accept", accept.encode())]
    assert wants_page({"type": "http", "headers": headers, "query_string": query}) is page


def test_the_list_page_is_a_shell_without_data_or_inline_script(api, submit, runner):
    job_id = submit(api)
    anonymous = {"Authorization": ""}
    page = api.get("/jobs", headers={"Accept": BROWSER} | anonymous)
    assert page.status_code == 200 and page.headers["content-type"].startswith("text/html")
    assert job_id not in page.text  # the shell holds no job data
    csp = page.headers["content-security-policy"]
    assert "script-src 'self';" in csp and "unsafe-inline" not in csp.split("script-src")[1][:20]
    assert "frame-ancestors 'none'" in csp and "form-action 'none'" in csp
    assert "Accept" in page.headers["vary"]
    tags = parse(page.text)
    scripts = [attrs for tag, attrs in tags.tags if tag == "script"]
    assert scripts and all(a.get("src", "").startswith("/static/") for a in scripts)
    assert "".join(tags.script_text).strip() == ""
    assert not any("on" + e in attrs for _, attrs in tags.tags for e in ("click", "load", "submit"))
    # the token field has no name: a form sent without the script can never carry it
    token_inputs = [a for t, a in tags.tags if t == "input" and a.get("id") == "token-input"]
    assert token_inputs and "name" not in token_inputs[0]
    assert token_inputs[0]["type"] == "password"
    runner.gate.set()


def test_json_clients_still_need_the_token(api, submit):
    submit(api)
    for accept in (None, "*/*", "application/json", "application/json, text/html"):
        headers = {"Authorization": ""} | ({"Accept": accept} if accept else {})
        for path in ("/jobs", "/jobs/0123abcd"):
            response = api.get(path, headers=headers)
            assert response.status_code == 401, (accept, path)
            assert response.headers["content-type"] == "application/problem+json"
    anonymous_browser = {"Accept": BROWSER, "Authorization": ""}
    refused = api.get("/jobs", params={"f": "json"}, headers=anonymous_browser)
    assert refused.status_code == 401
    listed = api.get("/jobs", headers={"Accept": "application/json"})
    assert listed.status_code == 200 and listed.json()["numberMatched"] == 1


def test_the_job_page_names_the_job_only_escaped(api, submit, runner):
    job_id = submit(api)
    page = api.get(f"/jobs/{job_id}", headers={"Accept": BROWSER, "Authorization": ""})
    assert page.status_code == 200
    body = next(a for t, a in parse(page.text).tags if t == "body")
    assert body["data-job"] == job_id and body["data-page"] == "job"
    assert "running" not in page.text and "accepted" not in page.text  # no status in the shell
    odd = api.get('/jobs/"><img src=x>', headers={"Accept": BROWSER, "Authorization": ""})
    assert odd.status_code == 200 and "<img src=x>" not in odd.text
    assert next(a for t, a in parse(odd.text).tags if t == "body")["data-job"] == '"><img src=x>'
    runner.gate.set()


def test_the_script_and_style_are_served_without_a_token(api):
    script = api.get("/static/jobpage.js", headers={"Authorization": ""})
    assert script.status_code == 200
    media = script.headers["content-type"].split(";")[0]
    assert media in {"text/javascript", "application/javascript"}
    assert "sessionStorage" in script.text and "localStorage" not in script.text
    assert not re.search(r"\.(inner|outer)HTML\s*=|insertAdjacentHTML|document\.write", script.text)
    assert api.get("/static/jobpage.css").status_code == 200
    assert api.get("/static/%2e%2e/routes/pages.py").status_code == 404


def test_pages_stay_out_of_the_api_definition(api):
    paths = api.get("/openapi.json").json()["paths"]
    assert set(paths["/jobs"]) == {"get"} and "summary" in paths["/jobs"]["get"]
    assert paths["/jobs"]["get"]["operationId"] != "jobs_page"
    assert "/jobs/{jobID}/report" in paths and "/jobs/{jobID}/figures/{name}" in paths


def _finish_with_report(api, submit, runner, wait_for, settings) -> tuple[str, Path]:
    job_id = submit(api)
    runner.gate.set()
    wait_for(api, job_id, lambda s: s["status"] == "successful")
    out = Path(settings.results_dir) / job_id
    (out / "report.html").write_text('<html><body><img src="dh_map.png"></body></html>')
    (out / "dh_map.png").write_bytes(PNG)
    (out / "secret.png").write_bytes(PNG)
    summary = json.loads((out / "summary.json").read_text())
    (out / "summary.json").write_text(json.dumps(summary | {"figures": ["dh_map.png"]}))
    return job_id, out


def test_the_report_and_its_figures_need_the_owners_token(api, submit, runner, wait_for, settings):
    job_id, _ = _finish_with_report(api, submit, runner, wait_for, settings)
    report = api.get(f"/jobs/{job_id}/report")
    assert report.status_code == 200 and report.headers["content-type"].startswith("text/html")
    assert 'src="dh_map.png"' in report.text
    assert re.match(r"sandbox;", report.headers["content-security-policy"])
    figure = api.get(f"/jobs/{job_id}/figures/dh_map.png")
    assert figure.status_code == 200 and figure.content == PNG
    assert figure.headers["content-type"] == "image/png"
    for name in ("secret.png", "summary.json", "..%2Fsummary.json", "report.html"):
        assert api.get(f"/jobs/{job_id}/figures/{name}").status_code == 404, name
    for path in (f"/jobs/{job_id}/report", f"/jobs/{job_id}/figures/dh_map.png"):
        assert api.get(path, headers={"Authorization": ""}).status_code == 401
        assert api.get(path, headers={"Accept": BROWSER, "Authorization": ""}).status_code == 401
        other = api.get(path, headers=AUTH_B)
        assert other.status_code == 404 and other.json()["detail"].startswith("there is no job")


def test_no_report_while_the_job_runs_or_when_none_was_drawn(api, submit, runner, wait_for):
    job_id = submit(api)
    wait_for(api, job_id, lambda s: s["status"] == "running")
    early = api.get(f"/jobs/{job_id}/report")
    assert early.status_code == 404 and early.json()["type"].endswith("result-not-ready")
    runner.gate.set()
    wait_for(api, job_id, lambda s: s["status"] == "successful")
    missing = api.get(f"/jobs/{job_id}/report")  # the scripted runner draws no report
    assert missing.status_code == 404 and "no report.html" in missing.json()["detail"]


@pytest.mark.parametrize(
    ("server", "status", "report"),
    [
        ("http://127.0.0.1:8000", "running", False),
        ("https://audit.example.org/api/", "successful", True),
        ("http://127.0.0.1:8000/", "failed", False),
    ],
)
def test_the_cli_points_at_the_page_and_a_finished_report(capsys, server, status, report):
    from demaudit.service.cli.remote import print_job_links

    print_job_links(server, "0123abcd", status)
    lines = capsys.readouterr().out.splitlines()
    page = server.rstrip("/") + "/jobs/0123abcd"
    assert lines[0].startswith(f"page: {page} ")
    assert any(line.startswith(f"report: {page}/report ") for line in lines) is report
