"""The image and docker/compose.yaml, built and run as the README's container section says.

The demo wiki is indexed by the container's own ``sounding index`` onto the compose
file's index volume, served by its ``sounding`` service and re-indexed by its nightly
job. The tests talk to the service only through the port compose publishes on
127.0.0.1.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import socket
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path

import httpx
import pytest

from tests.conftest import DEMO_CORPUS, REPO
from tests.container.conftest import Docker, Image, inspect

pytestmark = [pytest.mark.slow, pytest.mark.subprocess, pytest.mark.container]

QUESTIONS = {
    q["question"]: q["expected"]
    for q in json.loads((REPO / "tests/integration/demo_questions.json").read_text("utf-8"))
}
HR_QUESTION = "Can I move unused vacation days to next year?"  # an HR page: group hr only
OPEN_QUESTION = "I accidentally deleted a spreadsheet from the shared drive, can I get it back?"
EDITED = "runbooks/restore-file-share.md"  # edited before the nightly run by hand
EDITED_LATER = "faq/glossary.md"  # edited before the scheduled nightly run
UID = 10001

# Run inside the image (and its base): what a build could have left behind.
SCAN = r"""
import hashlib, importlib.util, json, os, shutil, subprocess, sys
bundles, pip_files, caches, wheels = {}, [], [], []
for top in ("/etc", "/opt", "/root", "/run", "/tmp", "/usr", "/var", "/data", "/home"):
    for root, dirs, files in os.walk(top):
        if root.startswith(("/proc", "/sys")):
            continue
        for d in dirs:
            if d in (".cache", "pip-cache", "http-v2") or (d == "pip" and root.endswith(".cache")):
                caches.append(os.path.join(root, d))
        for f in files:
            p = os.path.join(root, f)
            if f in ("pip.conf", "pip.ini"):
                pip_files.append(p)
            if f.endswith(".whl"):
                wheels.append(p)
            if f.endswith((".crt", ".pem")) and not os.path.islink(p):
                try:
                    if os.path.getsize(p) > 50_000:
                        with open(p, "rb") as fh:
                            bundles[p] = hashlib.sha256(fh.read()).hexdigest()
                except OSError:
                    pass
out = {"bundles": bundles, "pip_files": pip_files, "caches": caches, "wheels": wheels,
       "run": sorted(os.listdir("/run/secrets")) if os.path.isdir("/run/secrets") else []}
if len(sys.argv) > 1:
    tools = ["pytest", "hypothesis", "ruff", "mypy", "selenium", "schemathesis", "bm25s",
             "Stemmer", "httpx"]
    out["test_tools"] = [m for m in tools if importlib.util.find_spec(m)]
    out["compilers"] = [c for c in ("gcc", "cc", "c++", "g++", "clang", "make", "ld")
                        if shutil.which(c)]
    out["pip_config"] = subprocess.run([sys.executable, "-m", "pip", "config", "list"],
                                       capture_output=True, text=True).stdout.strip()
    import torch
    out["torch"] = [torch.__version__, torch.version.cuda]
    out["uid"] = os.getuid()
