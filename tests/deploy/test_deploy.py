"""deploy/ agrees with the code: the settings example, the image, compose and the systemd unit.

No container engine or systemd runs here: the files are parsed and checked against
``curvekeeper.config.Settings`` and ``curvekeeper.cli.build_parser()``. Where a tool exists
(PyYAML, ``systemd-analyze``) it is used; without it those tests skip and say why.
"""

from __future__ import annotations

import importlib
import json
import os
import re
import shlex
import shutil
import subprocess
import sys
import textwrap
import threading
import tomllib
from collections.abc import Iterator
from dataclasses import dataclass, fields
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path, PurePosixPath
from typing import Any
from urllib.parse import urlsplit

import pytest
from curvekeeper.cli import build_parser
from curvekeeper.config import PREFIX, Settings
from curvekeeper.core.jit import cache_dir
from sqlalchemy.engine import make_url

ROOT = Path(__file__).parents[2]
DEPLOY = ROOT / "deploy"
ENV_EXAMPLE = DEPLOY / "curvekeeper.env.example"
PG_ENV_EXAMPLE = DEPLOY / "postgres.env.example"
CONTAINERFILE = DEPLOY / "Containerfile"
COMPOSE = DEPLOY / "compose.yaml"
COMPOSE_MQTT = DEPLOY / "compose.mqtt.yaml"
MQTT_ENV_EXAMPLE = DEPLOY / "mqtt.env.example"
UNIT = DEPLOY / "curvekeeper.service"
README = DEPLOY / "README.md"

# the operator's own copies of the examples (deploy/.gitignore): secrets, not ours to check
LOCAL_COPIES = {line.strip() for line in (DEPLOY / ".gitignore").read_text().splitlines()
                if line.strip() and not line.startswith("#")}
FIELDS = {PREFIX + f.name.upper(): f for f in fields(Settings)}
DEFAULTS = Settings()
SETTING_TOKEN = re.compile(r"CURVEKEEPER_[A-Z0-9_]*[A-Z0-9]")


def deploy_files() -> list[Path]:
    return sorted(p for p in DEPLOY.iterdir() if p.is_file() and p.name not in LOCAL_COPIES)


def parse_cli(argv: list[str]) -> Any:
    """``curvekeeper ARGV`` as the real parser reads it; a failure names the command."""
    assert argv and argv[0] == "curvekeeper", f"the command runs {argv[:1]}, not curvekeeper"
    try:
        return build_parser().parse_args(argv[1:])
    except SystemExit as exc:  # argparse exits on an unknown subcommand or option
        pytest.fail(f"`{shlex.join(argv)}` is not a valid curvekeeper command line (exit {exc.code})")


def console_scripts() -> dict[str, str]:
    return dict(tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["scripts"])


# --- the settings example ---------------------------------------------------------------

ASSIGNMENT = re.compile(r"^(#\s*)?(CURVEKEEPER_[A-Z0-9_]+)=(.*)$")


@dataclass(frozen=True)
class Assignment:
    name: str
    value: str
    active: bool  # not commented out
    lineno: int


def env_assignments(path: Path = ENV_EXAMPLE) -> list[Assignment]:
    """Every ``CURVEKEEPER_X=value`` line, commented out or not."""
    out = []
    for n, raw in enumerate(path.read_text().splitlines(), 1):
        m = ASSIGNMENT.match(raw.strip())
        if m:
            out.append(Assignment(m[2], m[3], m[1] is None, n))
    return out


def env_blocks(path: Path = ENV_EXAMPLE) -> dict[str, str]:
    """The comment of each setting: from its ``# CURVEKEEPER_X: what it does`` heading to
    the next blank line, without the '#'."""
    blocks: dict[str, list[str]] = {}
    current: list[str] | None = None
    for raw in path.read_text().splitlines():
        line = raw.strip()
        heading = re.match(r"^#\s*(CURVEKEEPER_[A-Z0-9_]+):\s*(.*)$", line)
        if heading:
            assert heading[1] not in blocks, f"{heading[1]} is described twice"
            current = blocks[heading[1]] = [heading[2]]
        elif not line:
            current = None
        elif current is not None:
            current.append(line.lstrip("#").strip())
    return {name: "\n".join(lines) for name, lines in blocks.items()}


def field_value(var: str, raw: str) -> Any:
    return getattr(Settings.from_env({var: raw}), FIELDS[var].name)


def test_env_example_names_exactly_the_settings_fields() -> None:
    named = {a.name for a in env_assignments()}
    assert not named - set(FIELDS), f"the example sets variables Settings does not read: {named - set(FIELDS)}"
    assert not set(FIELDS) - named, f"Settings fields missing from the example: {set(FIELDS) - named}"
    # prose too: every CURVEKEEPER_ name mentioned anywhere in deploy/ is a real setting
    for path in deploy_files():
        unknown = set(SETTING_TOKEN.findall(path.read_text())) - set(FIELDS)
        assert not unknown, f"{path.name} mentions settings that do not exist: {sorted(unknown)}"


