"""deploy/: the example configuration matches its generator and loads; the compose file and
the systemd unit say what the image needs; the image's EXTRAS build argument installs an
extra; deploy/install.sh installs and starts the service
in a fresh virtual environment (the image's own steps, without a container engine)."""

from __future__ import annotations

import configparser
import os
import re
import signal
import subprocess
import sys
import sysconfig
import time
from pathlib import Path

import httpx
import pytest
import yaml

from rolewatch.config import Settings, load_settings

from .servers import free_port

ROOT = Path(__file__).resolve().parents[2]
DEPLOY = ROOT / "deploy"
ENV_NAMES = {f"ROLEWATCH_{name.upper()}" for name in Settings.model_fields}


def test_example_config_matches_its_generator():
    done = subprocess.run(
        [sys.executable, str(ROOT / "scripts" / "example_config.py")],
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
    )
    assert (DEPLOY / "rolewatch.example.toml").read_text(encoding="utf-8") == done.stdout, (
        "deploy/rolewatch.example.toml is stale: run python scripts/example_config.py --update"
    )


def test_example_config_names_every_option_and_each_line_loads(tmp_path, monkeypatch):
    for name in list(os.environ):
        if name.startswith("ROLEWATCH_"):
            monkeypatch.delenv(name)
    text = (DEPLOY / "rolewatch.example.toml").read_text(encoding="utf-8")
    assignments = re.findall(r"^# (\w+) = (.+)$", text, flags=re.M)
    assert [name for name, _ in assignments] == list(Settings.model_fields)
    assert load_settings(DEPLOY / "rolewatch.example.toml") == load_settings()  # all commented
    (tmp_path / "internal-ca.pem").write_text("")
    for name, value in assignments:  # each example, uncommented, is a valid setting
        if name == "delivery_ca_bundle":
            value = f'"{tmp_path / "internal-ca.pem"}"'
        one = tmp_path / f"{name}.toml"
        one.write_text(f"{name} = {value}\n")
        loaded = load_settings(one)
        if Settings.model_fields[name].default is not None and name != "delivery_ca_bundle":
            assert getattr(loaded, name) == getattr(load_settings(), name), name


def test_compose_file_runs_the_image_with_postgres():
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text(encoding="utf-8"))
    services = compose["services"]
    app, database = services["rolewatch"], services["postgres"]
    assert (
        ROOT / "deploy" / app["build"]["context"] / app["build"]["dockerfile"]
    ).resolve() == DEPLOY / "Containerfile"
    assert app["image"].endswith("rolewatch:0.1.0")
    assert app["depends_on"]["postgres"]["condition"] == "service_healthy"
    env = app["environment"]
    assert set(env) <= ENV_NAMES, set(env) - ENV_NAMES  # only real settings
    assert env["ROLEWATCH_DATABASE_URL"].startswith("postgresql+psycopg://rolewatch:")
    assert env["ROLEWATCH_DATABASE_URL"].endswith("@postgres:5432/rolewatch")
    assert "/healthz" in " ".join(app["healthcheck"]["test"]) and "curl" not in str(
        app["healthcheck"]
    )
    assert "pg_isready" in " ".join(database["healthcheck"]["test"])
    assert "pgdata" in compose["volumes"] and any(
        v.startswith("pgdata:") for v in database["volumes"]
    )
    # Settings the compose file sets must be accepted by the settings model.
    values = {k[len("ROLEWATCH_") :].lower(): v for k, v in env.items() if "${" not in v}
    load_settings(**values)


def test_containerfile_is_multi_stage_non_root_with_python_healthcheck():
    text = (DEPLOY / "Containerfile").read_text(encoding="utf-8")
    assert len(re.findall(r"^FROM ", text, flags=re.M)) == 2 and "COPY --from=build" in text
    assert re.search(r"^USER rolewatch$", text, flags=re.M)
    health = next(
        line for line in text.splitlines() if line.strip().startswith('CMD ["python", "-c"')
    )
    assert "/healthz" in health and "curl" not in text
    assert "rolewatch-install install" in text and 'CMD ["rolewatch-install", "start"]' in text
    unit = configparser.ConfigParser(strict=False, interpolation=None)
    unit.read(DEPLOY / "rolewatch.service")
    assert unit["Service"]["ExecStart"].endswith("rolewatch serve")
    assert unit["Service"]["User"] == "rolewatch" and unit["Service"]["KillSignal"] == "SIGTERM"


