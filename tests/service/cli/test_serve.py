"""Start-up safety of ``demaudit serve``, settings from the environment, JSON logs."""

from __future__ import annotations

import base64
import hashlib
import json
import logging
from pathlib import Path

import pytest

from demaudit.service.api.app import JsonFormatter, check_serving
from demaudit.service.api.auth import (
    check_token,
    estimated_bits,
    hash_token,
    load_principals,
    new_token,
)
from demaudit.service.cli import main as cli
from demaudit.service.run.job_thread import current_job_id
from demaudit.service.settings import Settings
from tests.service.tokens import PRINCIPALS, TOKEN, TOKEN_B


@pytest.fixture
def clean_env(monkeypatch):
    names = (
        "DEMAUDIT_API_TOKENS",
        "DEMAUDIT_PRINCIPALS",
        "DEMAUDIT_PRINCIPALS_FILE",
        "DEMAUDIT_DATA_ROOTS",
        "DEMAUDIT_INSECURE_LOCAL",
    )
    for name in names:
        monkeypatch.delenv(name, raising=False)
    return monkeypatch


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["serve"], "DEMAUDIT_PRINCIPALS"),
        (["serve", "--insecure-local", "--host", "0.0.0.0"], "loopback"),
        (["serve", "--insecure-local", "--host", "192.168.1.4"], "loopback"),
    ],
)
def test_serve_refuses_unsafe_settings_before_starting(clean_env, capsys, argv, message):
    assert cli.main(argv) == 2
    assert message in capsys.readouterr().err


def test_serve_needs_data_roots_when_it_has_tokens(clean_env, capsys):
    clean_env.setenv("DEMAUDIT_PRINCIPALS", ",".join(PRINCIPALS))
    assert cli.main(["serve"]) == 2
    assert "DEMAUDIT_DATA_ROOTS" in capsys.readouterr().err


def test_insecure_local_with_principals_still_serves_on_loopback_only(clean_env, capsys):
    """Issue 17: --insecure-local plus a token bound every interface with no data roots."""
    clean_env.setenv("DEMAUDIT_PRINCIPALS", PRINCIPALS[0])
    assert cli.main(["serve", "--insecure-local", "--host", "0.0.0.0"]) == 2
    assert "loopback" in capsys.readouterr().err


@pytest.mark.parametrize("host", ["127.0.0.1", "::1", "localhost", "127.0.0.2"])
def test_insecure_local_is_allowed_on_loopback(host):
    check_serving(Settings(insecure_local=True), host=host)


def test_list_settings_take_commas_or_json(clean_env, tmp_path):
    clean_env.setenv("DEMAUDIT_API_TOKENS", f"{TOKEN}, {TOKEN_B}")
    clean_env.setenv("DEMAUDIT_PRINCIPALS", json.dumps(list(PRINCIPALS)))
    clean_env.setenv("DEMAUDIT_DATA_ROOTS", json.dumps([str(tmp_path), "/srv/dem"]))
    settings = Settings()
    assert settings.api_tokens == (TOKEN, TOKEN_B)
    assert settings.principals == PRINCIPALS
    assert settings.data_roots == (tmp_path, Path("/srv/dem"))


# --- the token policy (issue 17: a 15-character token gave a traceback, 16 spaces passed) ---

WEAK = [
    "a" * 15,
    " " * 16,
    "abcdefghijklmno",
    "test-token-0123456789",  # 21 characters of lower case, digits and '-': ~110 bits at most
    "0123456789abcdef0123456789abcde",  # 31 hex digits: 124 bits
    "1" * 64,  # long but one character
    "abababababababababababababababababababab",
    TOKEN[:21],  # 21 base64url characters: 126 bits
    TOKEN[:30] + " " + TOKEN[30:],  # whitespace inside
    "tokén" + TOKEN,  # not ASCII
]


@pytest.mark.parametrize("weak", WEAK)
def test_weak_tokens_are_refused_with_one_line_at_start_up(clean_env, capsys, tmp_path, weak):
    clean_env.setenv("DEMAUDIT_API_TOKENS", json.dumps([weak]))
    clean_env.setenv("DEMAUDIT_DATA_ROOTS", str(tmp_path))
    assert cli.main(["serve"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("demaudit: error: ")
    assert "Traceback" not in err and "token new" in err
    if weak.strip():
        assert weak not in err  # the message never repeats the token


@pytest.mark.parametrize(
    "strong",
    [
        TOKEN,
        TOKEN[:22],  # 22 base64url characters: 132 bits (of which a URL-safe token has all)
        "0f1e2d3c4b5a69788796a5b4c3d2e1f0",  # 32 hex digits: 128 bits
        new_token(),
    ],
)
def test_tokens_of_128_bits_pass(strong):
    assert check_token(strong) == strong
    assert estimated_bits(strong) >= 128


def test_new_tokens_carry_256_bits_and_differ():
    tokens = {new_token() for _ in range(100)}
    assert len(tokens) == 100
    # 32 random bytes each (secrets.token_urlsafe(32), Python docs): 43 URL-safe base64
    # characters. estimated_bits judges a token by the character classes it happens to use (a
    # random token without a digit scores 247 bits), so the policy's floor is what it must pass.
    assert all(len(base64.urlsafe_b64decode(t + "=")) == 32 for t in tokens)
    assert all(len(t) == 43 and estimated_bits(t) >= 128 for t in tokens)


@pytest.mark.parametrize(
    ("line", "words"),
    [
        ("alice:user", "name:role:sha256hex"),
        ("alice:owner:" + "0" * 64, "role"),
        ("alice:user:" + "0" * 63, "64 hex"),
        ("al ice:user:" + "0" * 64, "name"),
        ("alice:user:" + hash_token(TOKEN) + ",alice:admin:" + hash_token(TOKEN_B), "twice"),
        ("alice:user:" + hash_token(TOKEN) + ",bob:user:" + hash_token(TOKEN), "another"),
    ],
)
def test_bad_principal_entries_are_refused_naming_the_entry(
    clean_env, capsys, tmp_path, line, words
):
    clean_env.setenv("DEMAUDIT_PRINCIPALS", line)
    clean_env.setenv("DEMAUDIT_DATA_ROOTS", str(tmp_path))
    assert cli.main(["serve"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and words in err and "Traceback" not in err


def test_principals_come_from_a_file_with_comments(tmp_path):
    path = tmp_path / "principals"
    path.write_text(f"# who may call\n\n{PRINCIPALS[0]}\n  {PRINCIPALS[2]}  \n")
    principals = load_principals(file=path)
    assert principals.names() == ["alice", "root"]
    assert principals.identify(TOKEN) is not None and not principals.identify(TOKEN).admin
    assert principals.identify(TOKEN_B) is None


def test_plain_tokens_become_user_principals_named_by_their_hash():
    principals = load_principals(plain_tokens=[TOKEN])
    found = principals.identify(TOKEN)
    assert found is not None and not found.admin
    assert found.name == "token-" + hashlib.sha256(TOKEN.encode()).hexdigest()[:8]


def test_token_new_prints_a_token_and_its_principal_line(capsys):
    assert cli.main(["token", "new", "--name", "ops", "--admin"]) == 0
    out = capsys.readouterr().out
    token = next(line.split()[-1] for line in out.splitlines() if line.startswith("token:"))
    line = next(line.split()[-1] for line in out.splitlines() if line.startswith("DEMAUDIT"))
    check_token(token)
    assert line == f"ops:admin:{hashlib.sha256(token.encode()).hexdigest()}"
    found = load_principals(entries=[line]).identify(token)
    assert found is not None and found.name == "ops" and found.admin


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