def test_env_example_says_what_each_setting_does_and_its_true_default() -> None:
    blocks = env_blocks()
    for var, f in FIELDS.items():
        block = blocks.get(var)
        assert block, f"{var}: no '# {var}: what it does' comment"
        assert len(block.split("\n")[0].split()) >= 3, f"{var}: the comment does not say what it does"
        m = re.search(r"Default:\s*(\S+?)[.,;)]?(?:\s|$)", block)
        assert m, f"{var}: the comment gives no 'Default: ...'"
        documented = m[1]
        actual = getattr(DEFAULTS, f.name)
        if actual is None:
            assert documented == "unset", f"{var}: default is unset, the example says {documented}"
        elif documented == "empty":  # empty, or derived from other settings when left empty
            assert field_value(var, "") == actual, f"{var}: the example says empty, Settings says {actual!r}"
        else:
            assert field_value(var, documented) == actual, (
                f"{var}: the example says the default is {documented}, Settings says {actual!r}")


def test_env_example_values_are_accepted_by_settings_and_the_app() -> None:
    from curvekeeper.api import create_app

    environ: dict[str, str] = {}
    for a in sorted(env_assignments(), key=lambda a: a.active):  # active lines win
        where = f"{ENV_EXAMPLE.name}:{a.lineno} {a.name}"
        # one format for systemd's EnvironmentFile=, compose's env_file and docker --env-file
        assert a.value and a.value == a.value.strip(), f"{where}: empty value or surrounding spaces"
        assert not re.search(r"""["'#\s]""", a.value), f"{where}: quotes, spaces or '#' in the value"
        try:
            parsed = field_value(a.name, a.value)
        except ValueError as exc:
            pytest.fail(f"{where}={a.value} is refused by Settings.from_env: {exc}")
        if isinstance(parsed, int | float) and not isinstance(parsed, bool):
            assert parsed > 0, f"{where}: {parsed} is not a usable limit"
        environ[a.name] = a.value
    settings = Settings.from_env(environ)
    assert settings.database_url == environ["CURVEKEEPER_DATABASE_URL"]
    create_app(settings)  # the log level and limits are usable (no store is opened)


def test_env_example_activates_no_secret_and_keeps_the_listening_defaults() -> None:
    active = {a.name: a for a in env_assignments() if a.active}
    # a placeholder admin secret left active would be a well-known admin key
    assert "CURVEKEEPER_ADMIN_KEY" not in active
    admin = [a for a in env_assignments() if a.name == "CURVEKEEPER_ADMIN_KEY"]
    assert all("REPLACE" in a.value for a in admin), "the example admin key must read as a placeholder"
    # the image sets CURVEKEEPER_HOST=0.0.0.0 (needed in a container): an active line would undo it
    assert "CURVEKEEPER_HOST" not in active and "CURVEKEEPER_PORT" not in active
    text = ENV_EXAMPLE.read_text()
    assert "token_urlsafe" in text and "revok" in text and "/v1/keys" in text, "admin key advice"


def test_postgres_password_of_both_examples_agree() -> None:
    url = make_url(next(a.value for a in env_assignments() if a.active and a.name == "CURVEKEEPER_DATABASE_URL"))
    assert url.drivername == "postgresql+psycopg"
    pg = dict(line.split("=", 1) for line in PG_ENV_EXAMPLE.read_text().splitlines()
              if line.strip() and not line.lstrip().startswith("#"))
    assert set(pg) == {"POSTGRES_PASSWORD"}
    assert url.password == pg["POSTGRES_PASSWORD"], "the two examples would not let the service log in"


# --- the Containerfile ------------------------------------------------------------------

