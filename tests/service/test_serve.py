"""Start-up safety of ``demaudit serve``, settings from the environment, JSON logs."""

from __future__ import annotations

import json
import logging
from pathlib import Path

import pytest

from service import cli
from service.app import JsonFormatter, check_serving
from service.jobs import current_job_id
from service.settings import Settings, get_settings

TOKEN = "serve-token-0123456789"


@pytest.fixture
def clean_env(monkeypatch):
    for name in ("DEMAUDIT_API_TOKENS", "DEMAUDIT_DATA_ROOTS", "DEMAUDIT_INSECURE_LOCAL"):
        monkeypatch.delenv(name, raising=False)
    get_settings.cache_clear()
    yield monkeypatch
    get_settings.cache_clear()


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["serve"], "DEMAUDIT_API_TOKENS"),
        (["serve", "--insecure-local", "--host", "0.0.0.0"], "loopback"),
        (["serve", "--insecure-local", "--host", "192.168.1.4"], "loopback"),
    ],
)
def test_serve_refuses_unsafe_settings_before_starting(clean_env, capsys, argv, message):
    assert cli.main(argv) == 2
    assert message in capsys.readouterr().err


def test_serve_needs_data_roots_when_it_has_tokens(clean_env, capsys):
    clean_env.setenv("DEMAUDIT_API_TOKENS", TOKEN)
    assert cli.main(["serve"]) == 2
    assert "DEMAUDIT_DATA_ROOTS" in capsys.readouterr().err


@pytest.mark.parametrize("host", ["127.0.0.1", "::1", "localhost", "127.0.0.2"])
def test_insecure_local_is_allowed_on_loopback(host):
    check_serving(Settings(insecure_local=True), host=host)


def test_list_settings_take_commas_or_json(clean_env, tmp_path):
    clean_env.setenv("DEMAUDIT_API_TOKENS", f"{TOKEN}, second-token-0123456789")
    clean_env.setenv("DEMAUDIT_DATA_ROOTS", json.dumps([str(tmp_path), "/srv/dem"]))
    settings = Settings()
    assert settings.api_tokens == (TOKEN, "second-token-0123456789")
    assert settings.data_roots == (tmp_path, Path("/srv/dem"))


def test_short_tokens_are_refused(clean_env):
    clean_env.setenv("DEMAUDIT_API_TOKENS", "secret")
    with pytest.raises(ValueError, match="16 characters"):
        Settings()


def test_log_lines_are_json_with_the_job_id():
    record = logging.LogRecord(
        "demaudit.jobs", logging.INFO, __file__, 1, "job %s", ("started",), None
    )
    token = current_job_id.set("0123456789abcdef0123456789abcdef")
    try:
        line = json.loads(JsonFormatter().format(record))
    finally:
        current_job_id.reset(token)
    assert line["message"] == "job started" and line["level"] == "INFO"
    assert line["job_id"] == "0123456789abcdef0123456789abcdef"
    assert line["time"].endswith("Z")
