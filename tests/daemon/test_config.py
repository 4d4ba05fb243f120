"""Configuration loading: layers, validation messages, unknown keys."""

from __future__ import annotations

from pathlib import Path

import pytest

from mailweir.daemon.config import ConfigSource, env_name, load_settings, parse_host_port
from mailweir.daemon.errors import ConfigError
from mailweir.daemon.settings import HostPort, Settings

FULL_EXAMPLE = """\
state_dir = "{state}"

[smtp]
listen = "127.0.0.1:2625"
hostname = "filter.harbourlane.example"
max_message_bytes = 10_485_760
max_recipients = 200
max_connections = 50
command_timeout = 120.0
tls_cert = "{state}/cert.pem"
tls_key = "{state}/key.pem"

[next_hop]
address = "[::1]:2626"
connect_timeout = 10
command_timeout = 30.0
data_timeout = 300.0
helo_name = "filter.harbourlane.example"

[policy]
mode = "enforce"
position = "before-queue"
suspect_threshold = 0.6
spam_threshold = 0.95
ham_action = "pass"
suspect_action = "tag"
spam_action = "reject"
subject_prefix = "[spam?]"
quarantine_mailbox = "quarantine@harbourlane.example"
min_trained = 20
on_scoring_failure = "tempfail"

[model]
database = "sqlite:///{state}/other.sqlite3"
method = "bernoulli"
cache_tokens = 5000
staleness_seconds = 1.5
scoring_workers = 1
max_concurrent_scoring = 4

[http]
listen = "127.0.0.1:2680"
token = "a-long-random-token"

[log]
verdict_retention_days = 7
verdict_batch_seconds = 0.25
level = "debug"
format = "json"
"""


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "mailweir.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_config_defaults_without_file(tmp_path: Path) -> None:
    settings = load_settings(None, env={"XDG_STATE_HOME": str(tmp_path)})
    assert settings.smtp == Settings().smtp
    assert settings.policy == Settings().policy
    assert settings.smtp.listen.host == "127.0.0.1"
    assert settings.next_hop.address.host == "127.0.0.1"
    assert settings.database.endswith("model.sqlite3")


def test_config_default_state_dir_follows_systemd(tmp_path: Path) -> None:
    settings = load_settings(None, env={"STATE_DIRECTORY": str(tmp_path / "svc")})
    assert settings.state_dir == tmp_path / "svc"
    assert settings.database == str(tmp_path / "svc" / "model.sqlite3")


def test_config_full_example(tmp_path: Path) -> None:
    (tmp_path / "cert.pem").write_text("cert")
    (tmp_path / "key.pem").write_text("key")
    path = write(tmp_path, FULL_EXAMPLE.format(state=tmp_path))
    s = load_settings(path, env={})
    assert s.state_dir == tmp_path
    assert s.smtp.listen == HostPort("127.0.0.1", 2625)
    assert s.smtp.max_message_bytes == 10_485_760
    assert s.smtp.tls_cert == tmp_path / "cert.pem"
    assert s.next_hop.address == HostPort("::1", 2626)
    assert s.next_hop.connect_timeout == 10.0 and isinstance(s.next_hop.connect_timeout, float)
    assert s.policy.spam_action == "reject"
    assert s.policy.suspect_threshold == 0.6
    assert s.policy.on_scoring_failure == "tempfail"
    assert s.model.method == "bernoulli"
    assert s.database == f"sqlite:///{tmp_path}/other.sqlite3"
    assert s.http.token == "a-long-random-token"
    assert s.log.format == "json"


def test_config_env_overrides_file(tmp_path: Path) -> None:
    path = write(tmp_path, f'state_dir = "{tmp_path}"\n[policy]\nspam_threshold = 0.9\n')
    env = {"MAILWEIR_POLICY_SPAM_THRESHOLD": "0.97", "MAILWEIR_NEXT_HOP_ADDRESS": "127.0.0.1:9"}
    s = load_settings(path, env=env)
    assert s.policy.spam_threshold == 0.97
    assert s.next_hop.address == HostPort("127.0.0.1", 9)


def test_config_env_top_level_state_dir(tmp_path: Path) -> None:
    s = load_settings(None, env={"MAILWEIR_STATE_DIR": str(tmp_path / "st")})
    assert s.state_dir == tmp_path / "st"


def test_config_flags_override_env(tmp_path: Path) -> None:
    path = write(tmp_path, f'state_dir = "{tmp_path}"\n[smtp]\nlisten = "127.0.0.1:1001"\n')
    env = {"MAILWEIR_SMTP_LISTEN": "127.0.0.1:1002"}
    s = ConfigSource(path, env, {"smtp.listen": "127.0.0.1:1003"}).load()
    assert s.smtp.listen.port == 1003
    assert load_settings(path, env).smtp.listen.port == 1002