def instructions(path: Path = CONTAINERFILE) -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) with continuation lines joined and comments dropped."""
    out: list[tuple[str, str]] = []
    pending = ""
    for raw in path.read_text().splitlines():
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        if line.endswith("\\"):
            pending += line[:-1] + " "
            continue
        line, pending = pending + line, ""
        keyword, _, rest = line.partition(" ")
        out.append((keyword.upper(), rest.strip()))
    assert not pending, "the Containerfile ends inside a continued line"
    return out


def args_of(keyword: str) -> list[str]:
    return [rest for k, rest in instructions() if k == keyword]


def image_env() -> dict[str, str]:
    env: dict[str, str] = {}
    for rest in args_of("ENV"):
        for word in shlex.split(rest):
            key, sep, value = word.partition("=")
            assert sep, f"ENV {rest}: use the KEY=value form"
            env[key] = value
    return env


def exec_form(rest: str, keyword: str) -> list[str]:
    try:
        argv = json.loads(rest)
    except json.JSONDecodeError:
        pytest.fail(f"{keyword} {rest}: use the exec (JSON) form")
    assert isinstance(argv, list) and all(isinstance(w, str) for w in argv)
    return argv


def test_containerfile_base_user_volume_and_settings() -> None:
    assert args_of("FROM") == ["python:3.11-slim"]

    users = args_of("USER")
    assert users, "no USER: the service would run as root"
    user = users[-1].split(":")[0]
    assert user not in ("root", "0"), f"USER {users[-1]} is root"
    assert any(re.search(rf"useradd\b.*\b{re.escape(user)}\b", r) for r in args_of("RUN")), f"{user} is never created"

    volumes = [v for rest in args_of("VOLUME")
               for v in (json.loads(rest) if rest.startswith("[") else rest.split())]
    assert "/var/lib/curvekeeper" in volumes

    env = image_env()
    settings = Settings.from_env(env)
    assert settings.database_url == "sqlite:////var/lib/curvekeeper/curvekeeper.db"
    db_file = PurePosixPath(make_url(settings.database_url).database or "")
    assert any(db_file.is_relative_to(v) for v in volumes), f"the store {db_file} is not on a volume"
    assert settings.host == "0.0.0.0"
    exposed = [p.split("/")[0] for rest in args_of("EXPOSE") for p in rest.split()]
    assert exposed == [str(settings.port)] == ["8000"]
    # numba's cache must be writable by the user: not inside the installed (root-owned) package
    assert env.get("NUMBA_CACHE_DIR", "").startswith("/var/cache/curvekeeper"), "NUMBA_CACHE_DIR"
    assert any(re.search(r"install -d\b.*-o " + re.escape(user) + r"\b.*/var/cache/curvekeeper", r)
               for r in args_of("RUN")), "the numba cache directory must belong to the service user"


@pytest.mark.slow
def test_containerfile_builds_the_kernels_into_the_cache_as_the_service_user(tmp_path: Path) -> None:
    steps = instructions()
    warm = [i for i, (k, rest) in enumerate(steps) if k == "RUN" and "warm_kernels" in rest]
    assert len(warm) == 1, "one RUN step builds the compiled kernels"
    at = warm[0]
    installed = [i for i, (k, rest) in enumerate(steps) if k == "RUN" and "pip install" in rest]
    assert installed and installed[-1] < at, "the kernels are built after the project is installed"
    users = [rest for k, rest in steps[:at] if k == "USER"]
    assert users and users[-1] == args_of("USER")[-1] != "root", "built as the user who reads the cache"
    env: dict[str, str] = {}
    for k, rest in steps[:at]:
        if k == "ENV":
            env.update(word.partition("=")[::2] for word in shlex.split(rest))
    assert image_env().items() <= env.items(), "the build sees the cache directory and CPU the service runs with"
    assert env.get("NUMBA_CPU_NAME") == "generic", "machine code for any host, not the build machine's CPU"

    # the step's command works: run here on a fresh cache directory, it fills the kernels' cache
    argv = exec_form(steps[at][1], "RUN")
    assert argv[0] == "python"
    cache = tmp_path / "numba"
    run = subprocess.run([sys.executable, *argv[1:]], capture_output=True, text=True, timeout=600,
                         env={**os.environ, "NUMBA_CACHE_DIR": str(cache), "NUMBA_CPU_NAME": "generic"})
    assert run.returncode == 0, run.stderr
    kernels = cache_dir(cache)
    assert kernels is not None and list(kernels.rglob("learners.learn_batch-*.nbi")), "no kernel was cached"


def test_containerfile_installs_the_project_from_the_context_with_pip_only() -> None:
    runs = " ".join(args_of("RUN"))
    assert "pip install" in runs
    assert not re.search(r"\b(curl|wget|git clone|apt-get|apk)\b", runs), "fetches besides pip"
    assert not any("://" in rest for rest in args_of("ADD")), "ADD of a URL"
    ignore = (DEPLOY / "Containerfile.dockerignore").read_text().split()
    for rest in args_of("COPY"):
        *sources, _target = rest.split()
        for src in sources:
            assert (ROOT / src).exists(), f"COPY {src}: not in the build context (the repository root)"
            assert f"!{src}" in ignore or f"!{src}/" in ignore, f"COPY {src}: excluded by the dockerignore"


def test_containerfile_cmd_is_a_real_curvekeeper_subcommand() -> None:
    (cmd,) = args_of("CMD")
    argv = exec_form(cmd, "CMD")
    assert argv == ["curvekeeper", "serve"]
    assert "curvekeeper" in console_scripts(), "pyproject.toml installs no curvekeeper command"
    assert parse_cli(argv).command == "serve"


class _Health(BaseHTTPRequestHandler):
    def do_GET(self) -> None:  # the name http.server calls
        body = b'{"status": "ok"}' if self.path == "/healthz" else b"{}"
        self.send_response(200 if self.path == "/healthz" else 404)
        self.send_header("content-length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, format: str, *args: Any) -> None:  # quiet
        pass


@pytest.fixture
def health_stub() -> Iterator[int]:
    """A local server answering 200 on /healthz only, like the service's liveness route."""
    server = ThreadingHTTPServer(("127.0.0.1", 0), _Health)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield int(server.server_address[1])
    finally:
        server.shutdown()
        server.server_close()
        thread.join()


def test_healthcheck_gets_healthz_with_python(health_stub: int) -> None:
    (rest,) = args_of("HEALTHCHECK")
    options, sep, cmd = rest.partition("CMD ")
    assert sep and "--interval=" in options and "--timeout=" in options
    argv = exec_form(cmd, "HEALTHCHECK CMD")
    assert argv[:2] == ["python", "-c"] and len(argv) == 3
    code = argv[2]
    env = {k: v for k, v in os.environ.items() if "proxy" not in k.lower()}
    # a proxy given to the container must not swallow the check
    env.update(HTTP_PROXY="http://127.0.0.1:9", http_proxy="http://127.0.0.1:9")

    def probe(port: int) -> subprocess.CompletedProcess[str]:
        return subprocess.run([sys.executable, "-c", code], env={**env, "CURVEKEEPER_PORT": str(port)},
                              capture_output=True, text=True, timeout=30)

    ok = probe(health_stub)
    assert ok.returncode == 0, ok.stderr
    with ThreadingHTTPServer(("127.0.0.1", 0), _Health) as closed:
        dead_port = int(closed.server_address[1])
    assert probe(dead_port).returncode != 0, "the check passes with nothing listening"
    assert "/healthz" in code  # and the stub answers 404 elsewhere, so the path is the right one


