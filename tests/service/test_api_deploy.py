"""docker-compose.yml, Dockerfile and .dockerignore, checked as text and YAML.

Docker cannot run on the machine these tests were written on, so the files are validated here
(YAML parsed with `yaml.safe_load`, every setting name checked against `Settings`), not by
starting containers.
"""

from __future__ import annotations

import json
import shlex
from pathlib import Path
from typing import Any

import pytest
import yaml

from service.cli import build_parser
from service.config import Settings

ROOT = Path(__file__).parents[2]


@pytest.fixture(scope="module")
def compose() -> dict[str, Any]:
    loaded: dict[str, Any] = yaml.safe_load((ROOT / "docker-compose.yml").read_text())
    return loaded


def test_redis_persists_and_reports_health(compose: dict[str, Any]) -> None:
    redis = compose["services"]["redis"]
    assert redis["image"].startswith("redis:7")
    command = redis["command"]
    assert command[command.index("--appendonly") + 1] == "yes"
    assert redis["healthcheck"]["test"] == ["CMD", "redis-cli", "ping"]
    assert any(v.endswith(":/data") for v in redis["volumes"])


def test_api_and_learner_share_one_image(compose: dict[str, Any]) -> None:
    api, learner = compose["services"]["api"], compose["services"]["learner"]
    assert api["build"] == learner["build"] == {"context": ".", "dockerfile": "Dockerfile"}
    assert api["image"] == learner["image"]
    assert (ROOT / api["build"]["dockerfile"]).is_file()


def test_commands_parse_with_the_real_command_line(compose: dict[str, Any]) -> None:
    parser = build_parser()
    api = parser.parse_args(compose["services"]["api"]["command"][1:])
    learner = parser.parse_args(compose["services"]["learner"]["command"][1:])
    assert (api.command, api.workers, api.host) == ("serve", 2, "0.0.0.0")
    assert (learner.command, learner.once) == ("learn", False)


def test_every_environment_name_is_a_setting(compose: dict[str, Any]) -> None:
    fields = set(Settings.model_fields)
    for name in ("api", "learner"):
        environment = compose["services"][name]["environment"]
        assert environment["EMBERSCORE_MODE"] == "production"
        assert environment["EMBERSCORE_REDIS_URL"].startswith("redis://redis:")
        for variable in environment:
            assert variable.startswith("EMBERSCORE_"), variable
            assert variable.removeprefix("EMBERSCORE_").lower() in fields, variable
        # Secrets come from the operator's environment; compose stops if they are missing.
        assert environment["EMBERSCORE_HASH_SECRET"].startswith("${EMBERSCORE_HASH_SECRET:?")
        assert environment["EMBERSCORE_API_KEYS"].startswith("${EMBERSCORE_API_KEYS:?")


def test_healthchecks_and_start_order(compose: dict[str, Any]) -> None:
    services = compose["services"]
    assert "/healthz" in " ".join(services["api"]["healthcheck"]["test"])
    assert services["learner"]["healthcheck"]["test"][0] == "CMD-SHELL"
    assert "/proc/1/cmdline" in services["learner"]["healthcheck"]["test"][1]
    for name in ("api", "learner"):
        assert services[name]["depends_on"]["redis"]["condition"] == "service_healthy"


def test_dockerfile_runs_serve_unprivileged() -> None:
    text = (ROOT / "Dockerfile").read_text()
    lines = [
        line.strip() for line in text.splitlines() if line.strip() and not line.startswith("#")
    ]
    assert lines[0].startswith("FROM python:3.11")
    cmd = [line for line in lines if line.startswith("CMD ")][-1]  # not the HEALTHCHECK one
    assert json.loads(cmd.removeprefix("CMD "))[:2] == ["emberscore", "serve"]
    assert any(line.startswith("USER ") and "root" not in line for line in lines)
    copied = [shlex.split(line)[1:-1] for line in lines if line.startswith("COPY ")]
    for sources in copied:
        for source in sources:
            assert source == "README.md" or (ROOT / source).exists(), source


def test_dockerignore_keeps_local_state_out() -> None:
    ignored = set((ROOT / ".dockerignore").read_text().split())
    assert {".venv", ".git", "tests"} <= ignored