def test_containerfile_extras_build_arg_names_the_scale_extra():
    import tomllib

    text = (DEPLOY / "Containerfile").read_text(encoding="utf-8")
    assert len(re.findall(r'^ARG EXTRAS=""$', text, flags=re.M)) == 2  # one per stage
    sources = re.findall(r'"(\.?[a-z]*\$\{EXTRAS:\+\[\$EXTRAS\]\})"', text)
    assert len(sources) == 2
    extras = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"][
        "optional-dependencies"
    ]
    assert "scale" in extras
    # The RUN lines expand the argument in /bin/sh (POSIX parameter expansion ${x:+word}).
    for value, suffix in (("", ""), ("scale", "[scale]")):
        for source in sources:
            done = subprocess.run(
                ["sh", "-c", f'printf %s "{source}"'],
                env={"EXTRAS": value, "PATH": os.environ["PATH"]},
                capture_output=True,
                text=True,
                check=True,
            )
            assert done.stdout == source.split("$")[0] + suffix


@pytest.mark.slow
def test_install_script_installs_and_starts_the_service(tmp_path):
    venv = tmp_path / "venv"
    subprocess.run(
        [sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=120
    )
    # Dependencies come from the test environment: a .pth file puts its site-packages after
    # the new venv's own (pip runs from there too), so only rolewatch itself is built and
    # installed (the build backend, setuptools, comes from the package index as usual).
    site = Path(sysconfig.get_paths()["purelib"])
    new_site = next((venv / "lib").glob("python3*/site-packages"))
    (new_site / "test-deps.pth").write_text(str(site) + "\n")
    env = {k: v for k, v in os.environ.items() if not k.startswith("ROLEWATCH_")}
    env.update(ROLEWATCH_VENV=str(venv), ROLEWATCH_PIP_OPTIONS="--no-deps")
    done = subprocess.run(
        ["sh", str(DEPLOY / "install.sh"), "install", str(ROOT)],
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 0, done.stderr
    installed = subprocess.run(
        [str(venv / "bin" / "python"), "-c", "import rolewatch, sys; print(rolewatch.__file__)"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert str(new_site) in installed.stdout  # the copy install.sh put there, not the editable one

    port = free_port()
    env.update(
        ROLEWATCH_DATABASE_URL=f"sqlite:///{tmp_path / 'rw.db'}",
        ROLEWATCH_PORT=str(port),
        ROLEWATCH_HOST="127.0.0.1",
    )
    process = subprocess.Popen(
        ["sh", str(DEPLOY / "install.sh"), "start"],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        deadline = time.monotonic() + 90
        while True:
            try:
                health = httpx.get(f"http://127.0.0.1:{port}/healthz", timeout=2)
                break
            except httpx.HTTPError:
                assert process.poll() is None and time.monotonic() < deadline, process.stderr.read()
                time.sleep(0.2)
        assert health.json() == {"status": "ok", "database": "ok"}
        # The container health check, run as the image runs it.
        check = re.search(
            r'CMD \["python", "-c", "(.+)"\]', (DEPLOY / "Containerfile").read_text()
        ).group(1)
        probe = subprocess.run(
            [sys.executable, "-c", check], env={**env, "ROLEWATCH_PORT": str(port)}, timeout=30
        )
        assert probe.returncode == 0
        process.send_signal(signal.SIGTERM)  # install.sh exec'd the server: it gets the signal
        assert process.wait(60) == 0
    finally:
        if process.poll() is None:
            process.kill()
            process.wait(30)