# --- compose ----------------------------------------------------------------------------

def load_compose(path: Path) -> dict[str, Any]:
    try:
        yaml = importlib.import_module("yaml")
    except ImportError:
        pytest.skip(f"PyYAML is not installed (it is no dependency of curvekeeper): {path.name} is not parsed; "
                    "`pip install pyyaml` to run these checks")
    doc = yaml.safe_load(path.read_text())
    assert isinstance(doc, dict) and isinstance(doc.get("services"), dict)
    return doc


@pytest.fixture(scope="module")
def compose() -> dict[str, Any]:
    return load_compose(COMPOSE)


@pytest.fixture(scope="module")
def compose_mqtt() -> dict[str, Any]:
    return load_compose(COMPOSE_MQTT)


def env_files(service: dict[str, Any]) -> list[str]:
    spec = service.get("env_file", [])
    items = [spec] if isinstance(spec, str | dict) else spec
    return [item["path"] if isinstance(item, dict) else item for item in items]


def command_argv(service: dict[str, Any]) -> list[str]:
    cmd = service["command"]
    return shlex.split(cmd) if isinstance(cmd, str) else list(cmd)


def depends(service: dict[str, Any]) -> dict[str, str]:
    spec = service.get("depends_on", {})
    if isinstance(spec, list):
        return {name: "service_started" for name in spec}
    return {name: (cond or {}).get("condition", "service_started") for name, cond in spec.items()}


def test_compose_postgres_has_a_volume_and_a_health_check(compose: dict[str, Any]) -> None:
    db = compose["services"]["db"]
    assert str(db["image"]).startswith("postgres:15")
    test = db["healthcheck"]["test"]
    assert "pg_isready" in (test if isinstance(test, str) else " ".join(test))
    volume, _, target = next(v for v in db["volumes"] if v.endswith(":/var/lib/postgresql/data")).partition(":")
    assert volume in (compose.get("volumes") or {}), f"{volume} is not a named volume"
    assert "POSTGRES_PASSWORD" not in (db.get("environment") or {}), "the password must come from an env file"
    for name in env_files(db):
        assert (DEPLOY / f"{name}.example").is_file(), f"{name}: no {name}.example to start from"


def test_compose_service_is_built_from_the_containerfile_with_the_env_file(compose: dict[str, Any]) -> None:
    services = compose["services"]
    app, migrate = services["curvekeeper"], services["migrate"]
    for name, svc in (("curvekeeper", app), ("migrate", migrate)):
        build = svc["build"]
        context = (DEPLOY / build["context"]).resolve()
        assert context == ROOT.resolve(), f"{name}: the build context is not the repository root"
        assert (context / build["dockerfile"]).resolve() == CONTAINERFILE.resolve()
        assert "curvekeeper.env" in env_files(svc), f"{name}: settings not from curvekeeper.env"
        inline = set(svc.get("environment") or {})
        assert not inline & {"CURVEKEEPER_DATABASE_URL", "CURVEKEEPER_ADMIN_KEY"}, f"{name}: inline secrets"
    assert (DEPLOY / "curvekeeper.env.example").is_file()

    assert parse_cli(command_argv(migrate)).db_command == "upgrade"
    assert parse_cli(command_argv(app)).command == "serve"
    assert depends(migrate) == {"db": "service_healthy"}
    assert depends(app) == {"db": "service_healthy", "migrate": "service_completed_successfully"}
    assert migrate.get("restart", "no") == "no", "the one-shot migration must not restart"
    assert int(app.get("deploy", {}).get("replicas", 1)) >= 2, "several replicas"


def test_compose_database_url_names_the_compose_database(compose: dict[str, Any]) -> None:
    url = make_url(next(a.value for a in env_assignments() if a.active and a.name == "CURVEKEEPER_DATABASE_URL"))
    db = compose["services"]["db"]
    assert url.drivername == "postgresql+psycopg"
    assert url.host == "db" and (url.port or 5432) == 5432
    assert url.username == db["environment"]["POSTGRES_USER"]
    assert url.database == db["environment"]["POSTGRES_DB"]


def test_compose_proxy_balances_the_replicas_on_loopback(compose: dict[str, Any]) -> None:
    proxy = compose["services"]["proxy"]
    assert depends(proxy) == {"curvekeeper": "service_healthy"}
    assert proxy["ports"] == ["127.0.0.1:8000:8080"]
    source = next(v.split(":")[0] for v in proxy["volumes"] if "/etc/nginx/" in v)
    conf = (DEPLOY / source).read_text()
    assert re.search(r"server\s+curvekeeper:8000\b", conf), "the upstream is not the service's port"
    assert re.search(r"listen\s+8080;", conf)
    assert nginx_size(conf) == DEFAULTS.max_body_bytes


# --- compose with MQTT ------------------------------------------------------------------

def conf_values(path: Path) -> list[tuple[str, str]]:
    """A Mosquitto configuration's (option, value) lines, comments dropped."""
    out = []
    for raw in path.read_text().splitlines():
        line = raw.strip()
        if line and not line.startswith("#"):
            option, _, value = line.partition(" ")
            out.append((option, value.strip()))
    return out