def test_config_env_name_matches_reader() -> None:
    assert env_name("policy.spam_threshold") == "MAILWEIR_POLICY_SPAM_THRESHOLD"
    assert env_name("state_dir") == "MAILWEIR_STATE_DIR"


def test_config_unrelated_mailweir_env_ignored(tmp_path: Path) -> None:
    env = {"MAILWEIR_TEST_POSTGRES_URL": "postgresql://x", "MAILWEIR_CONFIG": "/nowhere"}
    load_settings(None, env={**env, "MAILWEIR_STATE_DIR": str(tmp_path)})


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ("[policy]\nspam_cutof = 0.9\n", "policy.spam_cutof"),
        ("[polcy]\nspam_threshold = 0.9\n", "polcy"),
        ('statedir = "/tmp"\n', "statedir"),
    ],
)
def test_config_unknown_key_in_file_rejected(tmp_path: Path, text: str, key: str) -> None:
    with pytest.raises(ConfigError) as caught:
        load_settings(write(tmp_path, text), env={"MAILWEIR_STATE_DIR": str(tmp_path)})
    assert caught.value.key == key
    assert "unknown" in caught.value.reason


def test_config_unknown_key_in_env_rejected(tmp_path: Path) -> None:
    env = {"MAILWEIR_POLICY_SPAM_CUTOF": "0.9", "MAILWEIR_STATE_DIR": str(tmp_path)}
    with pytest.raises(ConfigError) as caught:
        load_settings(None, env=env)
    assert caught.value.key == "policy.spam_cutof"
    assert "MAILWEIR_POLICY_SPAM_CUTOF" in caught.value.reason


# Each row: a TOML fragment with one bad value, the key the error must name, and a piece of
# the reason (the value or the expectation).
BAD_VALUES = [
    ('[smtp]\nlisten = "localhost"\n', "smtp.listen", "host:port"),
    ('[smtp]\nlisten = "127.0.0.1:70000"\n', "smtp.listen", "70000"),
    ("[smtp]\nlisten = 25\n", "smtp.listen", "25"),
    ("[smtp]\nmax_message_bytes = 0\n", "smtp.max_message_bytes", "at least 1"),
    ('[smtp]\nmax_message_bytes = "big"\n', "smtp.max_message_bytes", "whole number"),
    ("[smtp]\nmax_recipients = 0\n", "smtp.max_recipients", "0"),
    ("[smtp]\nmax_connections = -1\n", "smtp.max_connections", "-1"),
    ("[smtp]\ncommand_timeout = 0\n", "smtp.command_timeout", "> 0"),
    ('[smtp]\ntls_cert = "/nonexistent/c.pem"\n', "smtp.tls_key", "both"),
    ('[smtp]\ntls_key = "/nonexistent/k.pem"\n', "smtp.tls_cert", "both"),
    (
        '[smtp]\ntls_cert = "/nonexistent/c.pem"\ntls_key = "/nonexistent/k.pem"\n',
        "smtp.tls_cert",
        "readable file",
    ),
    ('[next_hop]\naddress = "127.0.0.1:0"\n', "next_hop.address", "1..65535"),
    ('[next_hop]\naddress = "::1:25"\n', "next_hop.address", "[addr]"),
    ("[next_hop]\nconnect_timeout = -5\n", "next_hop.connect_timeout", "-5"),
    ('[next_hop]\ncommand_timeout = "soon"\n', "next_hop.command_timeout", "a number"),
    ("[next_hop]\ndata_timeout = 0\n", "next_hop.data_timeout", "> 0"),
    ('[policy]\nmode = "loud"\n', "policy.mode", "'observe'"),
    ('[policy]\nposition = "middle"\n', "policy.position", "'before-queue'"),
    ("[policy]\nspam_threshold = 1.5\n", "policy.spam_threshold", "0 to 1"),
    ("[policy]\nsuspect_threshold = -0.1\n", "policy.suspect_threshold", "0 to 1"),
    (
        "[policy]\nsuspect_threshold = 0.9\nspam_threshold = 0.8\n",
        "policy.suspect_threshold",
        "policy.spam_threshold",
    ),
    ('[policy]\nspam_action = "drop"\n', "policy.spam_action", "'reroute'"),
    ('[policy]\nspam_action = "reroute"\n', "policy.spam_action", "quarantine_mailbox"),
    ('[policy]\nsuspect_action = "reject"\n', "policy.suspect_action", "before-queue"),
    ('[policy]\nham_action = "reroute"\n', "policy.ham_action", "pass or tag"),
    ('[policy]\nquarantine_mailbox = "nobody"\n', "policy.quarantine_mailbox", "local@domain"),
    ("[policy]\nmin_trained = -1\n", "policy.min_trained", "-1"),
    ("[policy]\nmin_trained = 1.5\n", "policy.min_trained", "whole number"),
    ('[policy]\non_scoring_failure = "drop"\n', "policy.on_scoring_failure", "'tempfail'"),
    ('[model]\nmethod = "crystal-ball"\n', "model.method", "crystal-ball"),
    ("[model]\ncache_tokens = -1\n", "model.cache_tokens", "0 or more"),
    ("[model]\nstaleness_seconds = -1\n", "model.staleness_seconds", "0 or more"),
    ("[model]\nscoring_workers = 0\n", "model.scoring_workers", "1..256"),
    ("[model]\nmax_concurrent_scoring = 0\n", "model.max_concurrent_scoring", "at least 1"),
    ("[model]\ndatabase = 5\n", "model.database", "a string"),
    ('[http]\nlisten = "127.0.0.1:-1"\n', "http.listen", "host:port"),
    ("[http]\ntoken = true\n", "http.token", "a string"),
    ("[log]\nverdict_retention_days = -1\n", "log.verdict_retention_days", "0 or more"),
    ("[log]\nverdict_batch_seconds = 0\n", "log.verdict_batch_seconds", "0 < s"),
    ('[log]\nlevel = "chatty"\n', "log.level", "chatty"),
    ('[log]\nformat = "xml"\n', "log.format", "'json'"),
    ('state_dir = ""\n', "state_dir", "non-empty path"),
    ("smtp = 3\n", "smtp", "table"),
]


