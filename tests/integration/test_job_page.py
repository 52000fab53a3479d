"""The job pages in a real browser: Debian's chromium, driven headless through Debian's
chromedriver (Selenium), against a live ``demaudit serve`` on loopback with its own local Dask
cluster, auditing a copy of the demo archive (36 tiles).

The browser opens the list, is asked for the token, sees the job it did not know of appear,
opens it, watches the progress number grow while the job runs, and sees the report's figures
load; screenshots go to the test's folder (and the last one to /tmp/jobpage.png).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
import yaml
from PIL import Image

from tests.support.processes import VENV_BIN, Process, free_port

pytestmark = [pytest.mark.browser, pytest.mark.slow]

REPO = Path(__file__).resolve().parents[2]
CHROMIUM = shutil.which("chromium")
CHROMEDRIVER = shutil.which("chromedriver")
TOKEN = "r7Kd2Qm9XvB4nT6wZ1pL8cH3sJ5yF0gA2eU7iO4kN9b"  # carol (43 URL-safe characters)
PRINCIPALS = f"carol:user:{hashlib.sha256(TOKEN.encode()).hexdigest()}"
FINISHED = {"successful", "failed", "dismissed"}
EXECUTE = "/processes/dem-audit/execution"
SHOT_FOR_PEOPLE = Path("/tmp/jobpage.png")


def _need(program: str | None, name: str) -> str:
    if program is None:
        if os.environ.get("CI"):
            pytest.fail(f"{name} is missing in CI: deploy/setup.sh installs it with --tests")
        pytest.skip(f"{name} is not installed (bash deploy/setup.sh --tests)")
    return program


@pytest.fixture(scope="module")
def server(
    processes: list[Process], tmp_path_factory: pytest.TempPathFactory
) -> Iterator[tuple[str, Path]]:
    """URL and results folder of `demaudit serve` with two local Dask workers and a copy of
    the demo archive as its data root."""
    folder = tmp_path_factory.mktemp("server")
    shutil.copytree(REPO / "demo_tiles", folder / "demo")
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("DEMAUDIT_")}
    env.update(
        {
            "DEMAUDIT_DATA_ROOTS": str(folder / "demo"),
            "DEMAUDIT_PRINCIPALS": PRINCIPALS,
            "DEMAUDIT_JOB_STORE": str(folder / "jobs.sqlite"),
            "DEMAUDIT_RESULTS_DIR": str(folder / "results"),
            "DEMAUDIT_LOCAL_WORKERS": "2",
            "DEMAUDIT_WORKER_MEMORY_LIMIT": "2GiB",
            # one job at a time: jobs submitted ahead of the watched one hold it back (accepted)
            # until its page is open, however fast the demo runs on the machine
            "DEMAUDIT_MAX_RUNNING_JOBS": "1",
        }
    )
    args = [str(VENV_BIN / "demaudit"), "serve", "--host", "127.0.0.1", "--port", str(port)]
    proc = Process(args, folder / "server.log", env=env)
    processes.append(proc)
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 180
    while True:
        assert proc.alive(), "server exited:\n" + proc.tail()
        try:
            if httpx.get(f"{url}/health", timeout=2).json()["cluster"]["workers"] == 2:
                break
        except (httpx.HTTPError, ValueError, KeyError):
            pass
        assert time.monotonic() < deadline, "server did not become ready:\n" + proc.tail()
        time.sleep(0.3)
    yield url, folder / "results"


@pytest.fixture(scope="module")
def browser(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    """Headless chromium through chromedriver, keeping the console log."""
    chromium = _need(CHROMIUM, "chromium")
    chromedriver = _need(CHROMEDRIVER, "chromedriver")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    folder = tmp_path_factory.mktemp("browser")
    options = webdriver.ChromeOptions()
    options.binary_location = chromium
    for flag in (
        "--headless=new",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-dev-shm-usage",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--window-size=1280,1500",
        f"--user-data-dir={folder / 'profile'}",
    ):
        options.add_argument(flag)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    service = Service(executable_path=chromedriver, log_output=str(folder / "chromedriver.log"))
    driver = webdriver.Chrome(service=service, options=options)
    try:
        yield driver
    finally:
        driver.quit()


def wait_for(driver: Any, condition: Callable[[Any], Any], timeout: float, what: str) -> Any:
    from selenium.common.exceptions import TimeoutException
    from selenium.webdriver.support.ui import WebDriverWait

    try:
        return WebDriverWait(driver, timeout, poll_frequency=0.1).until(condition)
    except TimeoutException:
        state = driver.execute_script("return document.body ? document.body.innerText : ''")
        raise AssertionError(f"{what} within {timeout} s; the page says:\n{state}") from None


def text_of(driver: Any, element_id: str) -> str:
    found: str = driver.execute_script(
        "const e = document.getElementById(arguments[0]); return e ? e.textContent : null;",
        element_id,
    )
    return found


def visible(driver: Any, element_id: str) -> bool:
    shown: bool = driver.execute_script(
        "const e = document.getElementById(arguments[0]); return !!e && !e.hidden;", element_id
    )
    return shown


def screenshot(driver: Any, path: Path) -> Path:
    driver.save_screenshot(str(path))
    pixels = np.asarray(Image.open(path).convert("L"), dtype=float)
    assert pixels.std() > 10, f"{path} is blank"  # text and tables, not an empty page
    return path


def demo_spec(name: str, file: str = "demo.yaml") -> dict[str, Any]:
    spec: dict[str, Any] = yaml.safe_load((REPO / "demo_tiles" / file).read_text())
    spec["name"] = name
    return spec


def test_a_person_follows_a_job_from_the_list_to_its_report(server, browser, tmp_path):
    from selenium.webdriver.common.by import By

    server, results = server
    http = httpx.Client(base_url=server, headers={"Authorization": f"Bearer {TOKEN}"}, timeout=30)

    # the list: the shell asks for the token (its first fetch got 401) and shows no jobs yet
    browser.get(f"{server}/jobs")
    wait_for(browser, lambda d: visible(d, "token-panel"), 30, "the token was not asked for")
    field = browser.find_element(By.ID, "token-input")
    field.send_keys(TOKEN)
    browser.find_element(By.CSS_SELECTOR, "#token-form button[type=submit]").click()
    wait_for(browser, lambda d: text_of(d, "list-state") == "no jobs yet", 30, "no empty list")
    assert not visible(browser, "token-panel") and visible(browser, "forget-token")
    assert browser.execute_script("return sessionStorage.getItem('demaudit.token')") == TOKEN
    assert TOKEN not in browser.current_url
    before_token = [e["message"] for e in browser.get_log("browser") if e["level"] == "SEVERE"]
    assert all("401" in message for message in before_token), before_token

    # a job submitted meanwhile appears in the list (it polls), with a link to its page. Two
    # jobs ahead of it keep it waiting while the list refreshes and its page opens, and it
    # co-registers (its tiles run twice): the demo's 36 tiles otherwise run in about two
    # seconds, too short for a page that polls every second to see the progress move
    for ahead in ("browser-ahead-1", "browser-ahead-2"):
        response = http.post(EXECUTE, json={"inputs": demo_spec(ahead)})
        assert response.status_code == 201, response.text
    watched = demo_spec("browser-watched", "demo_coregistered.yaml")
    response = http.post(EXECUTE, json={"inputs": watched})
    assert response.status_code == 201, response.text
    job_id = response.json()["jobID"]
    row = f"#jobs tr[data-job='{job_id}'] a"
    link = wait_for(
        browser, lambda d: d.find_elements(By.CSS_SELECTOR, row), 30, "the job was not listed"
    )[0]
    screenshot(browser, tmp_path / "jobs.png")
    link.click()
    wait_for(browser, lambda d: d.current_url == f"{server}/jobs/{job_id}", 30, "no job page")
    assert TOKEN not in browser.current_url

    # progress grows while the job runs; the page polls the JSON with the token
    seen: list[tuple[str, int]] = []
    deadline = time.monotonic() + 600
    running_shot = None
    while True:
        status, progress = text_of(browser, "status"), text_of(browser, "progress")
        if status and (not seen or seen[-1] != (status, int(progress))):
            seen.append((status, int(progress)))
            if status == "running" and 0 < int(progress) < 100 and running_shot is None:
                running_shot = screenshot(browser, tmp_path / "running.png")
        if status in FINISHED:
            break
        assert time.monotonic() < deadline, f"the job did not end; seen {seen}"
        time.sleep(0.1)
    assert seen[-1] == ("successful", 100), (seen, text_of(browser, "message"))
    while_running = [p for s, p in seen if s == "running"]
    assert len(set(while_running)) >= 2, f"the progress was not seen advancing: {seen}"
    assert [p for _, p in seen] == sorted(p for _, p in seen)  # never goes back
    assert text_of(browser, "tiles-done") == text_of(browser, "tiles-total") == "36"

    # the report, inside the page's sandboxed frame, with every figure decoded
    summary = json.loads((results / job_id / "summary.json").read_text())
    figures = summary["figures"]  # file names (a list, or a mapping to what each shows)
    assert figures, "the run drew no figures"
    wait_for(
        browser,
        lambda d: d.find_element(By.ID, "report").get_attribute("srcdoc"),
        60,
        "the report was not shown",
    )
    frame = browser.find_element(By.ID, "report")
    assert frame.get_attribute("sandbox") == ""  # no scripts, an opaque origin
    browser.switch_to.frame(frame)
    try:
        widths = wait_for(
            browser,
            lambda d: d.execute_script(
                "const imgs = [...document.images];"
                "return imgs.length && imgs.every(i => i.complete && i.naturalWidth > 0)"
                "  ? imgs.map(i => i.naturalWidth) : false;"
            ),
            60,
            "the report's figures did not load",
        )
        heading = browser.execute_script("return document.querySelector('h1').textContent")
    finally:
        browser.switch_to.default_content()
    assert len(widths) >= len(figures) and min(widths) > 0
    assert "browser-watched" in heading
    browser.execute_script("window.scrollTo(0, 0)")
    shot = screenshot(browser, tmp_path / "jobpage.png")
    shutil.copyfile(shot, SHOT_FOR_PEOPLE)
    assert running_shot is not None  # a view of the running job was taken too

    # the page broke none of its own Content-Security-Policy and logged no error
    problems = [
        entry["message"]
        for entry in browser.get_log("browser")
        if entry["level"] == "SEVERE" or "Content Security Policy" in entry["message"]
    ]
    assert problems == []

    # the CLI points at the page and the report
    env = {k: v for k, v in os.environ.items() if not k.startswith("DEMAUDIT_")}
    status = subprocess.run(
        [str(VENV_BIN / "demaudit"), "status", job_id, "--server", server, "--token", TOKEN],
        capture_output=True,
        text=True,
        timeout=60,
        env=env,
    )
    assert status.returncode == 0, status.stderr
    assert f"page: {server}/jobs/{job_id} " in status.stdout
    assert f"report: {server}/jobs/{job_id}/report " in status.stdout

    # someone else's or a made-up job: the page says there is none; forgetting the token works
    browser.get(f"{server}/jobs/{'f' * 32}")
    wait_for(
        browser,
        lambda d: (text_of(d, "job-state") or "").startswith("there is no job"),
        30,
        "an unknown job was not refused",
    )
    browser.find_element(By.ID, "forget-token").click()
    wait_for(browser, lambda d: visible(d, "token-panel"), 30, "the token was not forgotten")
    assert browser.execute_script("return sessionStorage.getItem('demaudit.token')") is None
    http.close()