def mounts(service: dict[str, Any]) -> dict[str, str]:
    """Container path -> host source (a path relative to deploy/, or a named volume)."""
    out = {}
    for spec in service.get("volumes", []):
        source, target = spec.split(":")[:2]
        out[target] = source
    return out


def ingest_services(compose_mqtt: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {name: svc for name, svc in compose_mqtt["services"].items() if "command" in svc
            and command_argv(svc)[:1] == ["curvekeeper"]}


def mqtt_env() -> dict[str, str]:
    return {a.name: a.value for a in env_assignments(MQTT_ENV_EXAMPLE) if a.active}


def test_compose_mqtt_broker_mounts_what_its_configuration_names(compose_mqtt: dict[str, Any]) -> None:
    broker = compose_mqtt["services"]["broker"]
    assert str(broker["image"]).startswith("eclipse-mosquitto:2")
    where = mounts(broker)
    argv = command_argv(broker)
    main = argv[argv.index("-c") + 1]
    assert where[main] == "./mosquitto-compose.conf"
    main_conf = dict(conf_values(DEPLOY / "mosquitto-compose.conf"))
    included = next(t for t, src in where.items() if src == "./mosquitto.conf")
    assert str(PurePosixPath(included).parent) == main_conf["include_dir"].rstrip("/"), "the snippet is not included"
    snippet = dict(conf_values(DEPLOY / "mosquitto.conf"))
    assert "persistence_location" not in snippet, "Mosquitto refuses a second persistence_location"
    assert where[snippet["acl_file"]] == "./mosquitto.acl"
    assert where[snippet["password_file"]] == "./mosquitto.passwd"
    for option in ("certfile", "keyfile"):
        assert where[str(PurePosixPath(snippet[option]).parent)] == "./certs", f"{option} is not mounted"
    data = where[main_conf["persistence_location"].rstrip("/")]
    assert data in (compose_mqtt.get("volumes") or {}), "the persistent sessions are not on a named volume"
    for target, source in where.items():
        if source.startswith("./") and source[2:].rstrip("/") not in LOCAL_COPIES | {"certs"}:
            assert (DEPLOY / source).is_file(), f"{target}: {source} is not in deploy/"
            assert "ro" in broker["volumes"][list(where).index(target)].split(":")[2:], f"{target}: not read-only"
    # the operator's own files (password hashes, the TLS key) stay out of git
    assert {"mosquitto.passwd", "certs/", "mqtt.env"} <= LOCAL_COPIES
    # devices reach the TLS listener only; the plain one of the project's network is not published
    listeners = [v.split()[0] for k, v in conf_values(DEPLOY / "mosquitto.conf") + list(main_conf.items())
                 if k == "listener"]
    published = [p.split(":")[-1] for p in broker["ports"]]
    assert published == ["8883"] and "8883" in listeners
    assert "$$@" in " ".join(broker["entrypoint"]), "compose would read $@ as one of its variables"


def test_compose_mqtt_services_share_one_group_each_with_its_own_client_id(compose_mqtt: dict[str, Any]) -> None:
    services = ingest_services(compose_mqtt)
    assert len(services) >= 2, "two service processes at least"
    ids = []
    for name, svc in services.items():
        assert parse_cli(command_argv(svc)).command == "serve"
        assert env_files(svc) == ["curvekeeper.env", "mqtt.env"], f"{name}: settings, then the MQTT ones"
        env = {k: str(v) for k, v in (svc.get("environment") or {}).items()}
        unknown = set(env) - set(FIELDS)
        assert not unknown, f"{name}: {sorted(unknown)} are not settings"
        Settings.from_env(env)  # accepted
        assert set(env) == {"CURVEKEEPER_MQTT_CLIENT_ID"}, f"{name}: only its client id is its own"
        ids.append(env["CURVEKEEPER_MQTT_CLIENT_ID"])
        assert int(svc.get("deploy", {}).get("replicas", 1)) == 1, f"{name}: replicas would share one client id"
        assert depends(svc) == {"db": "service_healthy", "migrate": "service_completed_successfully",
                                "broker": "service_started"}
        assert (DEPLOY / "Containerfile").resolve() == (DEPLOY / svc["build"]["context"] / svc["build"]["dockerfile"]
                                                        ).resolve()
    assert len(set(ids)) == len(ids), f"two processes on one client id: {ids}"
    # the MQTT settings reach these processes only: compose.yaml's replicas would subscribe
    # under client ids made from their containers' changing host names
    assert "CURVEKEEPER_MQTT_URL" not in {a.name for a in env_assignments() if a.active}


def test_mqtt_env_example_names_the_broker_service_its_listener_and_a_group() -> None:
    env = mqtt_env()
    assert set(env) == {"CURVEKEEPER_MQTT_URL", "CURVEKEEPER_MQTT_SHARE_GROUP"}
    settings = Settings.from_env(env)
    assert settings.mqtt_share_group and "REPLACE" in settings.mqtt_share_group, "a placeholder to replace"
    url = urlsplit(env["CURVEKEEPER_MQTT_URL"])
    assert url.scheme == "mqtt" and url.hostname == "broker" and url.password == "CHANGE-ME"
    assert url.port == int(dict(conf_values(DEPLOY / "mosquitto-compose.conf"))["listener"])
    acl = (DEPLOY / "mosquitto.acl").read_text()
    assert re.search(rf"^user {re.escape(url.username or '')}$", acl, re.M), "not the ACL's service user"
    assert "token_hex" in MQTT_ENV_EXAMPLE.read_text(), "how to make a group name devices cannot guess"


def free_port() -> int:
    import socket

    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


PATH_OPTIONS = ("include_dir", "persistence_location", "acl_file", "password_file", "certfile", "keyfile")


def test_compose_mqtt_broker_starts_with_its_mounts_and_passes_a_devices_sample_to_the_group(
        compose_mqtt: dict[str, Any], tmp_path: Path) -> None:
    """The broker's files laid out under a directory of the test's own as compose.mqtt.yaml
    mounts them in the container (its password file and a self-signed certificate made
    here; the listeners on free ports): a real Mosquitto starts with them, a device
    publishes over TLS, and the service's user on the project-network listener gets it
    through a shared subscription."""
    import getpass
    import socket
    import ssl
    import time

    paho = pytest.importorskip("paho.mqtt.client")
    for tool in ("mosquitto", "mosquitto_passwd", "openssl"):
        if not shutil.which(tool):
            pytest.skip(f"{tool} is not installed")
    broker = compose_mqtt["services"]["broker"]
    root = tmp_path / "container"

    def inside(path: str) -> Path:
        return root / path.lstrip("/")

    ports: dict[str, str] = {}
    for target, source in mounts(broker).items():
        here = inside(target)
        if not source.startswith("./"):  # a named volume
            here.mkdir(parents=True, exist_ok=True)
        elif source == "./mosquitto.passwd":
            here.parent.mkdir(parents=True, exist_ok=True)
            for user in ("curvekeeper", "room.a"):
                subprocess.run(["mosquitto_passwd", "-b", *([] if here.exists() else ["-c"]), str(here), user, "pw"],
                               check=True, capture_output=True)
        elif source == "./certs":
            here.mkdir(parents=True)
            subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "1",
                            "-subj", "/CN=localhost", "-keyout", str(here / "broker.key"),
                            "-out", str(here / "broker.crt")], check=True, capture_output=True)
        else:
            here.parent.mkdir(parents=True, exist_ok=True)
            lines = []
            for raw in (DEPLOY / source).read_text().splitlines():
                option, _, value = raw.strip().partition(" ")
                if option in PATH_OPTIONS:
                    raw = f"{option} {inside(value.strip())}"
                elif option == "listener":
                    port, *address = value.split()
                    ports[port] = ports.get(port) or str(free_port())
                    raw = " ".join(["listener", ports[port], *address])
                lines.append(raw)
            here.write_text("\n".join(lines) + "\n")
    argv = command_argv(broker)
    main = inside(argv[argv.index("-c") + 1])
    main.write_text(main.read_text() + f"user {getpass.getuser()}\n")  # as root it would drop to its own user
    log = (tmp_path / "mosquitto.log").open("wb")
    proc = subprocess.Popen(["mosquitto", "-c", str(main)], stdout=log, stderr=subprocess.STDOUT)
    clients = []
    try:
        internal = int(ports[str(urlsplit(mqtt_env()["CURVEKEEPER_MQTT_URL"]).port)])
        tls = int(ports["8883"])
        deadline = time.monotonic() + 10
        while True:
            try:
                socket.create_connection(("127.0.0.1", internal), timeout=1).close()
                break
            except OSError:
                if proc.poll() is not None or time.monotonic() > deadline:
                    pytest.fail("the broker did not start: " + (tmp_path / "mosquitto.log").read_text())
                time.sleep(0.05)
        got: list[bytes] = []
        service = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id="svc", protocol=paho.MQTTv5)
        service.username_pw_set("curvekeeper", "pw")
        service.on_message = lambda _c, _u, msg: got.append(bytes(msg.payload))
        service.connect("127.0.0.1", internal)
        service.loop_start()
        clients.append(service)
        service.subscribe("$share/ck-test/curvekeeper/v1/samples/+", qos=1)
        device = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id="room.a", protocol=paho.MQTTv5)
        device.username_pw_set("room.a", "pw")
        device.tls_set(ca_certs=str(inside("/etc/mosquitto/certs/broker.crt")), cert_reqs=ssl.CERT_REQUIRED)
        device.connect("localhost", tls)
        device.loop_start()
        clients.append(device)
        time.sleep(0.3)
        device.publish("curvekeeper/v1/samples/room.a", b"over TLS", qos=1).wait_for_publish(timeout=10)
        deadline = time.monotonic() + 10
        while not got and time.monotonic() < deadline:
            time.sleep(0.02)
        assert got == [b"over TLS"]
    finally:
        for c in clients:
            c.disconnect()
            c.loop_stop()
        proc.terminate()
        proc.wait(timeout=10)
        log.close()