print(json.dumps(out))
"""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass
class Stack:
    """The compose project of this module: its settings, folders and URL."""

    docker: Docker
    env: dict[str, str]
    project: str
    docs: Path
    url: str

    def compose(self, *args: str, **kw):
        return self.docker.compose(*args, env=self.env, **kw)

    def run(self, service: str, *command: str, **kw):
        """``docker-compose run --rm`` of one service (without starting the others)."""
        return self.compose("run", "--rm", "-T", "--no-deps", service, *command, **kw)

    def container(self, service: str) -> str:
        found = self.compose("ps", "-q", service).stdout.split()
        assert found, f"no container of service {service}"
        return found[0]


@pytest.fixture(scope="module")
def stack(docker: Docker, image: Image, tmp_path_factory: pytest.TempPathFactory):
    """The compose project, on a copy of the demo wiki; everything removed after."""
    tmp = tmp_path_factory.mktemp("stack")
    docs = tmp / "docs"
    shutil.copytree(DEMO_CORPUS, docs)
    for path in [docs, *docs.rglob("*")]:  # readable by the container's user
        path.chmod(0o755 if path.is_dir() else 0o644)
    rules = tmp / "access.yaml"
    shutil.copy(REPO / "scripts" / "demo-access.yaml", rules)
    rules.chmod(0o644)
    tmp.chmod(0o755)
    project = f"soundingtest{uuid.uuid4().hex[:8]}"
    port = free_port()
    env = {
        "COMPOSE_PROJECT_NAME": project,
        "SOUNDING_IMAGE": image.tag,
        "SOUNDING_DOCS": str(docs),
        "SOUNDING_ACCESS": str(rules),
        "SOUNDING_HOST_PORT": str(port),
    }
    stack = Stack(docker, env, project, docs, f"http://127.0.0.1:{port}")
    try:
        yield stack
    finally:
        stack.compose("down", "--volumes", "--remove-orphans", "--timeout", "5", check=False)
        label = f"label=com.docker.compose.project={project}"
        left = docker.run("ps", "-aq", "--filter", label, check=False).stdout.split()
        if left:
            docker.run("rm", "-f", "-v", *left, check=False)
        for kind in ("volume", "network"):
            names = docker.run(kind, "ls", "-q", "--filter", label, check=False).stdout.split()
            if names:
                docker.run(kind, "rm", *names, check=False)


def index_report(done) -> dict:
    """The JSON report ``sounding index --json`` printed (the last JSON object)."""
    text = done.stdout
    return json.loads(text[text.index("{") :])


@pytest.fixture(scope="module")
def indexed(stack: Stack) -> dict:
    """The demo wiki indexed by the container's own ``sounding index``."""
    done = stack.run("reindex", "sounding", "index", "/data/docs", "--json", "--quiet")
    return index_report(done)


@pytest.fixture(scope="module")
def keys(stack: Stack, indexed: dict) -> dict[str, str]:
    """Two read keys made in the container: one of group hr, one of no group."""
    made = {}
    for name, groups in (("test-hr", ["--groups", "hr"]), ("test-guest", [])):
        done = stack.run(
            "sounding", "sounding", "keys", "create", "--name", name, "--scope", "read", *groups
        )
        made[name] = done.stdout.strip().splitlines()[-1].strip()
    return made


@pytest.fixture(scope="module")
def service(stack: Stack, keys: dict[str, str]) -> Iterator[httpx.Client]:
    """The compose file's ``sounding`` service, answering on 127.0.0.1."""
    stack.compose("up", "-d", "sounding")
    deadline = time.monotonic() + 180
    # trust_env=False: straight to 127.0.0.1, whatever proxy the environment names.
    with httpx.Client(base_url=stack.url, timeout=30, trust_env=False) as client:
        while True:
            try:
                r = client.get("/health")
                if r.status_code == 200 and r.json().get("index_loaded"):
                    break
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline:
                logs = stack.compose("logs", "--no-color", "sounding", check=False).stdout
                pytest.fail(f"the service did not answer /health:\n{logs[-3000:]}", pytrace=False)
            time.sleep(1)
        yield client


def search(client: httpx.Client, key: str | None, query: str, **body) -> httpx.Response:
    headers = {"Authorization": f"Bearer {key}"} if key else {}
    return client.post("/search", json={"query": query, "k": 5, **body}, headers=headers)


def top_documents(r: httpx.Response) -> list[str]:
    assert r.status_code == 200, r.text
    return [p["document_id"] for p in r.json()["results"]]


def scan(docker: Docker, image: str, full: bool) -> dict:
    done = docker.run(
        "run", "--rm", "--network", "none", "--entrypoint", "python3", image,
        "-c", SCAN, *(["full"] if full else []),
    )  # fmt: skip
    return json.loads(done.stdout)


