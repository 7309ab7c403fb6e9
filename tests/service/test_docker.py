"""What can be checked of docker/ without a Docker engine: command, ports, variables."""

from __future__ import annotations

import re
from pathlib import Path

import yaml

from service.cli import build_parser
from service.settings import Settings

DOCKER = Path(__file__).resolve().parents[2] / "docker"



def _compose() -> dict:
    return yaml.safe_load((DOCKER / "compose.yaml").read_text(encoding="utf-8"))


def _settings_variables() -> set[str]:
    return {f"HEEDFUL_{name.upper()}" for name in Settings.model_fields}


def test_dockerfile_runs_heedful_serve_on_the_exposed_port():
    text = (DOCKER / "Dockerfile").read_text(encoding="utf-8")
    assert re.search(r'^CMD \["heedful", "serve"\]$', text, re.M)
    exposed = re.search(r"^EXPOSE (\d+)$", text, re.M).group(1)
    assert f"HEEDFUL_PORT={exposed}" in text
    for variable in re.findall(r"\b(HEEDFUL_[A-Z_]+)=", text):
        assert variable in _settings_variables(), variable


def test_compose_migrates_before_serving_against_postgresql():
    compose = _compose()["services"]
    parser = build_parser()
    migrate, service = compose["migrate"], compose["service"]
    assert parser.parse_args(migrate["command"][1:]).func is not None
    assert migrate["command"][1:] == ["db", "upgrade"]
    assert service["depends_on"]["migrate"]["condition"] == "service_completed_successfully"
    args = parser.parse_args(service["command"][1:])
    assert args.command == "serve"
    assert service["ports"] == [f"127.0.0.1:{args.port}:{args.port}"]
    for part in (migrate, service):
        for variable in part["environment"]:
            assert variable in _settings_variables(), variable
        url = part["environment"]["HEEDFUL_DATABASE_URL"]
        assert Settings(database_url=url).database_url.startswith("postgresql+psycopg://")
    database = compose["db"]["environment"]
    assert url.endswith(f"@db:5432/{database['POSTGRES_DB']}")


def test_scale_out_compose_shares_database_queue_and_job_folder():
    compose = yaml.safe_load((DOCKER / "compose.scale-out.yaml").read_text(encoding="utf-8"))
    services = compose["services"]
    parser = build_parser()
    replicas = [services["serve-1"], services["serve-2"]]
    worker, migrate = services["worker"], services["migrate"]
    assert migrate["command"][1:] == ["db", "upgrade"]
    ports = set()
    for replica in replicas:
        args = parser.parse_args(replica["command"][1:])
        assert args.command == "serve"
        (mapping,) = replica["ports"]
        assert mapping.endswith(f":{args.port}") and mapping.startswith("127.0.0.1:")
        ports.add(mapping)
        assert replica["environment"]["HEEDFUL_JOB_WORKERS"] == "0"
    assert len(ports) == 2
    args = parser.parse_args(worker["command"][1:])
    assert args.command == "worker" and args.threads >= 1
    jobs = {tuple(part["volumes"]) for part in (*replicas, worker)}
    assert len(jobs) == 1
    (volume,) = jobs.pop()
    for part in (*replicas, worker, migrate):
        environment = part["environment"]
        for variable in environment:
            assert variable in _settings_variables(), variable
        settings = Settings(**{k.removeprefix("HEEDFUL_").lower(): v
                               for k, v in environment.items()})
        assert settings.database_url.startswith("postgresql+psycopg://")
        assert settings.job_broker == "redis://redis:6379/0"
        assert volume.endswith(f":{settings.job_folder}")
    for part in (*replicas, worker):
        assert part["depends_on"]["migrate"]["condition"] == "service_completed_successfully"
    assert "redis" in services and services["db"]["image"].startswith("postgres:")
    dockerfile = (DOCKER / "Dockerfile").read_text(encoding="utf-8")
    assert f"mkdir -p {settings.job_folder}" in dockerfile