# --- the reverse proxy examples ---------------------------------------------------------

def nginx_size(conf: str) -> int:
    m = re.search(r"client_max_body_size\s+(\d+)([kKmMgG]?);", conf)
    assert m, "no client_max_body_size"
    return int(m[1]) * {"": 1, "k": 1024, "m": 1024**2, "g": 1024**3}[m[2].lower()]


def test_readme_tls_server_block_forwards_to_loopback_with_the_body_limit() -> None:
    blocks = re.findall(r"```nginx\n(.*?)```", README.read_text(), re.S)
    assert len(blocks) == 1, "one nginx example in deploy/README.md"
    (conf,) = blocks
    assert re.search(r"listen\s+443\s+ssl;", conf) and "ssl_certificate_key" in conf
    assert "proxy_pass http://127.0.0.1:8000;" in conf
    assert nginx_size(conf) == DEFAULTS.max_body_bytes, "in line with CURVEKEEPER_MAX_BODY_BYTES"
    assert not re.search(r"listen\s+80\b", conf), "no plain-HTTP listener for the API"


def test_readme_covers_every_deploy_file_and_its_links_resolve() -> None:
    text = README.read_text()
    for path in deploy_files():
        if path != README:
            assert f"`{path.name}`" in text, f"deploy/README.md does not mention {path.name}"

    def slug(heading: str) -> str:  # GitHub's anchors
        return re.sub(r"[^\w\- ]", "", heading.strip().lower()).replace(" ", "-")

    anchors = {slug(h) for h in re.findall(r"^#+ (.+)$", text, re.M)}
    for target in re.findall(r"\]\(#([^)]+)\)", text):
        assert target in anchors, f"link to #{target}: no such heading"
    main = (ROOT / "README.md").read_text()
    main_anchors = {slug(h) for h in re.findall(r"^#+ (.+)$", main, re.M)}
    for target in re.findall(r"\]\(\.\./README\.md#([^)]+)\)", text):
        assert target in main_anchors, f"link to ../README.md#{target}: no such heading"