def test_image_holds_no_ca_bundle_pip_configuration_cache_or_test_tools(
    docker: Docker, image: Image
) -> None:
    found = scan(docker, image.tag, full=True)
    base = scan(docker, image.base, full=False)
    assert found["uid"] == UID
    assert found["test_tools"] == [] and found["compilers"] == []
    assert found["torch"][1] is None, f"torch {found['torch'][0]} is built for CUDA"
    assert found["pip_files"] == [] and found["pip_config"] == ""
    assert found["caches"] == [] and found["run"] == []
    assert set(found["wheels"]) <= set(base["wheels"])  # e.g. Debian's for ensurepip
    # The CA bundle given as a secret is in no file the build added (the base image's
    # own bundle may equal it on a machine that trusts only the public authorities).
    if image.ca_bundle is not None:
        host = hashlib.sha256(image.ca_bundle.read_bytes()).hexdigest()
        ours = {p for p, h in found["bundles"].items() if h == host}
        added = {p for p in ours if base["bundles"].get(p) != host}
        assert added == set(), f"the build left the CA bundle in {sorted(added)}"
    history = docker.run("history", "--no-trunc", "--format", "{{.CreatedBy}}", image.tag).stdout
    for leak in (str(image.pip_conf), image.marker, str(image.ca_bundle or "-no-ca-")):
        assert leak not in history
    config = inspect(docker, image.tag)["Config"]
    assert config["User"] == f"{UID}:{UID}"
    assert "/data/index" in config["Volumes"] and config["Healthcheck"]["Test"]


def test_the_containers_sounding_index_indexes_the_demo_wiki(indexed: dict) -> None:
    # Every demo file is read, the scanned PDF page too (the image's Tesseract).
    files = [p for p in DEMO_CORPUS.rglob("*") if p.is_file()]
    assert indexed["skipped"] == [] and indexed["documents"] >= len(files)
    assert HR_QUESTION and set(QUESTIONS[HR_QUESTION]) <= set(indexed["added"])


def test_health_answers_without_a_key(service: httpx.Client) -> None:
    r = service.get("/health")
    assert r.status_code == 200
    assert r.json()["status"] == "ok" and r.json()["documents"] > 0


def test_search_without_a_key_is_refused(service: httpx.Client) -> None:
    assert search(service, None, OPEN_QUESTION).status_code == 401


def test_search_with_a_key_finds_the_demos_answers(
    service: httpx.Client, keys: dict[str, str]
) -> None:
    for question in (HR_QUESTION, OPEN_QUESTION):
        top = top_documents(search(service, keys["test-hr"], question, max_per_document=1))
        assert set(QUESTIONS[question]) & set(top), f"{question}: {top}"
    # The folder rules of the demo hold: a key of no group never sees the HR pages.
    guest = top_documents(search(service, keys["test-guest"], HR_QUESTION))
    assert not [d for d in guest if d.startswith("hr/")], guest


def test_the_service_runs_as_the_unprivileged_user(stack: Stack, service) -> None:
    container = stack.container("sounding")
    status = stack.docker.run("exec", container, "cat", "/proc/1/status").stdout
    uids = next(line.split()[1:] for line in status.splitlines() if line.startswith("Uid:"))
    assert uids == [str(UID)] * 4
    cmdline = stack.docker.run("exec", container, "cat", "/proc/1/cmdline").stdout
    assert "sounding" in cmdline and "serve" in cmdline


def test_index_files_on_the_volume_are_owner_only(stack: Stack, service) -> None:
    container = stack.container("sounding")
    listing = stack.docker.run(
        "exec", container, "find", "/data/index", "-printf", "%m %U %G %y %p\\n"
    ).stdout.splitlines()
    assert len(listing) > 3 and any("keys.db" in line for line in listing)
    for line in listing:
        mode, uid, gid, kind, path = line.split(maxsplit=4)
        assert (uid, gid) == (str(UID), str(UID)), line
        assert int(mode, 8) & 0o077 == 0, line
        if path == "/data/index":
            assert kind == "d" and mode == "700"


def test_a_second_run_while_one_holds_the_lock_changes_nothing(stack: Stack, service) -> None:
    holder = f"{stack.project}_lock_holder"
    hold = (
        "import time; from sounding.indexer.lock import IndexLock; "
        "held = IndexLock('/data/index').acquire(); print('holding', flush=True); time.sleep(600)"
    )
    stack.compose("run", "-d", "-T", "--no-deps", "--name", holder, "reindex", "python", "-c", hold)
    try:
        deadline = time.monotonic() + 60
        while "holding" not in stack.docker.run("logs", holder, check=False).stdout:
            assert time.monotonic() < deadline, "the lock holder did not take the lock"
            time.sleep(0.5)
        before = service.get("/health").json()["generation"]
        done = stack.run("reindex", "sounding-nightly", "--now", check=False)
        assert done.returncode == 75, done.stderr
        assert "being updated" in done.stderr
    finally:
        stack.docker.run("rm", "-f", holder, check=False)
    assert service.get("/health").json()["generation"] == before
    checked = stack.run("reindex", "sounding", "check", check=False)
    assert checked.returncode == 0, checked.stdout + checked.stderr