@pytest.mark.parametrize(("text", "key", "fragment"), BAD_VALUES)
def test_config_bad_value_names_key(tmp_path: Path, text: str, key: str, fragment: str) -> None:
    env = {} if text.startswith("state_dir") else {"MAILWEIR_STATE_DIR": str(tmp_path)}
    with pytest.raises(ConfigError) as caught:
        load_settings(write(tmp_path, text), env=env)
    assert caught.value.key == key
    assert fragment in caught.value.reason
    assert str(caught.value).startswith(f"{key}: ")


def test_config_bad_env_value_names_variable(tmp_path: Path) -> None:
    env = {"MAILWEIR_POLICY_MIN_TRAINED": "many", "MAILWEIR_STATE_DIR": str(tmp_path)}
    with pytest.raises(ConfigError) as caught:
        load_settings(None, env=env)
    assert caught.value.key == "policy.min_trained"
    assert "'many'" in caught.value.reason
    assert "MAILWEIR_POLICY_MIN_TRAINED" in caught.value.reason


def test_config_missing_file_names_path(tmp_path: Path) -> None:
    with pytest.raises(ConfigError) as caught:
        load_settings(tmp_path / "absent.toml", env={})
    assert "absent.toml" in caught.value.reason


def test_config_broken_toml_rejected(tmp_path: Path) -> None:
    with pytest.raises(ConfigError) as caught:
        load_settings(write(tmp_path, "[policy\n"), env={})
    assert "TOML" in caught.value.reason


def test_config_empty_tls_means_none(tmp_path: Path) -> None:
    env = {"MAILWEIR_SMTP_TLS_CERT": "", "MAILWEIR_STATE_DIR": str(tmp_path)}
    assert load_settings(None, env=env).smtp.tls_cert is None


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("127.0.0.1:25", HostPort("127.0.0.1", 25)),
        ("[::1]:2525", HostPort("::1", 2525)),
        ("mx.harbourlane.example:587", HostPort("mx.harbourlane.example", 587)),
    ],
)
def test_config_parse_host_port(text: str, expected: HostPort) -> None:
    assert parse_host_port(text) == expected
    assert parse_host_port(str(expected)) == expected


def test_config_range_error_names_where_the_value_came_from(tmp_path: Path) -> None:
    env = {"MAILWEIR_POLICY_SPAM_THRESHOLD": "1.5", "MAILWEIR_STATE_DIR": str(tmp_path)}
    with pytest.raises(ConfigError) as caught:
        load_settings(None, env=env)
    assert caught.value.key == "policy.spam_threshold"
    assert "MAILWEIR_POLICY_SPAM_THRESHOLD" in caught.value.reason
    source = ConfigSource(
        None,
        env={},
        flags={"smtp.listen": "127.0.0.1:70000"},
        flag_names={"smtp.listen": "--listen"},
    )
    with pytest.raises(ConfigError) as caught:
        source.load()
    assert "--listen" in caught.value.reason