# --- the systemd unit -------------------------------------------------------------------

def parse_unit(text: str) -> dict[str, list[tuple[str, str]]]:
    """systemd's INI dialect: sections of KEY=VALUE lines; keys may repeat; '#'/';' comments."""
    sections: dict[str, list[tuple[str, str]]] = {}
    current: list[tuple[str, str]] | None = None
    pending = ""
    for n, raw in enumerate(text.splitlines(), 1):
        line = raw.strip()
        if not pending and (not line or line[0] in "#;"):
            continue
        if line.endswith("\\"):
            pending += line[:-1] + " "
            continue
        line, pending = pending + line, ""
        if line.startswith("[") and line.endswith("]"):
            assert line[1:-1] not in sections, f"line {n}: section {line} twice"
            current = sections.setdefault(line[1:-1], [])
            continue
        key, sep, value = line.partition("=")
        assert current is not None and sep and key.strip(), f"line {n}: not KEY=VALUE in a section: {raw!r}"
        current.append((key.strip(), value.strip()))
    return sections


@pytest.fixture(scope="module")
def unit() -> dict[str, list[tuple[str, str]]]:
    return parse_unit(UNIT.read_text())


def last(section: list[tuple[str, str]], key: str) -> str:
    values = [v for k, v in section if k == key]
    assert values, f"{key}= is not set"
    return values[-1]


def as_list(section: list[tuple[str, str]], key: str) -> list[str]:
    """A list setting: assignments add up, an empty one resets."""
    out: list[str] = []
    for k, v in section:
        if k == key:
            out = out + v.split() if v else []
    return out


def yes(value: str) -> bool:
    return value.lower() in ("1", "yes", "true", "on")


def test_unit_parses_and_is_hardened(unit: dict[str, list[tuple[str, str]]]) -> None:
    assert {"Unit", "Service", "Install"} <= set(unit)
    svc = unit["Service"]
    for key in ("NoNewPrivileges", "PrivateTmp", "ProtectHome", "PrivateDevices", "RestrictSUIDSGID"):
        assert yes(last(svc, key)), f"{key}={last(svc, key)}"
    assert last(svc, "ProtectSystem") == "strict"
    assert "/var/lib/curvekeeper" in as_list(svc, "ReadWritePaths")
    assert last(svc, "CapabilityBoundingSet") == "" and as_list(svc, "CapabilityBoundingSet") == []
    assert sorted(as_list(svc, "RestrictAddressFamilies")) == ["AF_INET", "AF_INET6", "AF_UNIX"]
    assert as_list(svc, "SystemCallFilter")[:1] == ["@system-service"]
    assert last(svc, "UMask") == "0077"
    # numba's JIT writes machine code and then runs it: W^X would stop the service
    assert "MemoryDenyWriteExecute" not in {k for k, _ in svc}
    paragraphs = re.split(r"\n\s*\n|\n(?!\s*#)", UNIT.read_text())
    why = [p for p in paragraphs if "MemoryDenyWriteExecute" in p]
    assert why and "numba" in why[0], "a comment says why MemoryDenyWriteExecute is not set (numba's JIT)"


def test_unit_runs_curvekeeper_serve_as_the_service_user_with_the_env_file(
        unit: dict[str, list[tuple[str, str]]]) -> None:
    svc = unit["Service"]
    assert last(svc, "User") not in ("root", "0") and last(svc, "User") == "curvekeeper"
    argv = shlex.split(last(svc, "ExecStart"))
    assert argv[0].startswith("/") and PurePosixPath(argv[0]).name == "curvekeeper"
    assert parse_cli(["curvekeeper", *argv[1:]]).command == "serve"

    assert last(svc, "EnvironmentFile").lstrip("-") == "/etc/curvekeeper/curvekeeper.env"
    assert "deploy/curvekeeper.env.example" in UNIT.read_text(), "the unit points at the documented example"

    env = dict(word.split("=", 1) for v in (v for k, v in svc if k == "Environment") for word in shlex.split(v))
    assert set(env) <= set(FIELDS) | {"NUMBA_CACHE_DIR"}, f"unknown variables: {set(env) - set(FIELDS)}"
    settings = Settings.from_env(env)
    writable = [PurePosixPath(p) for p in as_list(svc, "ReadWritePaths")]
    writable += [PurePosixPath("/var/lib") / d for d in as_list(svc, "StateDirectory")]
    writable += [PurePosixPath("/var/cache") / d for d in as_list(svc, "CacheDirectory")]
    db_file = PurePosixPath(make_url(settings.database_url).database or "")
    assert db_file.is_absolute() and any(db_file.is_relative_to(w) for w in writable), db_file
    assert any(PurePosixPath(env["NUMBA_CACHE_DIR"]).is_relative_to(w) for w in writable), "numba cache"
    assert any(PurePosixPath(last(svc, "WorkingDirectory")).is_relative_to(w) for w in writable)