def edit(stack: Stack, doc_id: str, word: str) -> None:
    path = stack.docs / doc_id
    text = path.read_text("utf-8")
    path.write_text(f"{text.rstrip()}\n\nAsk the {word} desk if this page did not help.\n")


def wait_until_found(service: httpx.Client, key: str, word: str, timeout: float) -> list[str]:
    """Documents a lexical search for ``word`` finds, once any is found (or [])."""
    deadline = time.monotonic() + timeout
    while True:
        found = top_documents(search(service, key, word, mode="lexical"))
        if found or time.monotonic() > deadline:
            return found
        time.sleep(1)


def test_a_nightly_run_after_editing_one_document_re_embeds_only_that_one(
    stack: Stack, service: httpx.Client, keys: dict[str, str], indexed: dict
) -> None:
    word = f"zq{uuid.uuid4().hex[:8]}"
    edit(stack, EDITED, word)
    done = stack.run("reindex", "sounding-nightly", "--now", "--json")
    report = index_report(done)
    assert report["updated"] == [EDITED]
    assert report["added"] == [] and report["removed"] == [] and report["skipped"] == []
    assert report["unchanged"] == indexed["documents"] - 1
    chunks = len(service.get(f"/documents/{EDITED}", headers=auth(keys)).json()["chunks"])
    # Only the edited document's chunks went through the encoder (those whose text the
    # edit left alone may keep their vectors).
    assert report["chunks_embedded"] >= 1
    assert report["chunks_embedded"] + report["chunks_reused"] == chunks
    # The service on the same volume switches to the new generation by itself.
    assert wait_until_found(service, keys["test-hr"], word, 60) == [EDITED]


def auth(keys: dict[str, str]) -> dict[str, str]:
    return {"Authorization": f"Bearer {keys['test-hr']}"}


def test_the_nightly_job_runs_once_at_the_configured_time(
    stack: Stack, service: httpx.Client, keys: dict[str, str]
) -> None:
    word = f"zq{uuid.uuid4().hex[:8]}"
    edit(stack, EDITED_LATER, word)
    at = (datetime.now(timezone.utc) + timedelta(seconds=25)).strftime("%H:%M:%S")
    stack.env["SOUNDING_REINDEX_AT"] = at
    try:
        stack.compose("up", "-d", "--no-deps", "reindex")
        job = stack.container("reindex")
        time.sleep(5)  # not at start: the edit waits for the configured time
        waiting = stack.docker.run("logs", job).stderr
        assert "next re-index at " in waiting and f"{at} UTC" in waiting, waiting
        assert wait_until_found(service, keys["test-hr"], word, 0) == []
        assert wait_until_found(service, keys["test-hr"], word, 120) == [EDITED_LATER]
        # One run (its summary on stdout), then it waits for the same time tomorrow.
        deadline = time.monotonic() + 60
        while (logs := stack.docker.run("logs", job)).stderr.count("next re-index at") < 2:
            assert time.monotonic() < deadline, logs.stderr
            time.sleep(1)
        assert logs.stdout.count("updated 1,") == 1, logs.stdout
        assert logs.stderr.count("next re-index at") == 2, logs.stderr
        assert inspect(stack.docker, job)["State"]["Running"]
    finally:
        stack.env.pop("SOUNDING_REINDEX_AT")
        stack.compose("stop", "--timeout", "5", "reindex", check=False)


def test_the_health_check_reports_healthy(stack: Stack, service) -> None:
    container = stack.container("sounding")
    deadline = time.monotonic() + 150
    while (state := inspect(stack.docker, container)["State"]["Health"])["Status"] != "healthy":
        assert state["Status"] != "unhealthy", state["Log"][-1:]
        assert time.monotonic() < deadline, state
        time.sleep(2)
