"""Docker for the container tests: the daemon, a base image and the image, made once.

Where Docker cannot be had (no docker.io, not root, dockerd will not start) the tests
are skipped with a one-line reason, except under CI (``CI`` set), where they fail.
What is kept between runs, to keep later runs fast: the base image made from Debian's
packages when ``python:3.11-slim`` cannot be pulled (``LOCAL_BASE``, about a minute
to make) and BuildKit's layer cache. Remove them with ``docker rmi
sounding-test-base:bookworm`` and ``docker builder prune -af``. Everything else the
tests start (dockerd itself, containers, volumes, networks, image tags) is removed.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
DOCKER_DIR = REPO / "docker"
DOCKERFILE = (DOCKER_DIR / "Dockerfile").read_text("utf-8")
DEFAULT_BASE = re.search(r"^ARG BASE_IMAGE=(\S+)$", DOCKERFILE, re.M).group(1)
TORCH_VERSION = re.search(r"^ARG TORCH_VERSION=(\S+)$", DOCKERFILE, re.M).group(1)
# Made from Debian's packages (docker/make-base-image.sh) when DEFAULT_BASE cannot be
# pulled; kept between runs under this name.
LOCAL_BASE = "sounding-test-base:bookworm"
# What of the repository the build context leaves out, as docker build reads it.
IGNORED = [
    line.strip()
    for line in (DOCKER_DIR / "Dockerfile.dockerignore").read_text("utf-8").splitlines()
    if line.strip() and not line.startswith("#")
]


def unavailable(reason: str) -> None:
    """Skip with a one-line reason; under CI, fail: there Docker must work."""
    reason = " ".join(reason.split())
    if os.environ.get("CI"):
        pytest.fail(f"container tests cannot run under CI: {reason}", pytrace=False)
    pytest.skip(reason)


def say(config: pytest.Config, line: str) -> None:
    """One line on the terminal, shown even when output is captured."""
    reporter = config.pluginmanager.get_plugin("terminalreporter")
    capture = config.pluginmanager.get_plugin("capturemanager")
    if reporter is not None and capture is not None:
        with capture.global_and_fixture_disabled():
            reporter.write_line(f"container: {line}")


def tail(text: str, lines: int = 40) -> str:
    return "\n".join(text.strip().splitlines()[-lines:])


@dataclass
class Docker:
    """The docker and docker-compose clients, talking to a running dockerd."""

    cli: str
    compose_cli: str
    env: dict[str, str] = field(default_factory=dict)

    def run(
        self, *args: str, check: bool = True, timeout: float = 600, **kw
    ) -> subprocess.CompletedProcess[str]:
        return self._run([self.cli, *args], check=check, timeout=timeout, **kw)

    def compose(
        self, *args: str, env: dict[str, str], check: bool = True, timeout: float = 600, **kw
    ) -> subprocess.CompletedProcess[str]:
        return self._run(
            [self.compose_cli, "-f", str(DOCKER_DIR / "compose.yaml"), *args],
            env=env,
            check=check,
            timeout=timeout,
            **kw,
        )

    def _run(
        self, cmd: list[str], check: bool, timeout: float, env: dict[str, str] | None = None, **kw
    ) -> subprocess.CompletedProcess[str]:
        done = subprocess.run(
            cmd,
            capture_output=True,
            text=True,
            timeout=timeout,
            stdin=subprocess.DEVNULL,
            env={**os.environ, **self.env, **(env or {})},
            **kw,
        )
        if check and done.returncode != 0:
            pytest.fail(
                f"{' '.join(cmd[:6])}… exited {done.returncode}:\n{tail(done.stderr)}\n"
                f"{tail(done.stdout, 10)}",
                pytrace=False,
            )
        return done

    def has_image(self, name: str) -> bool:
        return self.run("image", "inspect", name, check=False, timeout=60).returncode == 0


def _find(name: str, *candidates: str) -> str | None:
    # Debian's client first: a newer docker CLI elsewhere on PATH may lack the buildx
    # plugin that its `docker build` needs for BuildKit.
    for path in candidates:
        if os.access(path, os.X_OK):
            return path
    return shutil.which(name)


def _daemon_answers(cli: str) -> bool:
    try:
        done = subprocess.run(
            [cli, "version", "--format", "{{.Server.Version}}"],
            capture_output=True,
            text=True,
            timeout=30,
        )
    except subprocess.TimeoutExpired:
        return False
    return done.returncode == 0


@pytest.fixture(scope="session")
def docker(tmp_path_factory: pytest.TempPathFactory, request: pytest.FixtureRequest):
    """The clients, with dockerd started here (and stopped after) if it was not running.

    $SOUNDING_TEST_DOCKER names another docker client (default: Debian's /usr/bin/docker).
    """
    cli = os.environ.get("SOUNDING_TEST_DOCKER") or _find("docker", "/usr/bin/docker")
    compose_cli = _find("docker-compose", "/usr/bin/docker-compose")
    if cli is None or not os.access(cli, os.X_OK) or compose_cli is None:
        unavailable(
            "Docker is not installed (apt-get install docker.io docker-compose debootstrap; "
            "scripts/test.sh does it)"
        )
    started: subprocess.Popen[bytes] | None = None
    if not _daemon_answers(cli):
        dockerd = _find("dockerd", "/usr/sbin/dockerd")
        if dockerd is None:
            unavailable("docker's daemon is not running and dockerd is not installed")
        if os.geteuid() != 0:
            unavailable("docker's daemon is not running and only root can start dockerd here")
        log_path = tmp_path_factory.mktemp("dockerd") / "dockerd.log"
        with open(log_path, "wb") as log:
            started = subprocess.Popen(
                [dockerd], stdout=log, stderr=subprocess.STDOUT, start_new_session=True
            )
        deadline = time.monotonic() + 90
        while not _daemon_answers(cli):
            if started.poll() is not None or time.monotonic() > deadline:
                started.kill()
                started.wait()
                last = tail(log_path.read_text("utf-8", "replace"), 1) or "no output"
                unavailable(f"dockerd would not start: {last}")
            time.sleep(0.5)
        say(request.config, f"started dockerd (pid {started.pid}); it is stopped at the end")
    try:
        yield Docker(cli=cli, compose_cli=compose_cli)
    finally:
        if started is not None:
            started.terminate()
            try:
                started.wait(timeout=60)
            except subprocess.TimeoutExpired:
                started.kill()
                started.wait()


@pytest.fixture(scope="session")
def base_image(docker: Docker, request: pytest.FixtureRequest) -> str:
    """The image to build on: $SOUNDING_TEST_BASE_IMAGE, the Dockerfile's default if it
    can be pulled, else one made from Debian's packages (kept as LOCAL_BASE)."""
    wanted = os.environ.get("SOUNDING_TEST_BASE_IMAGE")
    if wanted:
        if not docker.has_image(wanted):
            docker.run("pull", wanted, timeout=900)
        return wanted
    if docker.has_image(DEFAULT_BASE):
        return DEFAULT_BASE
    pulled = docker.run("pull", DEFAULT_BASE, check=False, timeout=900)
    if pulled.returncode == 0:
        return DEFAULT_BASE
    if docker.has_image(LOCAL_BASE):
        return LOCAL_BASE
    if _find("debootstrap", "/usr/sbin/debootstrap") is None:
        unavailable(
            f"{DEFAULT_BASE} cannot be pulled and debootstrap is not installed to make a base"
        )
    say(request.config, f"{DEFAULT_BASE} cannot be pulled: making {LOCAL_BASE} with debootstrap")
    began = time.monotonic()
    mirror = os.environ.get("SOUNDING_TEST_DEBIAN_MIRROR")
    subprocess_args = ["sh", str(DOCKER_DIR / "make-base-image.sh"), LOCAL_BASE]
    if mirror:
        subprocess_args.append(mirror)
    done = subprocess.run(
        subprocess_args,
        capture_output=True,
        text=True,
        timeout=1200,
        env={**os.environ, "DOCKER": docker.cli},
    )
    if done.returncode != 0:
        pytest.fail(f"making {LOCAL_BASE} failed:\n{tail(done.stderr)}", pytrace=False)
    say(request.config, f"made {LOCAL_BASE} in {time.monotonic() - began:.0f} s")
    return LOCAL_BASE


def _pip_settings() -> dict[str, list[str]]:
    """This machine's pip configuration: key -> values (find-links, cert, ...)."""
    done = subprocess.run(
        [sys.executable, "-m", "pip", "config", "list"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    found: dict[str, list[str]] = {}
    for line in done.stdout.splitlines():
        key, _, value = line.partition("=")
        found.setdefault(key.rsplit(".", 1)[-1], []).append(value.strip().strip("'\""))
    return found


def host_ca_bundle() -> Path | None:
    """The CA bundle pip trusts on this machine, which the build's pip must trust too."""
    pip = _pip_settings()
    for value in (
        os.environ.get("PIP_CERT"),
        *pip.get("cert", []),
        os.environ.get("REQUESTS_CA_BUNDLE"),
        os.environ.get("SSL_CERT_FILE"),
        "/etc/ssl/certs/ca-certificates.crt",
    ):
        if value and Path(value).is_file():
            return Path(value)
    return None


def local_torch_wheels() -> list[Path]:
    """CPU torch wheels of the pinned version in this machine's find-links folders."""
    folders = [*os.environ.get("SOUNDING_TEST_WHEELS", "").split(os.pathsep)]
    folders += os.environ.get("PIP_FIND_LINKS", "").split()
    for value in _pip_settings().get("find-links", []):
        folders += value.split()
    wheels: dict[str, Path] = {}
    for folder in folders:
        path = Path(folder.removeprefix("file://")) if folder else None
        if path and path.is_dir():
            for wheel in path.glob(f"torch-{TORCH_VERSION}+cpu-*.whl"):
                wheels.setdefault(wheel.name, wheel)
    return list(wheels.values())


@dataclass
class Image:
    tag: str
    base: str
    ca_bundle: Path | None
    pip_conf: Path
    marker: str  # a line only the pip.conf secret holds
    build_seconds: float
    size_bytes: int


def _context(root: Path, wheels: list[Path]) -> Path:
    """A build context as a site without the PyTorch index lays it out: the repository
    (less what docker/Dockerfile.dockerignore leaves out) with the CPU torch wheel in
    docker/wheels/."""
    top = {p for p in IGNORED if not p.startswith("**/")}
    ignore = shutil.ignore_patterns("*.whl", *(p[3:] for p in IGNORED if p.startswith("**/")))
    root.mkdir()
    for source in REPO.iterdir():
        if source.name in top:
            continue
        if source.is_dir():
            shutil.copytree(source, root / source.name, ignore=ignore, symlinks=True)
        else:
            shutil.copy2(source, root / source.name)
    for wheel in wheels:
        target = root / "docker" / "wheels" / wheel.name
        try:
            os.link(wheel, target)
        except OSError:
            shutil.copy2(wheel, target)
    return root


@pytest.fixture(scope="session")
def image(
    docker: Docker,
    base_image: str,
    tmp_path_factory: pytest.TempPathFactory,
    request: pytest.FixtureRequest,
) -> Iterator[Image]:
    """The image, built once per session as the README says; its tag removed after."""
    tmp = tmp_path_factory.mktemp("image")
    wheels = local_torch_wheels()
    context = _context(tmp / "context", wheels)
    ca = host_ca_bundle()
    marker = f"# sounding-test {uuid.uuid4().hex}"
    pip_conf = tmp / "pip.conf"
    pip_conf.write_text(f"{marker}\n[global]\ntimeout = 180\nretries = 5\n", "utf-8")
    tag = f"sounding-test:{uuid.uuid4().hex[:12]}"
    args = ["build", "--progress=plain", "-f", str(context / "docker" / "Dockerfile")]
    args += ["--build-arg", f"BASE_IMAGE={base_image}", "-t", tag]
    if wheels:  # the torch wheel from docker/wheels/, not from the PyTorch index
        args += ["--build-arg", "TORCH_INDEX_URL="]
    if ca is not None:
        args += ["--secret", f"id=ca,src={ca}"]
    args += ["--secret", f"id=pip.conf,src={pip_conf}", str(context)]
    began = time.monotonic()
    built = docker.run(*args, check=False, timeout=1800, env={"DOCKER_BUILDKIT": "1"})
    seconds = time.monotonic() - began
    if built.returncode != 0:
        pytest.fail(f"docker build failed:\n{tail(built.stdout + built.stderr, 60)}", pytrace=False)
    size = int(docker.run("image", "inspect", "-f", "{{.Size}}", tag).stdout.strip())
    (tmp / "build.log").write_text(built.stdout + built.stderr, "utf-8")
    say(
        request.config,
        f"built {tag} on {base_image} in {seconds:.0f} s, {size / 1e6:.0f} MB "
        f"(torch from {'docker/wheels' if wheels else 'the torch index'}; "
        f"log {tmp / 'build.log'})",
    )
    try:
        yield Image(tag, base_image, ca, pip_conf, marker, seconds, size)
    finally:
        docker.run("rmi", "-f", tag, check=False, timeout=300)


def inspect(docker: Docker, name: str) -> dict:
    return json.loads(docker.run("inspect", name).stdout)[0]