SYSTEMD_ANALYZE = shutil.which("systemd-analyze")
NO_SYSTEMD_ANALYZE = ("systemd-analyze is not installed (Debian/Ubuntu: apt-get install systemd): "
                      "the unit was checked by the parser above only")


def real_executable() -> str:
    """A path that exists here, to stand in for /opt/curvekeeper/venv/bin/curvekeeper."""
    beside = Path(sys.executable).with_name("curvekeeper")
    return str(beside if beside.exists() else shutil.which("curvekeeper") or sys.executable)


def verify(path: Path) -> tuple[int, list[str]]:
    run = subprocess.run([SYSTEMD_ANALYZE or "systemd-analyze", "verify", "--man=no", str(path)],
                         capture_output=True, text=True, timeout=60)
    return run.returncode, [line for line in (run.stdout + run.stderr).splitlines() if line.strip()]


@pytest.mark.skipif(SYSTEMD_ANALYZE is None, reason=NO_SYSTEMD_ANALYZE)
def test_unit_passes_systemd_analyze_verify(tmp_path: Path) -> None:
    # verify must work at all here (a container without systemd may refuse): a trivial unit first
    control = tmp_path / "control" / "probe.service"
    control.parent.mkdir()
    control.write_text(f"[Service]\nExecStart={real_executable()}\n")
    rc, out = verify(control)
    if rc != 0 or out:
        pytest.skip(f"systemd-analyze verify does not work here (a trivial unit gives: {out[:3]})")

    # The unit's binary (/opt/curvekeeper/venv/bin/curvekeeper) is not installed on a test
    # machine, and verify rightly reports that. A copy whose ExecStart points at a binary
    # that exists differs in nothing else; every other finding about the unit fails.
    text = UNIT.read_text()
    (exec_line,) = [line for line in text.splitlines() if line.startswith("ExecStart=")]
    binary = shlex.split(exec_line.partition("=")[2])[0]
    copy = tmp_path / "copy" / UNIT.name
    copy.parent.mkdir()
    copy.write_text(text.replace(f"ExecStart={binary} ", f"ExecStart={real_executable()} ", 1))
    assert copy.read_text() != text or Path(binary).exists()
    rc, out = verify(copy)
    ours = [line for line in out if UNIT.name in line]  # lines about other (system) units are not ours
    assert rc == 0 and not ours, "systemd-analyze verify:\n" + "\n".join(out)

    if not Path(binary).exists():  # the original: only the missing binary is reported
        rc, out = verify(UNIT)
        ours = [line for line in out if UNIT.name in line]
        assert all(binary in line for line in ours), "\n".join(ours)


@pytest.mark.skipif(SYSTEMD_ANALYZE is None, reason=NO_SYSTEMD_ANALYZE)
def test_unit_exposure_stays_low(tmp_path: Path) -> None:
    copy = tmp_path / UNIT.name
    copy.write_text(UNIT.read_text())
    run = subprocess.run([SYSTEMD_ANALYZE or "systemd-analyze", "security", "--offline=yes", str(copy)],
                         capture_output=True, text=True, timeout=60)
    m = re.search(r"Overall exposure level for \S+: (\d+(?:\.\d+)?)", run.stdout + run.stderr)
    if not m:
        pytest.skip("this systemd-analyze cannot rate a unit file offline (systemd >= 250 can): "
                    + (run.stderr.strip().splitlines() or [""])[-1])
    # 1.7 with systemd 252; newer versions add checks, hence the margin
    assert float(m[1]) <= 3.0, run.stdout


@pytest.mark.skipif(sys.platform != "linux", reason="PR_SET_MDWE is a Linux interface")
def test_numba_cannot_run_where_write_execute_memory_is_denied() -> None:
    """Why the unit leaves MemoryDenyWriteExecute= unset: under the kernel's equivalent
    (prctl PR_SET_MDWE, Linux >= 6.3) numba does not even import."""
    code = textwrap.dedent("""
        import ctypes, sys
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            refused = libc.prctl(65, 1, 0, 0, 0)  # PR_SET_MDWE, PR_MDWE_REFUSE_EXEC_GAIN
        except Exception:
            refused = -1
        if refused != 0:
            sys.exit(77)
        import numba
    """)
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    if run.returncode == 77:
        pytest.skip("this kernel has no PR_SET_MDWE (Linux >= 6.3): numba's need for W+X memory not shown")
    assert run.returncode != 0, "numba imported with write-execute memory denied: MemoryDenyWriteExecute may be fine"
    assert "executable memory" in run.stderr or "llvm" in run.stderr.lower(), run.stderr[-2000:]
